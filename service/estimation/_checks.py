"""Boundary validation shared by the estimation modules.

Every check raises ``ValueError`` whose message names the field, shows the value and states
the rule, e.g. ``floor = 1.5: must be in (0, 1].`` Inside the package inputs are trusted
once they have passed these checks.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = [
    "check_confidence",
    "check_finite_array",
    "check_fraction",
    "check_same_length",
    "describe",
]


def describe(value: object) -> str:
    """Short printable form of a value for an error message."""
    if isinstance(value, np.generic):
        return repr(value.item())
    if isinstance(value, np.ndarray):
        if value.size <= 6:
            return np.array2string(value, precision=6, separator=", ")
        return f"array of shape {value.shape}"
    return repr(value)


def check_fraction(name: str, value: float, *, low_open: bool, high_open: bool) -> float:
    """``value`` as a float in the interval (0, 1) with the given open/closed ends."""
    try:
        number = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} = {describe(value)}: must be a number.") from None
    low_ok = number > 0.0 if low_open else number >= 0.0
    high_ok = number < 1.0 if high_open else number <= 1.0
    if not (math.isfinite(number) and low_ok and high_ok):
        interval = ("(" if low_open else "[") + "0, 1" + (")" if high_open else "]")
        raise ValueError(f"{name} = {describe(value)}: must be in {interval}.")
    return number


def check_confidence(value: float, *, name: str = "confidence") -> float:
    """A confidence level, strictly inside (0, 1)."""
    return check_fraction(name, value, low_open=True, high_open=True)


def check_finite_array(
    name: str,
    value: object,
    *,
    ndim: int | None = None,
    dtype: type = np.float64,
) -> np.ndarray:
    """``value`` as a finite numpy array (NaN and inf rejected) of the given rank."""
    try:
        array: np.ndarray = np.asarray(value, dtype=dtype)
    except (TypeError, ValueError):
        raise ValueError(f"{name} = {describe(value)}: must be numeric.") from None
    if ndim is not None and array.ndim != ndim:
        raise ValueError(f"{name} has shape {array.shape}: must have {ndim} dimension(s).")
    if array.dtype.kind == "f" and not np.all(np.isfinite(array)):
        bad = int(np.flatnonzero(~np.isfinite(array.ravel()))[0])
        raise ValueError(
            f"{name}[{bad}] = {describe(array.ravel()[bad])}: must be finite (no NaN or inf)."
        )
    return array


def check_same_length(reference_name: str, reference: int, **arrays: np.ndarray) -> None:
    """Every array's first dimension equals ``reference``."""
    for name, array in arrays.items():
        if array.shape[0] != reference:
            raise ValueError(
                f"{name} has {array.shape[0]} rows: must match {reference_name} ({reference})."
            )
