"""The exception tree: exit codes and self-built messages."""

from qcfit.errors import (
    BadRow,
    ConfigError,
    InputFileError,
    InvalidArgumentError,
    Problem,
    QcfitError,
    StoreError,
)


def test_config_error_lists_every_problem_with_its_key():
    err = ConfigError([Problem("shift[2].end", '"25:00" is not a time of day'), Problem("plant.timezone", "missing")], path="plant.toml")
    assert err.exit_code == 2
    assert 'shift[2].end: "25:00" is not a time of day' in str(err)
    assert "plant.timezone: missing" in str(err)
    assert "plant.toml" in str(err)


def test_input_file_error_names_file_and_lines():
    err = InputFileError("events.csv", [BadRow(3, "unknown line 'L9'")])
    assert err.exit_code == 2
    assert "events.csv: line 3: unknown line 'L9'" in str(err)


def test_invalid_argument_is_a_value_error_naming_the_argument():
    err = InvalidArgumentError("observed", "has a negative count at [2, 4]")
    assert isinstance(err, ValueError) and isinstance(err, QcfitError)
    assert str(err) == "observed: has a negative count at [2, 4]"


def test_store_error_exits_one():
    assert StoreError("disk full").exit_code == 1
