"""Small array helpers shared by the engine's modules."""

from __future__ import annotations

import numpy as np


def distinct_sorted(values: np.ndarray) -> np.ndarray:
    """np.unique of an already non-decreasing 1-D array: the first of each run
    of equal values.

    The same values as np.unique, without its argument handling or (numpy 2,
    integers) its hashing, which for a few hundred values cost several times
    this one comparison.
    """
    first = np.empty(values.size, dtype=bool)
    first[:1] = True
    np.not_equal(values[1:], values[:-1], out=first[1:])
    return values[first]
