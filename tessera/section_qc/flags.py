"""Flag sections that are blank or torn, blurred, off in brightness, or shifted."""

import math

import numpy as np
import pandas as pd

from tessera.errors import TesseraInputError
from tessera.section_qc._checks import check_float, check_int

__all__ = ["flag_sections"]

# Scale factor making the median absolute deviation a consistent estimator of the standard
# deviation for normally distributed data (1 / Phi^-1(3/4)).
_MAD_TO_SD = 1.4826
# Scale factor for the mean absolute deviation, used when more than half of the values are
# identical and the MAD is zero (sqrt(pi / 2)).
_MEANAD_TO_SD = 1.2533

# The columns of the metrics table that flagging reads.
_NEEDED = ("z", "mean", "sharpness", "flat_fraction", "shift_y", "shift_x", "shift")


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


#: Flat fraction from which a section that is also far less sharp than its neighbours is
#: reported as flat (blank or torn) rather than blurred: a blank section is flat nearly
#: everywhere, a defocused one only where its content had little texture to lose.
_MOSTLY_FLAT = 0.5


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
    min_shift_agreement=1 / 3,
    neighbours=8,
    min_sharpness_drop=0.5,
    min_intensity_change=10.0,
    exclude_flagged=True,
):
    """Flag sections that are blank or torn, blurred, off in brightness, or shifted.

    Parameters
    ----------
    table : pandas.DataFrame
        Output of :func:`~tessera.section_qc.metrics.measure_sections` (columns ``z``,
        ``mean``, ``sharpness``, ``flat_fraction``, ``shift_y``, ``shift_x``, ``shift`` are
        used).
    max_flat_fraction : float, optional
        A section with a larger flat fraction is flagged ``flat`` (in [0, 1]).
    sharpness_z : float, optional
        A section whose log sharpness falls below the local trend of its neighbours by more
        than ``sharpness_z`` robust standard deviations is flagged ``blurred`` (> 0). Only the
        lower tail counts.
    intensity_z : float, optional
        A section whose mean departs from the local trend of its neighbours by more than
        ``intensity_z`` robust standard deviations (either way) is flagged ``intensity`` (> 0).
    max_shift_px : float, optional
        A section whose shift from the previous one departs by more than this many pixels
        from the local trend of its neighbours' shifts (a jump, not a steady drift) is flagged
        ``shift`` (>= 0).
    min_shift_agreement : float, optional
        The shift of a section is judged only where at least this share of the measuring
        tiles agree on it (column ``shift_agreement``, if the table has it; in [0, 1]): two
        sections that share no detail (nearly featureless, or unrelated) give each tile a
        random peak, and their median is no evidence of a jump.
    neighbours : int, optional
        Number of nearest other sections that define the local trend of each metric (>= 2).
    min_sharpness_drop : float, optional
        A blurred section must also have lost at least this fraction of the sharpness that
        the local trend of its neighbours predicts (in [0, 1)). Guards short or very uniform
        stacks, where a tiny spread makes a few per cent look like many robust standard
        deviations.
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
        ``intensity_score`` (robust z-scores of the departures from the local trends), float
        column ``shift_jump`` (pixels by which the shift departs from its local trend), text
        column ``reason`` (names of the raised flags among ``flat``, ``blurred``,
        ``intensity``, ``shift``, joined by ``;``, empty if none) and boolean column
        ``excluded``.

    Notes
    -----
    Robust z-scores use the median and the median absolute deviation times 1.4826, so that
    the scale matches the standard deviation for normal data; 3.5 is the cut-off proposed by
    Iglewicz & Hoaglin (1993) for such modified z-scores. Flat sections are left out of every
    statistic, so blank or torn sections do not distort the judgement of the others, and they
    get only the ``flat`` flag: their other metrics are dominated by the blank area.

    Every metric is judged on its residual from the local trend of the neighbouring sections
    (a running median corrected for local slope, see :func:`_trend_residuals`), so that what
    changes slowly through the stack is not flagged, only what one section does on its own.
    The content of a stack changes with depth (fewer organelles near the ends of a block, a
    region of resin, a ramp in contrast as a run starts), and with it the sharpness: judged
    against the median of the whole stack, the first and last sections of a sound stack would
    read as blurred. An edge section is judged against the neighbours it has, on one side,
    with the slope they show. Defocus, by contrast, is a drop in one section. The trend is
    robust to a few defective neighbours, not to many: a run of defocused sections nearly as
    long as `neighbours` becomes the trend itself, and only its ends are flagged; look at the
    plot of a stack whose focus failed for a while.

    Sharpness is judged on a log scale because it is a variance and scales with the square
    of the contrast; a section is blurred when it falls far below its trend in robust units
    and has also lost `min_sharpness_drop` of the sharpness the trend predicts.

    The shift is measured between consecutive sections. A steady drift of the stage moves
    every section by about the same vector from the last; alignment removes it and the
    sections are sound. A displaced section, or a jump, departs from the shifts around it:
    the shift is judged by how far its vector lies from the local trend of its neighbours'
    shift vectors (each component detrended alone). Shifts to or from a flat or blurred
    section are not judged: with little shared detail the estimate is unreliable. When a
    single section is displaced and the next one returns to the previous position (the two
    departures cancel to within `max_shift_px`), only the displaced section is flagged.

    Examples
    --------
    >>> t = pd.DataFrame({"z": range(6), "mean": [100, 101, 102, 103, 104, 105.0],
    ...                   "sharpness": [50, 52, 49, 51, 5, 50.0],
    ...                   "flat_fraction": [0, 0, 0, 1, 0, 0.0],
    ...                   "shift_y": 0.0, "shift_x": 0.0, "shift": 0.0})
    >>> flag_sections(t)["reason"].tolist()
    ['', '', '', 'flat', 'blurred', '']
    """
    _check_table(table)
    max_flat_fraction = check_float(max_flat_fraction, "max_flat_fraction", low=0.0, high=1.0)
    sharpness_z = check_float(sharpness_z, "sharpness_z", low=0.0, low_open=True)
    intensity_z = check_float(intensity_z, "intensity_z", low=0.0, low_open=True)
    max_shift_px = check_float(max_shift_px, "max_shift_px", low=0.0)
    min_shift_agreement = check_float(min_shift_agreement, "min_shift_agreement", low=0.0, high=1.0)
    neighbours = check_int(neighbours, "neighbours", minimum=2)
    min_sharpness_drop = check_float(min_sharpness_drop, "min_sharpness_drop", low=0.0, high=0.999)
    min_intensity_change = check_float(min_intensity_change, "min_intensity_change", low=0.0)
    if not isinstance(exclude_flagged, (bool, np.bool_)):
        raise TesseraInputError(f"exclude_flagged must be True or False, got {exclude_flagged!r}")
    cols = _numeric_columns(table)
    z = cols["z"]

    flat = cols["flat_fraction"] > max_flat_fraction
    use = ~flat

    log_sharp = np.log(np.maximum(cols["sharpness"], np.finfo(np.float64).tiny))
    sharp_residual = _trend_residuals(z, log_sharp, use, neighbours)
    sharp_score = _robust_z(sharp_residual, use)
    unsharp = (sharp_score < -sharpness_z) & (sharp_residual < math.log1p(-min_sharpness_drop))
    # defocus evens out the fine texture, so a blurred section can also pass the flat test; it
    # is named blurred when only part of it is flat (a blank one is flat nearly everywhere).
    # Either way it is flagged, so what is excluded does not change, only the reason given
    blurred_flat = flat & unsharp & (cols["flat_fraction"] < _MOSTLY_FLAT)
    blurred = (use & unsharp) | blurred_flat
    flat = flat & ~blurred_flat

    residual = _trend_residuals(z, cols["mean"], use, neighbours)
    intensity_score = _robust_z(residual, use)
    intensity = (
        use & (np.abs(intensity_score) > intensity_z) & (np.abs(residual) >= min_intensity_change)
    )

    # a flat or blurred image has little shared detail, so its shift estimate is unreliable;
    # so is one the measuring tiles disagree on
    measured = _agreement(table) >= min_shift_agreement
    shifted, jump = _shift_flags(cols, use & ~blurred, measured, max_shift_px, neighbours)

    out = table.copy()
    out["flag_flat"] = flat
    out["flag_blurred"] = blurred
    out["flag_intensity"] = intensity
    out["flag_shift"] = shifted
    out["sharpness_score"] = sharp_score
    out["intensity_score"] = intensity_score
    out["shift_jump"] = jump
    names = ("flat", "blurred", "intensity", "shift")
    flags = np.column_stack([flat, blurred, intensity, shifted])
    out["reason"] = [";".join(n for n, f in zip(names, row, strict=True) if f) for row in flags]
    out["excluded"] = flags.any(axis=1) & bool(exclude_flagged)
    return out


