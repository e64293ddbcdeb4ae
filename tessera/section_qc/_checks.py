"""Checks of the parameters and images given to the section QC functions."""

import math
import numbers

import numpy as np

from tessera.errors import TesseraInputError


def check_int(value, name, *, minimum):
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise TesseraInputError(f"{name} must be an integer >= {minimum}, got {value!r}")
    if value < minimum:
        raise TesseraInputError(f"{name} must be an integer >= {minimum}, got {value!r}")
    return int(value)


def check_float(value, name, *, low, high=math.inf, low_open=False):
    """Return `value` as a finite float in [low, high] (or (low, high] if `low_open`)."""
    interval = f"{'(' if low_open else '['}{low}, {high}{']' if math.isfinite(high) else ')'}"
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise TesseraInputError(f"{name} must be a number in {interval}, got {value!r}")
    f = float(value)
    too_low = f <= low if low_open else f < low
    if not math.isfinite(f) or too_low or f > high:
        raise TesseraInputError(f"{name} must be a finite number in {interval}, got {value!r}")
    return f


def check_numeric_dtype(dtype, name):
    dtype = np.dtype(dtype)
    if not (np.issubdtype(dtype, np.integer) or np.issubdtype(dtype, np.floating)):
        raise TesseraInputError(
            f"{name} must hold integer or floating-point grey values, got dtype {dtype}"
        )


def as_section(section, name):
    """Check a 2D numeric non-empty image; return it as an ndarray without converting dtype."""
    arr = np.asarray(section)
    check_numeric_dtype(arr.dtype, name)
    if arr.ndim != 2:
        raise TesseraInputError(f"{name} must be a 2D image (rows, columns), got ndim={arr.ndim}")
    if arr.size == 0:
        raise TesseraInputError(f"{name} must not be empty, got shape {arr.shape}")
    return arr


def check_finite(arr, name):
    if np.issubdtype(arr.dtype, np.floating) and not np.all(np.isfinite(arr)):
        raise TesseraInputError(f"{name} must contain only finite values (no NaN or inf)")
