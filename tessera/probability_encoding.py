"""How probability maps are stored: uint8 (round(255 p)), float16 or float32, and back."""

import numpy as np

from tessera.errors import TesseraInputError

DTYPES = ("uint8", "float16", "float32")


def stored_dtype(dtype):
    """The numpy dtype of probabilities stored as `dtype`; any name but ``DTYPES`` is refused.

    Examples
    --------
    >>> stored_dtype("uint8")
    dtype('uint8')
    """
    if dtype not in DTYPES:
        raise TesseraInputError(f"predict.dtype must be one of {', '.join(DTYPES)}, got {dtype!r}")
    return np.dtype(dtype)


def encode_probability(prob, dtype):
    """Store probabilities as uint8 (round(255 p)), float16 or float32.

    Examples
    --------
    >>> encode_probability(np.array([0.0, 0.5, 1.0], np.float32), "uint8")
    array([  0, 128, 255], dtype=uint8)
    """
    stored_dtype(dtype)
    prob = np.asarray(prob, dtype=np.float32)
    if dtype == "uint8":
        return np.rint(np.clip(prob, 0.0, 1.0) * 255.0).astype(np.uint8)
    return prob.astype(dtype)


def probability_scale(dtype):
    """Divide stored values by this to get probabilities (255 for uint8, else 1).

    Examples
    --------
    >>> probability_scale("uint8"), probability_scale("float16")
    (255.0, 1.0)
    """
    return 255.0 if dtype == "uint8" else 1.0