def _check_table(table):
    """Refuse anything but a non-empty table with the columns :func:`flag_sections` uses."""
    if not isinstance(table, pd.DataFrame):
        raise TesseraInputError(f"table must be a pandas DataFrame, got {type(table).__name__}")
    missing = [c for c in _NEEDED if c not in table.columns]
    if missing:
        raise TesseraInputError(
            f"table is missing column(s) {missing}; expected the output of measure_sections"
        )
    if len(table) == 0:
        raise TesseraInputError("table must have at least one row")


def _numeric_columns(table):
    """The used columns of `table` as finite float64 arrays, z strictly increasing."""
    cols = {}
    for c in _NEEDED:
        try:
            cols[c] = table[c].to_numpy(dtype=np.float64)
        except (TypeError, ValueError):
            raise TesseraInputError(f"table column {c!r} must be numeric") from None
        if not np.all(np.isfinite(cols[c])):
            raise TesseraInputError(f"table column {c!r} must be finite (no NaN or inf)")
    if np.any(np.diff(cols["z"]) <= 0):
        raise TesseraInputError("table column 'z' must be strictly increasing")
    return cols


def _agreement(table):
    """Column ``shift_agreement`` as float64 (1 where the table has none: every shift counts)."""
    if "shift_agreement" not in table.columns:
        return np.ones(len(table))
    try:
        agreement = table["shift_agreement"].to_numpy(dtype=np.float64)
    except (TypeError, ValueError):
        raise TesseraInputError("table column 'shift_agreement' must be numeric") from None
    if not np.all(np.isfinite(agreement)):
        raise TesseraInputError("table column 'shift_agreement' must be finite (no NaN or inf)")
    return agreement


