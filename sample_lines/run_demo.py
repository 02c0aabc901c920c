"""`make demo`: load the demo plant into a fresh store, evaluate every shift, show the alarm log.

Runs the same commands a plant engineer would type (see the README's walk-through), in-process:

    qcfit --config sample_lines/plant.toml --store sqlite:///demo-store/plant.sqlite init
    qcfit ... load events sample_lines/data/defect_events.csv
    qcfit ... load units sample_lines/data/units_inspected.csv
    qcfit ... evaluate --since 2026-09-07 --until 2026-11-21
    qcfit ... alarms
    qcfit ... report --shift 2026-10-07_B --out demo-store/report-2026-10-07_B.html

The demo takes the raw-event path: counts per shift x line x category are derived from the
logged rejects, and the units inspected (which events cannot give) come from their own file.
``data/shift_counts.csv`` holds the same numbers in the per-shift counts format; loading it
instead of the two files gives the same evaluation.

The store lives in ``demo-store/`` (not tracked); each run starts it afresh.
"""

from __future__ import annotations

import shutil
import sys
from pathlib import Path

from qcfit.cli import COMMAND_MODULES, run

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
STORE_DIR = ROOT / "demo-store"
CONFIG = HERE / "plant.toml"
DATA = HERE / "data"
STORE_URL = f"sqlite:///{STORE_DIR / 'plant.sqlite'}"
FIRST_DAY = "2026-09-07"
LAST_DAY = "2026-11-21"  # the data end with shift 2026-11-21_C
JUMP_SHIFT = "2026-10-07_B"


def step(title: str, *args: str) -> None:
    shown = " ".join(["qcfit", *args])
    print(f"\n=== {title}\n$ {shown}", flush=True)
    code = run(["--config", str(CONFIG), "--store", STORE_URL, *args])
    if code != 0:
        print(f"demo stopped: `{shown}` exited with {code}", file=sys.stderr)
        sys.exit(code)


def main() -> None:
    if STORE_DIR.exists():
        shutil.rmtree(STORE_DIR)
    STORE_DIR.mkdir()
    step("Create the store", "init")
    step("Load the logged rejects (raw defect events)", "load", "events", str(DATA / "defect_events.csv"))
    step("Load the units inspected per shift and line", "load", "units", str(DATA / "units_inspected.csv"))
    step("Evaluate every shift of the demo period", "evaluate", "--since", FIRST_DAY, "--until", LAST_DAY, "--quiet")
    step("The alarm log a supervisor reviews", "alarms")
    if "qcfit.cli.report" in COMMAND_MODULES:
        out = STORE_DIR / f"report-{JUMP_SHIFT}.html"
        step("Shift report of the first shift after the mould change", "report", "--shift", JUMP_SHIFT, "--out", str(out))
        print(f"\nOpen the report in a browser: {out}")
    print(
        "\nqcfit is a decision aid: it does not replace inspection, containment or the plant's "
        "quality procedures, and 'no alarm' does not certify conformity."
    )


if __name__ == "__main__":
    main()
