"""The package's numpy array type aliases, defined once (annotations only; no runtime behaviour)."""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.intp]
BoolArray = NDArray[np.bool_]
ObjectArray = NDArray[np.object_]

__all__ = ["BoolArray", "FloatArray", "IntArray", "ObjectArray"]