def _shift_flags(cols, clear, measured, max_shift_px, neighbours):
    """Sections whose shift from a clear previous section departs from the local trend.

    Returns the flags and the length of each departure (0 where the shift is not judged).
    A displaced section whose successor moves back (the two departures cancel to within
    `max_shift_px`) flags only the displaced one. Only `measured` shifts are judged.
    """
    judged = clear & np.concatenate([[False], clear[:-1]]) & measured
    z = cols["z"]
    if np.count_nonzero(judged) >= 3:
        ry = _trend_residuals(z, cols["shift_y"], judged, neighbours)
        rx = _trend_residuals(z, cols["shift_x"], judged, neighbours)
    else:  # too few shifts to show a trend: judge each against no motion at all
        ry, rx = cols["shift_y"].copy(), cols["shift_x"].copy()
    ry, rx = np.where(judged, ry, 0.0), np.where(judged, rx, 0.0)
    jump = np.hypot(ry, rx)
    shifted = judged & (jump > max_shift_px)
    for i in np.flatnonzero(shifted):
        if (
            i > 0
            and shifted[i - 1]
            and math.hypot(ry[i] + ry[i - 1], rx[i] + rx[i - 1]) <= max_shift_px
        ):
            shifted[i] = False  # returns to where the section before the displaced one was
    return shifted, jump
