"""Per-section quality control of a serial EM stack.

Sections of a volume EM stack get lost, torn, blurred, charged, drift in intensity and shift.
This module measures every section on its own (brightness, contrast, sharpness, blank area and
the translation from the previous section), flags robust outliers, and draws a summary plot.

Volumes can be far larger than memory, so a volume is read one section at a time through
``volume[z]`` (a numpy array, a memory map or a zarr array all work), section statistics are
accumulated over strips of rows in float64, and the shift is measured on a centred crop of
bounded size.
"""

import math
import numbers

import numpy as np
import pandas as pd
from scipy import ndimage

from tessera.errors import TesseraInputError

__all__ = [
    "section_metrics",
    "phase_shift",
    "measure_sections",
    "flag_sections",
    "write_sections",
    "plot_sections",
]

# Number of pixels converted to float64 at a time inside one section; bounds the temporary
# memory of `section_metrics` (about 4 arrays of this size) whatever the section size.
_STRIP_PIXELS = 1 << 22

# Scale factor making the median absolute deviation a consistent estimator of the standard
# deviation for normally distributed data (1 / Phi^-1(3/4)).
_MAD_TO_SD = 1.4826
# Scale factor for the mean absolute deviation, used when more than half of the values are
# identical and the MAD is zero (sqrt(pi / 2)).
_MEANAD_TO_SD = 1.2533

METRIC_COLUMNS = ("z", "mean", "std", "sharpness", "flat_fraction", "shift_y", "shift_x", "shift")
FLAG_COLUMNS = ("flag_flat", "flag_blurred", "flag_intensity", "flag_shift")


# --------------------------------------------------------------------------------------------
# parameter checks


def _check_int(value, name, *, minimum):
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise TesseraInputError(f"{name} must be an integer >= {minimum}, got {value!r}")
    if value < minimum:
        raise TesseraInputError(f"{name} must be an integer >= {minimum}, got {value!r}")
    return int(value)


def _check_float(value, name, *, low, high=math.inf, low_open=False):
    """Return `value` as a finite float in [low, high] (or (low, high] if `low_open`)."""
    interval = f"{'(' if low_open else '['}{low}, {high}{']' if math.isfinite(high) else ')'}"
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise TesseraInputError(f"{name} must be a number in {interval}, got {value!r}")
    f = float(value)
    too_low = f <= low if low_open else f < low
    if not math.isfinite(f) or too_low or f > high:
        raise TesseraInputError(f"{name} must be a finite number in {interval}, got {value!r}")
    return f


def _check_numeric_dtype(dtype, name):
    dtype = np.dtype(dtype)
    if not (np.issubdtype(dtype, np.integer) or np.issubdtype(dtype, np.floating)):
        raise TesseraInputError(
            f"{name} must hold integer or floating-point grey values, got dtype {dtype}"
        )


def _as_section(section, name):
    """Check a 2D numeric non-empty image; return it as an ndarray without converting dtype."""
    arr = np.asarray(section)
    _check_numeric_dtype(arr.dtype, name)
    if arr.ndim != 2:
        raise TesseraInputError(f"{name} must be a 2D image (rows, columns), got ndim={arr.ndim}")
    if arr.size == 0:
        raise TesseraInputError(f"{name} must not be empty, got shape {arr.shape}")
    return arr


def _check_finite(arr, name):
    if np.issubdtype(arr.dtype, np.floating) and not np.all(np.isfinite(arr)):
        raise TesseraInputError(f"{name} must contain only finite values (no NaN or inf)")


# --------------------------------------------------------------------------------------------
# one section


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
    arr = _as_section(section, "section")
    flat_block = _check_int(flat_block, "flat_block", minimum=2)
    flat_std = _check_float(flat_std, "flat_std", low=0.0, low_open=True)
    sharpness_sigma = _check_float(sharpness_sigma, "sharpness_sigma", low=0.0, high=50.0)
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
        _check_finite(ext, "section")
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


# --------------------------------------------------------------------------------------------
# shift between two sections


def _signed(index, size):
    """Map a circular index in [0, size) to the signed offset in (-size/2, size/2]."""
    return index - size if index > size // 2 else index


