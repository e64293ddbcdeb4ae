"""Per-section metrics of a serial EM stack: brightness, contrast, sharpness, blank area, shift.

Volumes can be far larger than memory, so a volume is read one section at a time through
``volume[z]`` (a numpy array, a memory map or a zarr array all work), section statistics are
accumulated over strips of rows in float64, and the shift is measured on a centred crop of
bounded size.
"""

import math

import numpy as np
import pandas as pd
from scipy import ndimage

from tessera.errors import TesseraInputError
from tessera.section_qc._checks import (
    as_section,
    check_finite,
    check_float,
    check_int,
    check_numeric_dtype,
)
from tessera.section_qc.shift import field_shift

__all__ = ["METRIC_COLUMNS", "section_metrics", "measure_sections"]

# Number of pixels converted to float64 at a time inside one section; bounds the temporary
# memory of `section_metrics` (about 4 arrays of this size) whatever the section size.
_STRIP_PIXELS = 1 << 22

#: The columns of the table :func:`measure_sections` returns, in order.
METRIC_COLUMNS = (
    "z",
    "mean",
    "std",
    "sharpness",
    "flat_fraction",
    "shift_y",
    "shift_x",
    "shift",
    "shift_agreement",
)


class _Moments:
    """Count, mean and sum of squared deviations, merged batch by batch (Chan et al., 1979)."""

    def __init__(self):
        self.n = 0
        self.mean = 0.0
        self.m2 = 0.0

    def add(self, values):
        n_b = values.size
        if n_b == 0:
            return
        mean_b = float(values.mean(dtype=np.float64))
        m2_b = float(np.sum(np.square(values - mean_b), dtype=np.float64))
        n = self.n + n_b
        delta = mean_b - self.mean
        self.mean += delta * n_b / n
        self.m2 += m2_b + delta * delta * self.n * n_b / n
        self.n = n

    @property
    def var(self):
        return self.m2 / self.n if self.n else float("nan")


def _flat_area(strip, block, threshold):
    """Pixel area of `strip` (float64) in `block` x `block` tiles whose std is below `threshold`.

    Tiles at the right and bottom edges may be smaller than `block`; they count with their
    own area.
    """
    centred = strip - strip.mean()
    rows = np.arange(0, strip.shape[0], block)
    cols = np.arange(0, strip.shape[1], block)
    s1 = np.add.reduceat(np.add.reduceat(centred, rows, axis=0), cols, axis=1)
    s2 = np.add.reduceat(np.add.reduceat(centred * centred, rows, axis=0), cols, axis=1)
    heights = np.diff(np.append(rows, strip.shape[0]))
    widths = np.diff(np.append(cols, strip.shape[1]))
    area = np.outer(heights, widths).astype(np.float64)
    var = np.maximum(s2 / area - (s1 / area) ** 2, 0.0)
    return float(area[var < threshold * threshold].sum())


