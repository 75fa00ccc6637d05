"""Index dtypes: int32 while counts fit, int64 beyond."""

import numpy as np

_INT32_MAX = np.iinfo(np.int32).max


def index_dtype(*counts):
    """int32 when every count fits in it, int64 otherwise."""
    return np.dtype(np.int32) if max(counts, default=0) <= _INT32_MAX else np.dtype(np.int64)
