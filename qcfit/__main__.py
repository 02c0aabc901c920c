"""``python -m qcfit`` runs the command-line interface."""

from qcfit.cli import main

if __name__ == "__main__":
    main()