def section_metrics(section, *, flat_block=16, flat_std=2.0, sharpness_sigma=0.0):
    """Brightness, contrast, sharpness and blank area of one section.

    Parameters
    ----------
    section : (M, N) array_like of int or float
        One section of the stack, in its own grey-value range.
    flat_block : int, optional
        Side in pixels of the square tiles in which local contrast is judged (>= 2).
    flat_std : float, optional
        A tile whose grey-value standard deviation is below this (in the section's own units)
        counts as flat: blank, torn away or saturated (> 0).
    sharpness_sigma : float, optional
        Gaussian smoothing in pixels before the Laplacian (>= 0). With 0 the plain 5-point
        Laplacian is used; noisy EM sections need about 1-2 px, or detector noise dominates the
        measure and hides a defocused section.

    Returns
    -------
    dict
        ``mean`` and ``std`` (population standard deviation, the contrast) of the grey values;
        ``sharpness``, the variance of the discrete Laplacian (5-point stencil, mirrored edges)
        or, with `sharpness_sigma` > 0, of the Laplacian of Gaussian;
        ``flat_fraction``, the fraction of the section's area lying in flat tiles (0 to 1).

    Notes
    -----
    All arithmetic is done in float64 over strips of rows, so memory stays bounded for very
    large sections and the result does not depend on the strip size. The variance of the
    Laplacian is a common focus measure: blur removes fine detail and lowers it strongly.
    Tiles at the right and bottom edges may be smaller than `flat_block`.

    Examples
    --------
    >>> m = section_metrics(np.full((32, 32), 7, dtype=np.uint8))
    >>> m["mean"], m["std"], m["sharpness"], m["flat_fraction"]
    (7.0, 0.0, 0.0, 1.0)
    >>> checker = (np.indices((32, 32)).sum(axis=0) % 2) * 100
    >>> section_metrics(checker)["flat_fraction"]
    0.0
    """
    arr = as_section(section, "section")
    flat_block = check_int(flat_block, "flat_block", minimum=2)
    flat_std = check_float(flat_std, "flat_std", low=0.0, low_open=True)
    sharpness_sigma = check_float(sharpness_sigma, "sharpness_sigma", low=0.0, high=50.0)
    if sharpness_sigma > 0:
        halo = int(4.0 * sharpness_sigma + 0.5) + 1  # gaussian_laplace's radius at truncate=4

        def laplacian(strip):
            return ndimage.gaussian_laplace(strip, sharpness_sigma, mode="reflect")
    else:
        halo = 1

        def laplacian(strip):
            return ndimage.laplace(strip, mode="reflect")

    n_rows, n_cols = arr.shape
    strip_rows = max(1, _STRIP_PIXELS // n_cols // flat_block) * flat_block
    grey = _Moments()
    lap = _Moments()
    flat = 0.0
    for r0 in range(0, n_rows, strip_rows):
        r1 = min(r0 + strip_rows, n_rows)
        # rows of halo on each side so the Laplacian of the kept rows is exact
        e0, e1 = max(r0 - halo, 0), min(r1 + halo, n_rows)
        ext = np.asarray(arr[e0:e1], dtype=np.float64)
        check_finite(ext, "section")
        core = ext[r0 - e0 : r0 - e0 + (r1 - r0)]
        grey.add(core)
        lap.add(laplacian(ext)[r0 - e0 : r0 - e0 + (r1 - r0)])
        flat += _flat_area(core, flat_block, flat_std)
    return {
        "mean": grey.mean,
        "std": math.sqrt(max(grey.var, 0.0)),
        "sharpness": lap.var,
        "flat_fraction": flat / arr.size,
    }


def _check_volume(volume):
    try:
        shape = tuple(int(s) for s in volume.shape)
        dtype = volume.dtype
    except (AttributeError, TypeError):
        raise TesseraInputError(
            "volume must be an array-like with .shape, .dtype and volume[z] indexing "
            f"(numpy or zarr array), got {type(volume).__name__}"
        ) from None
    if len(shape) != 3:
        raise TesseraInputError(
            f"volume must be 3D (sections, rows, columns), got ndim={len(shape)}"
        )
    if min(shape) == 0:
        raise TesseraInputError(f"volume must not be empty, got shape {shape}")
    check_numeric_dtype(dtype, "volume")
    return shape


def _centred_window(size, crop):
    if crop is None or crop >= size:
        return 0, size
    start = (size - crop) // 2
    return start, start + crop


def measure_sections(volume, *, flat_block=16, flat_std=2.0, sharpness_sigma=0.0, shift_crop=1024):
    """Quality metrics of every section of a stack, reading one section at a time.

    Parameters
    ----------
    volume : (P, M, N) array-like of int or float
        The stack; anything with ``shape``, ``dtype`` and ``volume[z]`` returning one section
        (numpy array, memory map, zarr array). It is never read whole.
    flat_block, flat_std, sharpness_sigma :
        Passed to :func:`section_metrics`.
    shift_crop : int or None, optional
        Side of the centred square crop on which the shift from the previous section is
        measured (>= 16); smaller than a dimension of the section means that dimension is
        cropped. None uses the whole section.

    Returns
    -------
    pandas.DataFrame
        One row per section with columns ``z`` (int), ``mean``, ``std``, ``sharpness``,
        ``flat_fraction`` (see :func:`section_metrics`), ``shift_y``, ``shift_x`` (pixels, as
        returned by :func:`~tessera.section_qc.shift.field_shift` with the previous section's
        crop as reference: the displacement of the whole field, not of its strongest
        structure), ``shift`` (their Euclidean length) and ``shift_agreement`` (the share of
        the measuring tiles that agree with it; low where the two sections share no detail).
        The first section has shift 0 and agreement 1.

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> vol = rng.integers(0, 255, size=(3, 48, 48), dtype=np.uint8)
    >>> vol[2] = np.roll(vol[1], 4, axis=1)
    >>> t = measure_sections(vol, shift_crop=32)
    >>> list(t.columns)[-4:]
    ['shift_y', 'shift_x', 'shift', 'shift_agreement']
    >>> t.loc[2, ["shift_y", "shift_x", "shift"]].tolist()
    [0.0, -4.0, 4.0]
    """
    shape = _check_volume(volume)
    flat_block = check_int(flat_block, "flat_block", minimum=2)
    flat_std = check_float(flat_std, "flat_std", low=0.0, low_open=True)
    if shift_crop is not None:
        shift_crop = check_int(shift_crop, "shift_crop", minimum=16)
    y0, y1 = _centred_window(shape[1], shift_crop)
    x0, x1 = _centred_window(shape[2], shift_crop)

    rows = []
    previous = None
    for z in range(shape[0]):
        section = np.asarray(volume[z])
        if section.shape != shape[1:]:
            raise TesseraInputError(f"volume[{z}] has shape {section.shape}, expected {shape[1:]}")
        row = {"z": z}
        row.update(
            section_metrics(
                section, flat_block=flat_block, flat_std=flat_std, sharpness_sigma=sharpness_sigma
            )
        )
        crop = np.asarray(section[y0:y1, x0:x1], dtype=np.float64)
        dy, dx, agreement = (
            (0.0, 0.0, 1.0)
            if previous is None
            else field_shift(previous, crop, return_agreement=True)
        )
        row.update(shift_y=dy, shift_x=dx, shift=math.hypot(dy, dx), shift_agreement=agreement)
        rows.append(row)
        previous = crop
    table = pd.DataFrame(rows, columns=list(METRIC_COLUMNS))
    return table.astype({"z": np.int64}).astype({c: np.float64 for c in METRIC_COLUMNS[1:]})
