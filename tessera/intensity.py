"""Bring EM grey values of any integer or float type to uint8.

Data other than 8-bit are mapped to uint8 by robust percentiles estimated on a strided sample of
every section, and the mapping is described by a plain dict that the caller records. A stack is
anything with ``shape`` (z, y, x), ``dtype`` and ``read(z)`` returning one 2D section (see
:func:`tessera.io.stacks.open_stack`); it is read one section at a time.
"""

import numpy as np

from tessera.errors import TesseraInputError

__all__ = ["estimate_intensity_range", "choose_mapping", "to_uint8"]


def estimate_intensity_range(source, *, percentiles=(0.1, 99.9), max_samples=2_000_000):
    """Robust grey-value range of a stack, plus its exact extremes, in one pass.

    Every section is read once; percentiles come from a strided sample of each, the extremes
    from all pixels.

    Parameters
    ----------
    source : stack
        Anything with ``shape`` (z, y, x) and ``read(z)`` returning one 2D section.
    percentiles : pair of float, optional
        The percentiles (in percent) to estimate.
    max_samples : int, optional
        About how many pixels the percentiles are estimated from, over the whole stack.

    Returns
    -------
    dict
        ``low`` and ``high`` (the values at the two `percentiles`, in percent), ``min``, ``max``.

    Examples
    --------
    >>> class Stack:  # two 4 x 4 sections of 16-bit data
    ...     shape = (2, 4, 4)
    ...     dtype = np.dtype(np.uint16)
    ...     def read(self, z):
    ...         return np.arange(16, dtype=np.uint16).reshape(4, 4) * 100 + 1000 * z
    >>> estimate_intensity_range(Stack(), percentiles=(0, 100), max_samples=8)
    {'low': 0.0, 'high': 2000.0, 'min': 0.0, 'max': 2500.0}
    """
    z_count, y_count, x_count = source.shape
    per_section = max(1, max_samples // z_count)
    stride = max(1, int(np.sqrt(y_count * x_count / per_section)))
    samples, lows, highs = [], [], []
    for z in range(z_count):
        section = np.asarray(source.read(z))
        finite = (
            section if np.issubdtype(section.dtype, np.integer) else section[np.isfinite(section)]
        )
        if finite.size:
            lows.append(float(finite.min()))
            highs.append(float(finite.max()))
        sample = section[::stride, ::stride].ravel().astype(np.float64)
        samples.append(sample[np.isfinite(sample)])
    values = np.concatenate(samples)
    if values.size == 0:
        raise TesseraInputError("the stack holds no finite pixel values")
    low, high = np.percentile(values, percentiles)
    return {"low": float(low), "high": float(high), "min": min(lows), "max": max(highs)}


def choose_mapping(source, *, percentiles=(0.1, 99.9)):
    """How to bring a stack to uint8: None for uint8 data, else a recorded mapping.

    Integer data whose values all lie in 0..255 (8-bit data saved in a wider type, common in
    MRC files) are copied exactly; anything else is stretched so the two percentiles map to 0
    and 255.

    Parameters
    ----------
    source : stack
        Anything with ``shape`` (z, y, x), ``dtype`` and ``read(z)`` returning one 2D section.
    percentiles : pair of float, optional
        Percentiles (in percent) mapped to 0 and 255 by a stretch.

    Returns
    -------
    dict or None
        ``source_dtype``, ``percentiles``, ``method`` (``"exact"`` or ``"percentile stretch"``)
        and the grey values ``low`` and ``high`` that map to 0 and 255 (see :func:`to_uint8`).

    Examples
    --------
    >>> class Stack:  # 8-bit values kept in a 16-bit type
    ...     shape = (1, 2, 2)
    ...     dtype = np.dtype(np.uint16)
    ...     def read(self, z):
    ...         return np.array([[0, 10], [200, 255]], dtype=np.uint16)
    >>> choose_mapping(Stack())["method"]
    'exact'
    """
    if source.dtype == np.uint8:
        return None
    stats = estimate_intensity_range(source, percentiles=percentiles)
    mapping = {"source_dtype": str(source.dtype), "percentiles": [float(p) for p in percentiles]}
    if np.issubdtype(source.dtype, np.integer) and stats["min"] >= 0 and stats["max"] <= 255:
        return mapping | {"method": "exact", "low": 0.0, "high": 255.0}
    return mapping | {"method": "percentile stretch", "low": stats["low"], "high": stats["high"]}


def to_uint8(section, low, high):
    """Map grey values linearly so `low` → 0 and `high` → 255, clipping outside; uint8 out.

    Parameters
    ----------
    section : array_like of int or float
        Grey values; NaN maps to 0.
    low, high : float
        The grey values that map to 0 and 255.

    Returns
    -------
    ndarray of uint8
        Same shape as `section`.

    Examples
    --------
    >>> to_uint8(np.array([[0, 1000, 2000, 4000]], dtype=np.uint16), 1000, 3000)
    array([[  0,   0, 128, 255]], dtype=uint8)
    >>> to_uint8(np.array([[-1e306, 0.0, 1e306]]), -1e306, 1e306)
    array([[  0, 128, 255]], dtype=uint8)
    """
    section = np.asarray(section)
    # float32 is exact enough for 256 grey levels, but float64 data may hold values beyond its
    # range (about 3.4e38), which would overflow to infinity: those are mapped in float64
    work = np.float64 if section.dtype.kind == "f" and section.dtype.itemsize > 4 else np.float32
    section = section.astype(work, copy=False)
    scale = 255.0 / max(high - low, np.finfo(work).eps)
    mapped = (section - work(low)) * work(scale)
    return np.rint(np.clip(np.nan_to_num(mapped, nan=0.0), 0, 255)).astype(np.uint8)
