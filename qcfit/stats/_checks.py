"""Argument validation shared by the stats modules (private).

Every check names the argument and, where it helps, the first offending index, e.g.
``observed: negative count -3 at [2, 4]``.
"""

from __future__ import annotations

import numpy as np

from qcfit.errors import InvalidArgumentError

SUM_TOLERANCE = 1e-6  # |sum(p) - 1| allowed before proportions are rejected


def _where(mask: np.ndarray) -> str:
    idx = np.argwhere(mask)[0]
    return "[" + ", ".join(str(int(i)) for i in idx) + "]"


def as_float_array(value: object, name: str) -> np.ndarray:
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError) as exc:
        raise InvalidArgumentError(name, f"not numeric ({exc})") from exc
    return arr


def counts(value: object, name: str, *, ndim: tuple[int, ...]) -> np.ndarray:
    """Validate a count array: finite, >= 0, whole numbers; returns float64 of the same shape."""
    arr = as_float_array(value, name)
    if arr.ndim not in ndim:
        raise InvalidArgumentError(name, f"expected {' or '.join(f'{d}-D' for d in ndim)} "
                                   f"array, got shape {arr.shape}")
    if arr.size == 0 or arr.shape[-1] == 0:
        raise InvalidArgumentError(name, "is empty")
    bad = ~np.isfinite(arr)
    if bad.any():
        raise InvalidArgumentError(name, f"NaN or infinite value at {_where(bad)}")
    bad = arr < 0
    if bad.any():
        raise InvalidArgumentError(name, f"negative count {arr[bad][0]:g} at {_where(bad)}")
    bad = arr != np.floor(arr)
    if bad.any():
        raise InvalidArgumentError(name, f"fractional count {arr[bad][0]:g} at {_where(bad)}")
    if (arr > 2.0**53).any():
        raise InvalidArgumentError(name, "count above 2**53 cannot be held exactly")
    return arr


def proportions(value: object, name: str, k: int, *, normalize: bool) -> np.ndarray:
    """Validate baseline proportions of shape (k,) or (m, k): finite, >= 0, sum 1 (or rescale)."""
    arr = as_float_array(value, name)
    if arr.ndim not in (1, 2) or arr.shape[-1] != k:
        raise InvalidArgumentError(name, f"shape {arr.shape} does not match {k} categories")
    bad = ~np.isfinite(arr)
    if bad.any():
        raise InvalidArgumentError(name, f"NaN or infinite value at {_where(bad)}")
    bad = arr < 0
    if bad.any():
        raise InvalidArgumentError(name, f"negative proportion {arr[bad][0]:g} at {_where(bad)}")
    total = arr.sum(axis=-1, keepdims=True)
    if (total <= 0).any():
        raise InvalidArgumentError(name, "all proportions are zero")
    off = np.abs(total - 1.0) > SUM_TOLERANCE
    if off.any() and not normalize:
        first = float(total[off][0])
        raise InvalidArgumentError(
            name, f"sum to {first:.9g}, not 1 (pass normalize=True to rescale them)")
    return arr / total


def probability(value: float, name: str, *, open_interval: bool = True) -> float:
    x = float(value)
    ok = 0.0 < x < 1.0 if open_interval else 0.0 <= x <= 1.0
    if not np.isfinite(x) or not ok:
        raise InvalidArgumentError(name, f"must be in (0, 1), got {value!r}")
    return x


def positive_int(value: object, name: str, *, minimum: int = 1) -> int:
    try:
        x = int(value)  # type: ignore[call-overload]
    except (TypeError, ValueError) as exc:
        raise InvalidArgumentError(name, f"not an integer: {value!r}") from exc
    if x != value or x < minimum:
        raise InvalidArgumentError(name, f"must be a whole number >= {minimum}, got {value!r}")
    return x


def choice(value: str, name: str, allowed: tuple[str, ...]) -> str:
    if value not in allowed:
        raise InvalidArgumentError(name, f"{value!r} is not one of {', '.join(allowed)}")
    return value


def levels(value: object) -> tuple[float, ...]:
    out = tuple(float(v) for v in np.atleast_1d(np.asarray(value, dtype=float)))
    for a in out:
        if not 0.0 < a < 1.0:
            raise InvalidArgumentError("levels", f"decision level {a!r} is not in (0, 1)")
    return out


def readonly(arr: np.ndarray) -> np.ndarray:
    """Read-only version of ``arr``; copies only when ``arr`` is a view of other data."""
    out = arr if arr.flags.owndata and arr.flags.writeable else np.array(arr, copy=True)
    out.setflags(write=False)
    return out
