"""Shaped array aliases used across the numeric core.

The shapes are documentation: numpy's typing cannot check them, so each alias names the
shape in its docstring and the functions that take it say which axis is which.
"""

from typing import Any, TypeAlias

import numpy as np
import numpy.typing as npt

FloatArray: TypeAlias = npt.NDArray[np.float64]
"""Any float64 array; broadcasting rules of numpy apply."""

BoolArray: TypeAlias = npt.NDArray[np.bool_]
"""Boolean array, e.g. ``True`` for a call."""

IntArray: TypeAlias = npt.NDArray[np.int64]
"""Integer array, e.g. reason codes."""

ArrayLike: TypeAlias = npt.ArrayLike
"""Anything numpy turns into an array: scalars, lists, arrays."""


def readonly(values: Any, dtype: npt.DTypeLike | None = None) -> npt.NDArray[Any]:
    """A read-only copy of ``values`` (as ``dtype`` if given): arrays held by frozen results.

    The copy keeps a caller's later writes out of the result, and the write flag keeps the
    result's users from changing it in place.
    """
    out = np.array(values, dtype=dtype, copy=True)
    out.flags.writeable = False
    return out


EXERCISE_STYLES = ("european", "american")
"""An option's exercise style as files, the store and outputs spell it: at expiry only, or any
day up to expiry."""
