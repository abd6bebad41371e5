"""Array type aliases shared by the package (one place, so annotations agree)."""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray

__all__ = ["BoolArray", "FloatArray", "IntArray", "SignedArray"]

#: Float64 array: probabilities, losses, factor nodes.
FloatArray = NDArray[np.float64]
#: Int64 array: indices, counts, default patterns.
IntArray = NDArray[np.int64]
#: Boolean array: default indicators, masks.
BoolArray = NDArray[np.bool_]
#: Signed integer array of either width (int32 where indices fit, else int64).
SignedArray = NDArray[np.signedinteger[Any]]
