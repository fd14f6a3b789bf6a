"""Checks of the numbers handed to a procedure core, and the one error they raise.

A core refuses bad input before computing anything, with a message that names the argument, so a
runner can pass the message on to the user unchanged.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray

from meshwarden.errors import MeshwardenError

FloatArray = NDArray[np.float64]


class ProcedureInputError(MeshwardenError):
    """Numbers a procedure core cannot work with (wrong shape, not finite, too few points ...)."""

    code = "procedure_input"


def float_vector(name: str, raw: Any, *, min_length: int = 1) -> FloatArray:
    """``raw`` as a 1-D float array of finite numbers with at least ``min_length`` entries."""
    try:
        array = np.asarray(raw, dtype=float)
    except (TypeError, ValueError):
        raise ProcedureInputError(f"{name} must be a sequence of numbers") from None
    if array.ndim != 1:
        raise ProcedureInputError(f"{name} must be one-dimensional, got shape {array.shape}")
    if array.size < min_length:
        raise ProcedureInputError(f"{name} needs at least {min_length} values, got {array.size}")
    if not np.all(np.isfinite(array)):
        raise ProcedureInputError(f"{name} must contain only finite numbers")
    return array


def float_matrix(name: str, raw: Any) -> FloatArray:
    """``raw`` as a 2-D float array of finite numbers (a 1-D input becomes one column)."""
    try:
        array = np.asarray(raw, dtype=float)
    except (TypeError, ValueError):
        raise ProcedureInputError(f"{name} must be an array of numbers") from None
    if array.ndim == 1:
        array = array[:, None]
    if array.ndim != 2 or array.size == 0:
        raise ProcedureInputError(f"{name} must be a non-empty 2-D array, got shape {array.shape}")
    if not np.all(np.isfinite(array)):
        raise ProcedureInputError(f"{name} must contain only finite numbers")
    return array


def same_length(first: str, a: FloatArray, second: str, b: FloatArray) -> None:
    """Refuse two arrays that should pair up point by point but differ in length."""
    if a.shape[0] != b.shape[0]:
        raise ProcedureInputError(f"{first} has {a.shape[0]} points but {second} has {b.shape[0]}")


def positive(name: str, value: float) -> float:
    """A finite, strictly positive number."""
    if isinstance(value, bool) or not isinstance(value, int | float) or not np.isfinite(value) or value <= 0:
        raise ProcedureInputError(f"{name} must be a finite positive number, got {value!r}")
    return float(value)


def non_negative(name: str, value: float) -> float:
    """A finite number >= 0."""
    if isinstance(value, bool) or not isinstance(value, int | float) or not np.isfinite(value) or value < 0:
        raise ProcedureInputError(f"{name} must be a finite number >= 0, got {value!r}")
    return float(value)


def strictly_increasing(name: str, values: FloatArray) -> None:
    """Refuse values that do not rise strictly (sweeps are given in ascending order)."""
    if values.size > 1 and not np.all(np.diff(values) > 0):
        first = int(np.flatnonzero(np.diff(values) <= 0)[0]) + 1
        raise ProcedureInputError(f"{name} must increase strictly: {name}[{first}] = {values[first]:g}")
