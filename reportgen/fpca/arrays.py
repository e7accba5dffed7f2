"""The array types of the numerical core's annotations.

``FloatArray`` does not pin the dtype (numpy's stubs type bincount and einsum loosely);
shapes and dtypes are in the numpydoc docstrings.
"""

from typing import Any

import numpy as np
from numpy.typing import NDArray

FloatArray = NDArray[Any]
IntArray = NDArray[np.intp]