def phase_shift(reference, moving, *, upsample=1, window=False):
    """Translation that registers `moving` onto `reference`, by phase correlation.

    Parameters
    ----------
    reference, moving : (M, N) array_like of int or float
        Two images of the same shape, e.g. the same centred crop of neighbouring sections.
    upsample : int, optional
        Sub-pixel resolution: the peak is located to within ``1 / upsample`` pixel (>= 1;
        1 gives whole pixels).
    window : bool, optional
        If True, subtract each image's mean and taper it with a separable Hann window before
        the transform, so that the jump between opposite edges of a crop (which is the same in
        both images and so pulls the peak towards zero shift) is suppressed. Use it for crops
        of a larger field; leave it off for images that really are periodic.

    Returns
    -------
    dy, dx : float
        Shift along rows and columns. Translating `moving` by ``(dy, dx)`` (for example with
        :func:`scipy.ndimage.shift`) aligns it with `reference`; so if `moving` is `reference`
        moved down by 3 rows, ``dy == -3``. Values lie in ``(-M/2, M/2]`` and ``(-N/2, N/2]``.

    Notes
    -----
    The cross-power spectrum ``F_ref * conj(F_mov)`` is divided by its magnitude, which keeps
    only the phase difference; its inverse transform is a sharp peak at the displacement
    (Kuglin & Hines, 1975). Indices past half the image size wrap around to negative shifts.
    With ``upsample > 1`` the correlation is then evaluated on a finer grid within one pixel
    of the peak by a direct (matrix) discrete Fourier transform, which needs memory of order
    ``upsample * (M + N)`` beyond the spectra instead of an upsampled image. Images are
    treated as periodic, so crops of an overlapping field work as long as the shift is a
    small part of the crop.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> ref = rng.random((64, 64))
    >>> phase_shift(ref, np.roll(ref, (3, -5), axis=(0, 1)))
    (-3.0, 5.0)
    """
    ref = _as_section(reference, "reference")
    mov = _as_section(moving, "moving")
    if ref.shape != mov.shape:
        raise TesseraInputError(
            f"reference and moving must have the same shape, got {ref.shape} and {mov.shape}"
        )
    upsample = _check_int(upsample, "upsample", minimum=1)
    ref = np.asarray(ref, dtype=np.float64)
    mov = np.asarray(mov, dtype=np.float64)
    _check_finite(ref, "reference")
    _check_finite(mov, "moving")
    if not isinstance(window, (bool, np.bool_)):
        raise TesseraInputError(f"window must be True or False, got {window!r}")
    if window:
        taper = np.outer(np.hanning(ref.shape[0]), np.hanning(ref.shape[1]))
        ref = (ref - ref.mean()) * taper
        mov = (mov - mov.mean()) * taper

    cross = np.fft.fft2(ref) * np.conj(np.fft.fft2(mov))
    magnitude = np.abs(cross)
    peak = float(magnitude.max())
    if peak == 0.0:
        return 0.0, 0.0  # an image without any signal: no evidence of a shift
    cross /= np.maximum(magnitude, np.finfo(np.float64).eps * peak)
    corr = np.fft.ifft2(cross).real
    iy, ix = np.unravel_index(int(np.argmax(corr)), corr.shape)
    dy = float(_signed(int(iy), corr.shape[0]))
    dx = float(_signed(int(ix), corr.shape[1]))
    if upsample == 1:
        return dy, dx

    # evaluate the correlation on a fine grid around the whole-pixel peak
    steps = np.arange(-upsample, upsample + 1) / upsample
    ty, tx = dy + steps, dx + steps
    fy = np.fft.fftfreq(corr.shape[0]) * corr.shape[0]
    fx = np.fft.fftfreq(corr.shape[1]) * corr.shape[1]
    ey = np.exp(2j * np.pi * np.outer(ty, fy) / corr.shape[0])
    ex = np.exp(2j * np.pi * np.outer(fx, tx) / corr.shape[1])
    fine = (ey @ cross @ ex).real
    ky, kx = np.unravel_index(int(np.argmax(fine)), fine.shape)
    return float(ty[ky]), float(tx[kx])


