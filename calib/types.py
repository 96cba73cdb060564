"""Shaped array aliases used across the numeric core.

The shapes are documentation: numpy's typing cannot check them, so each alias names the
shape in its docstring and the functions that take it say which axis is which.
"""

from typing import TypeAlias

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