# --------------------------------------------------------------------------------------------
# a whole stack


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
    _check_numeric_dtype(dtype, "volume")
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
        returned by :func:`phase_shift` with the previous section's crop as reference and a
        Hann window) and ``shift``
        (their Euclidean length). The first section has shift 0.

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> vol = rng.integers(0, 255, size=(3, 48, 48), dtype=np.uint8)
    >>> vol[2] = np.roll(vol[1], 4, axis=1)
    >>> t = measure_sections(vol, shift_crop=32)
    >>> list(t.columns)
    ['z', 'mean', 'std', 'sharpness', 'flat_fraction', 'shift_y', 'shift_x', 'shift']
    >>> t.loc[2, ["shift_y", "shift_x", "shift"]].tolist()
    [0.0, -4.0, 4.0]
    """
    shape = _check_volume(volume)
    flat_block = _check_int(flat_block, "flat_block", minimum=2)
    flat_std = _check_float(flat_std, "flat_std", low=0.0, low_open=True)
    if shift_crop is not None:
        shift_crop = _check_int(shift_crop, "shift_crop", minimum=16)
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
        dy, dx = (0.0, 0.0) if previous is None else phase_shift(previous, crop, window=True)
        row.update(shift_y=dy, shift_x=dx, shift=math.hypot(dy, dx))
        rows.append(row)
        previous = crop
    table = pd.DataFrame(rows, columns=list(METRIC_COLUMNS))
    return table.astype({"z": np.int64}).astype({c: np.float64 for c in METRIC_COLUMNS[1:]})


# --------------------------------------------------------------------------------------------
# flagging


def _robust_z(values, use):
    """Robust z-scores of `values`, centre and scale taken from ``values[use]`` only.

    Median and MAD scaled to a standard deviation; if the MAD is zero the scaled mean absolute
    deviation is used instead. With fewer than 3 usable values, or no spread at all, every
    score is 0 (nothing can be judged).
    """
    sample = values[use]
    scores = np.zeros(values.shape, dtype=np.float64)
    if sample.size < 3:
        return scores
    centre = np.median(sample)
    scale = _MAD_TO_SD * np.median(np.abs(sample - centre))
    if scale == 0:
        scale = _MEANAD_TO_SD * np.mean(np.abs(sample - centre))
    if scale == 0:
        return scores
    return (values - centre) / scale


def _trend_residuals(z, values, use, neighbours):
    """Each value minus the local trend of its nearest usable neighbours (itself excluded).

    The trend is a straight line through the neighbours: slope by the median of pairwise
    slopes (Theil, 1950; Sen, 1968), level by the median of the detrended neighbours. For a
    symmetric window and no slope this is the running median of the neighbours; the slope
    term keeps a steady drift from showing up at the ends of the stack.
    """
    usable = np.flatnonzero(use)
    residuals = np.zeros(values.shape, dtype=np.float64)
    if usable.size < 3:
        return residuals
    for i in range(values.size):
        at = np.searchsorted(z[usable], z[i])
        cand = usable[max(0, at - neighbours - 1) : at + neighbours + 1]
        cand = cand[cand != i]
        order = np.argsort(np.abs(z[cand] - z[i]), kind="stable")
        cand = cand[order[:neighbours]]
        if cand.size < 2:
            continue
        zc, vc = z[cand].astype(np.float64), values[cand]
        a, b = np.triu_indices(cand.size, k=1)
        slope = float(np.median((vc[b] - vc[a]) / (zc[b] - zc[a])))
        level = float(np.median(vc - slope * (zc - z[i])))
        residuals[i] = values[i] - level
    return residuals


def flag_sections(
    table,
    *,
    max_flat_fraction=0.1,
    sharpness_z=3.5,
    intensity_z=3.5,
    max_shift_px=20.0,
    intensity_neighbours=8,
    min_sharpness_drop=0.5,
    min_intensity_change=10.0,
    exclude_flagged=True,
):
    """Flag sections that are blank or torn, blurred, off in brightness, or shifted.

    Parameters
    ----------
    table : pandas.DataFrame
        Output of :func:`measure_sections` (columns ``z``, ``mean``, ``sharpness``,
        ``flat_fraction``, ``shift_y``, ``shift_x``, ``shift`` are used).
    max_flat_fraction : float, optional
        A section with a larger flat fraction is flagged ``flat`` (in [0, 1]).
    sharpness_z : float, optional
        A section whose robust z-score of log sharpness is below ``-sharpness_z`` is flagged
        ``blurred`` (> 0). Only the lower tail counts.
    intensity_z : float, optional
        A section whose mean departs from the local trend of its neighbours by more than
        ``intensity_z`` robust standard deviations (either way) is flagged ``intensity`` (> 0).
    max_shift_px : float, optional
        A section displaced from the previous one by more than this many pixels is flagged
        ``shift`` (>= 0).
    intensity_neighbours : int, optional
        Number of nearest other sections that define the local intensity trend (>= 2).
    min_sharpness_drop : float, optional
        A blurred section must also have lost at least this fraction of the median sharpness
        (in [0, 1)). Guards short or very uniform stacks, where a tiny spread makes a few per
        cent look like many robust standard deviations.
    min_intensity_change : float, optional
        An intensity outlier must also depart from the local trend by at least this many grey
        levels (>= 0), for the same reason.
    exclude_flagged : bool, optional
        If True, ``excluded`` is True for every flagged section; if False, nothing is
        excluded and the flags are for information only.

    Returns
    -------
    pandas.DataFrame
        A copy of `table` with boolean columns ``flag_flat``, ``flag_blurred``,
        ``flag_intensity``, ``flag_shift``, float columns ``sharpness_score`` and
        ``intensity_score`` (the robust z-scores), text column ``reason`` (names of the raised
        flags among ``flat``, ``blurred``, ``intensity``, ``shift``, joined by ``;``, empty if
        none) and boolean column ``excluded``.

    Notes
    -----
    Robust z-scores use the median and the median absolute deviation times 1.4826, so that
    the scale matches the standard deviation for normal data; 3.5 is the cut-off proposed by
    Iglewicz & Hoaglin (1993) for such modified z-scores. Flat sections are left out of every
    statistic, so blank or torn sections do not distort the judgement of the others, and they
    get only the ``flat`` flag: their other metrics are dominated by the blank area.

    Sharpness is judged on a log scale because it is a variance and scales with the square
    of the contrast. Intensity is judged on the residual from the local trend of the
    neighbouring sections (a running median corrected for local slope), so a slow drift
    through the stack is not flagged, only jumps.

    The shift is measured between consecutive sections. Shifts to or from a flat or blurred
    section are not judged: with little shared detail the estimate is unreliable. When a
    single section is displaced and the next one returns to the previous position (the two
    shifts cancel to within `max_shift_px`), only the displaced section is flagged.

    Examples
    --------
    >>> t = pd.DataFrame({"z": range(6), "mean": [100, 101, 102, 103, 104, 105.0],
    ...                   "sharpness": [50, 52, 49, 51, 5, 50.0],
    ...                   "flat_fraction": [0, 0, 0, 1, 0, 0.0],
    ...                   "shift_y": 0.0, "shift_x": 0.0, "shift": 0.0})
    >>> flag_sections(t)["reason"].tolist()
    ['', '', '', 'flat', 'blurred', '']
    """
    if not isinstance(table, pd.DataFrame):
        raise TesseraInputError(f"table must be a pandas DataFrame, got {type(table).__name__}")
    needed = ["z", "mean", "sharpness", "flat_fraction", "shift_y", "shift_x", "shift"]
    missing = [c for c in needed if c not in table.columns]
    if missing:
        raise TesseraInputError(
            f"table is missing column(s) {missing}; expected the output of measure_sections"
        )
    if len(table) == 0:
        raise TesseraInputError("table must have at least one row")
    max_flat_fraction = _check_float(max_flat_fraction, "max_flat_fraction", low=0.0, high=1.0)
    sharpness_z = _check_float(sharpness_z, "sharpness_z", low=0.0, low_open=True)
    intensity_z = _check_float(intensity_z, "intensity_z", low=0.0, low_open=True)
    max_shift_px = _check_float(max_shift_px, "max_shift_px", low=0.0)
    intensity_neighbours = _check_int(intensity_neighbours, "intensity_neighbours", minimum=2)
    min_sharpness_drop = _check_float(min_sharpness_drop, "min_sharpness_drop", low=0.0, high=0.999)
    min_intensity_change = _check_float(min_intensity_change, "min_intensity_change", low=0.0)
    if not isinstance(exclude_flagged, (bool, np.bool_)):
        raise TesseraInputError(f"exclude_flagged must be True or False, got {exclude_flagged!r}")

    cols = {}
    for c in needed:
        try:
            cols[c] = table[c].to_numpy(dtype=np.float64)
        except (TypeError, ValueError):
            raise TesseraInputError(f"table column {c!r} must be numeric") from None
        if not np.all(np.isfinite(cols[c])):
            raise TesseraInputError(f"table column {c!r} must be finite (no NaN or inf)")
    z = cols["z"]
    if np.any(np.diff(z) <= 0):
        raise TesseraInputError("table column 'z' must be strictly increasing")

    flat = cols["flat_fraction"] > max_flat_fraction
    use = ~flat

    log_sharp = np.log(np.maximum(cols["sharpness"], np.finfo(np.float64).tiny))
    sharp_score = _robust_z(log_sharp, use)
    blurred = use & (sharp_score < -sharpness_z)
    if use.any():
        typical = np.median(log_sharp[use])
        blurred &= log_sharp < typical + math.log1p(-min_sharpness_drop)

    residual = _trend_residuals(z, cols["mean"], use, intensity_neighbours)
    intensity_score = _robust_z(residual, use)
    intensity = (
        use & (np.abs(intensity_score) > intensity_z) & (np.abs(residual) >= min_intensity_change)
    )

    # a flat or blurred image has little shared detail, so its shift estimate is unreliable
    clear = use & ~blurred
    judged = clear & np.concatenate([[False], clear[:-1]])
    shifted = judged & (cols["shift"] > max_shift_px)
    sy, sx = cols["shift_y"], cols["shift_x"]
    for i in np.flatnonzero(shifted):
        if (
            i > 0
            and shifted[i - 1]
            and math.hypot(sy[i] + sy[i - 1], sx[i] + sx[i - 1]) <= max_shift_px
        ):
            shifted[i] = False  # returns to where the section before the displaced one was

    out = table.copy()
    out["flag_flat"] = flat
    out["flag_blurred"] = blurred
    out["flag_intensity"] = intensity
    out["flag_shift"] = shifted
    out["sharpness_score"] = sharp_score
    out["intensity_score"] = intensity_score
    names = ("flat", "blurred", "intensity", "shift")
    flags = np.column_stack([flat, blurred, intensity, shifted])
    out["reason"] = [";".join(n for n, f in zip(names, row) if f) for row in flags]
    out["excluded"] = flags.any(axis=1) & bool(exclude_flagged)
    return out


# --------------------------------------------------------------------------------------------
# output


def write_sections(table, path):
    """Write a section table as tab-separated text, floats with 6 significant digits.

    Parameters
    ----------
    table : pandas.DataFrame
        Output of :func:`measure_sections` or :func:`flag_sections`.
    path : str or path-like
        Output file; its directory must exist.
    """
    if not isinstance(table, pd.DataFrame):
        raise TesseraInputError(f"table must be a pandas DataFrame, got {type(table).__name__}")
    table.to_csv(path, sep="\t", index=False, float_format="%.6g", lineterminator="\n")


def plot_sections(table, path, *, title=""):
    """Plot the section metrics against z and mark flagged sections; write a PNG.

    Parameters
    ----------
    table : pandas.DataFrame
        Output of :func:`measure_sections` or :func:`flag_sections`. Flag columns are
        optional; when present, flagged sections are marked in every panel and excluded
        sections shaded.
    path : str or path-like
        Output PNG file; its directory must exist.
    title : str, optional
        Figure title.

    Notes
    -----
    Drawn with matplotlib's Agg canvas directly, without pyplot, so no global state or
    display is touched. The PNG carries no software-version metadata, so equal tables give
    equal files.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    if not isinstance(table, pd.DataFrame):
        raise TesseraInputError(f"table must be a pandas DataFrame, got {type(table).__name__}")
    missing = [c for c in METRIC_COLUMNS if c not in table.columns]
    if missing:
        raise TesseraInputError(
            f"table is missing column(s) {missing}; expected the output of measure_sections"
        )
    if len(table) == 0:
        raise TesseraInputError("table must have at least one row")

    z = table["z"].to_numpy()
    panels = [
        ("mean", "mean grey value", "flag_intensity", False),
        ("std", "contrast (std)", None, False),
        ("sharpness", "sharpness (var. of Laplacian)", "flag_blurred", True),
        ("flat_fraction", "flat fraction", "flag_flat", False),
        ("shift", "shift from previous (px)", "flag_shift", False),
    ]
    fig = Figure(figsize=(8, 10), layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(len(panels), 1, sharex=True)
    excluded = table["excluded"].to_numpy(dtype=bool) if "excluded" in table.columns else None
    for ax, (col, label, flag_col, log) in zip(axes, panels):
        values = table[col].to_numpy(dtype=np.float64)
        if log:
            values = np.where(values > 0, values, np.nan)
            ax.set_yscale("log")
        ax.plot(z, values, color="0.3", linewidth=1, marker=".", markersize=3)
        if excluded is not None:
            for zz in z[excluded]:
                ax.axvspan(zz - 0.5, zz + 0.5, color="tab:red", alpha=0.12, linewidth=0)
        if flag_col is not None and flag_col in table.columns:
            hit = table[flag_col].to_numpy(dtype=bool)
            if hit.any():
                ax.plot(
                    z[hit],
                    values[hit],
                    linestyle="none",
                    marker="o",
                    markersize=6,
                    markerfacecolor="none",
                    color="tab:red",
                    label=flag_col.removeprefix("flag_"),
                )
                ax.legend(loc="upper right", fontsize="small")
        ax.set_ylabel(label, fontsize="small")
    axes[-1].set_xlabel("section z")
    if title:
        fig.suptitle(title)
    fig.savefig(path, format="png", dpi=100, metadata={"Software": None})


# --------------------------------------------------------------------------------------------
# whole image, as the workflow runs it


def qc_image(
    image_path,
    *,
    table_path,
    plot_path,
    title="",
    flat_block=16,
    flat_std=2.0,
    sharpness_sigma=1.5,
    max_flat_fraction=0.1,
    sharpness_z=3.5,
    min_sharpness_drop=0.5,
    intensity_z=3.5,
    min_intensity_change=10.0,
    max_shift_px=20.0,
    shift_crop=1024,
    exclude_flagged=True,
):
    """Measure and flag every section of an OME-Zarr image (level 0); write the table and plot.

    Both outputs are written under temporary names and renamed, so a killed job leaves no
    half-written file behind.

    Returns
    -------
    dict
        Number of sections, and the z of flagged and of excluded sections.
    """
    from tessera.io.atomic import atomic_path
    from tessera.io.omezarr import open_image

    _, info = open_image(image_path)
    table = measure_sections(
        info["levels"][0],
        flat_block=flat_block,
        flat_std=flat_std,
        sharpness_sigma=sharpness_sigma,
        shift_crop=shift_crop,
    )
    table = flag_sections(
        table,
        max_flat_fraction=max_flat_fraction,
        sharpness_z=sharpness_z,
        min_sharpness_drop=min_sharpness_drop,
        intensity_z=intensity_z,
        min_intensity_change=min_intensity_change,
        max_shift_px=max_shift_px,
        exclude_flagged=exclude_flagged,
    )
    with atomic_path(table_path) as tmp:
        write_sections(table, tmp)
    with atomic_path(plot_path) as tmp:
        plot_sections(table, tmp, title=title)
    flagged = table["reason"] != ""
    return {
        "sections": int(len(table)),
        "flagged": {int(z): r for z, r in zip(table["z"][flagged], table["reason"][flagged])},
        "excluded": [int(z) for z in table["z"][table["excluded"]]],
    }
