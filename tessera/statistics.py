"""Study statistics with the animal as the experimental unit.

Objects are nested in datasets and datasets in animals (``subject`` in the sheet). Thousands of
objects of one animal are not thousands of independent samples: treating them so makes tiny,
meaningless p-values. Here every measure is first summarised per animal (the mean over its whole
objects, on the log scale for sizes, so the summary is a geometric mean), and conditions are
compared on those per-animal values: the difference of means with a Welch confidence interval.
In a balanced design this equals the fixed effect of a linear mixed model with a random
intercept per animal (checked against statsmodels in the tests). Object-level values are kept
for plots only.
"""

import logging
import math

import numpy as np
import pandas as pd
from scipy import stats as sps

from tessera.errors import TesseraInputError

# size-like measures are compared on the log scale: the effect is a ratio (cold / reference).
# The skeleton length is not among them: a compact object's skeleton is a point, of length 0,
# which has no logarithm (leaving such objects out would average the elongated ones only).
LOG_MEASURES = (
    "volume_um3",
    "surface_um2",
    "equivalent_diameter_um",
    "complexity_index",
    "major_axis_um",
    "intermediate_axis_um",
    "minor_axis_um",
)
MIN_ANIMALS = 3
_log = logging.getLogger(__name__)


def animal_summaries(objects, *, measures, subjects=None):
    """Per-animal mean of every measure over its whole objects.

    Parameters
    ----------
    objects : pandas.DataFrame
        One row per object with ``subject``, ``condition``, the measures, and the flags
        ``touches_volume_border`` (objects cut by the volume border are left out; objects
        crossing a QC-excluded section are kept, since the objects step bridges such sections).
        With a ``region`` column (the region of a ``roi_mask`` each object lies in), objects
        outside every region (region 0) are left out too: the regions are what is measured.
    measures : sequence of str
    subjects : dict, optional
        Subject → condition of every animal of the study, so that animals without any whole
        object still get a row (0 objects, measures NaN).

    Returns
    -------
    pandas.DataFrame
        One row per animal: ``subject``, ``condition``, ``objects`` (whole objects used) and one
        column per measure (geometric mean for the measures in :data:`LOG_MEASURES`).

    Examples
    --------
    >>> t = pd.DataFrame({"subject": ["a", "a", "b"], "condition": ["x", "x", "y"],
    ...                   "volume_um3": [1.0, 4.0, 3.0], "touches_volume_border": False,
    ...                   "touches_excluded_section": False})
    >>> animal_summaries(t, measures=["volume_um3"])[["subject", "objects", "volume_um3"]].values.tolist()
    [['a', 2, 2.0], ['b', 1, 3.0]]
    """
    missing = [c for c in ("subject", "condition", *measures) if c not in objects.columns]
    if missing:
        raise TesseraInputError(f"object table lacks column(s) {missing}")
    whole = objects[~objects["touches_volume_border"].astype(bool)]
    if "region" in whole.columns:
        whole = whole[whole["region"] != 0]
    conditions = objects.groupby("subject")["condition"].nunique()
    if (conditions > 1).any():
        raise TesseraInputError(
            f"animal(s) {sorted(conditions[conditions > 1].index)} appear under several conditions"
        )
    subjects = dict(subjects or {})
    for subject, condition in objects.groupby("subject")["condition"].first().items():
        if subjects.setdefault(subject, condition) != condition:
            raise TesseraInputError(
                f"animal {subject!r} appears under conditions {subjects[subject]!r} and {condition!r}"
            )
    rows = []
    for subject in sorted(subjects):
        group = whole[whole["subject"] == subject]
        row = {"subject": subject, "condition": subjects[subject], "objects": len(group)}
        for m in measures:
            values = group[m].to_numpy(dtype=float)
            values = values[np.isfinite(values)]
            if m in LOG_MEASURES:
                values = values[values > 0]
                row[m] = float(np.exp(np.mean(np.log(values)))) if values.size else math.nan
            else:
                row[m] = float(np.mean(values)) if values.size else math.nan
        rows.append(row)
    return pd.DataFrame(rows, columns=["subject", "condition", "objects", *measures])


#: Columns of the comparison table, also when there is nothing to compare (one condition).
COMPARISON_COLUMNS = (
    "measure",
    "condition",
    "reference",
    "animals",
    "reference_animals",
    "mean",
    "reference_mean",
    "scale",
    "effect",
    "ci_low",
    "ci_high",
    "confidence",
    "p_value",
    "p_holm",
    "warning",
)


def _ordered_conditions(animals, conditions):
    """The conditions of `animals` in the order of `conditions` (default: sorted)."""
    present = set(animals["condition"])
    if conditions is None:
        return sorted(present)
    unknown = sorted(present - set(conditions))
    if unknown:
        raise TesseraInputError(
            f"condition(s) {unknown} of the animals are not in {list(conditions)}"
        )
    return [c for c in dict.fromkeys(conditions) if c in present]


def compare_conditions(animals, *, measures, reference, confidence=0.95, conditions=None):
    """Each condition against `reference`, on per-animal values.

    For measures in :data:`LOG_MEASURES` the comparison is on log values and reported as a
    ratio (condition / reference) with its interval; otherwise as a difference. The interval and
    p-value are Welch's (a two-sided Welch t-test, unequal variances), so unbalanced designs (3
    animals against 5) are handled; an effect without an interval, or no effect at all, carries a
    ``warning`` in words. ``p_holm`` is the p-value adjusted for every comparison of the table
    (each measure and condition) by Holm's method (:func:`holm_adjusted`): a table of ten
    measures tests ten hypotheses, and a p-value below 0.05 among them is likely by chance alone.

    Parameters
    ----------
    animals : pandas.DataFrame
        One row per animal: ``condition`` and one column per measure (NaN = not measured, e.g.
        an animal without whole objects).
    measures : sequence of str
    reference : str
        The condition every other one is compared with.
    confidence : float
    conditions : sequence of str, optional
        Order of the rows (e.g. the sheet's order); default sorted.

    Returns
    -------
    pandas.DataFrame
        Columns :data:`COMPARISON_COLUMNS`; one row per (measure, condition other than the
        reference), none when the study has one condition. ``animals`` and
        ``reference_animals`` count the animals with a value; ``warning`` says in words why an
        interval is missing or unreliable (fewer than 3 animals in a group, no animal measured,
        no spread between animals) and which animals had no whole object to measure, empty
        otherwise.

    Examples
    --------
    >>> animals = pd.DataFrame({"subject": list("abcdef"), "condition": ["warm"] * 3 + ["cold"] * 3,
    ...                         "N_V": [1.0, 2.0, 3.0, 3.0, 4.0, 5.0]})
    >>> row = compare_conditions(animals, measures=["N_V"], reference="warm").iloc[0]
    >>> row["scale"], float(row["effect"]), round(float(row["ci_low"]), 3), round(float(row["p_value"]), 3)
    ('difference', 2.0, -0.267, 0.07)
    >>> len(compare_conditions(animals[:3], measures=["N_V"], reference="warm"))
    0
    """
    order = _ordered_conditions(animals, conditions)
    if reference not in order:
        raise TesseraInputError(
            f"reference condition {reference!r} has no animals; conditions are {sorted(order)}"
        )
    rows = []
    for measure in measures:
        for condition in (c for c in order if c != reference):
            rows.append(_compare_one(animals, measure, condition, reference, confidence=confidence))
    table = pd.DataFrame(rows, columns=list(COMPARISON_COLUMNS))
    table["p_holm"] = holm_adjusted(table["p_value"].to_numpy(dtype=float))
    return table


def holm_adjusted(p_values):
    """Holm's step-down adjustment of p-values for multiple comparisons (Holm 1979).

    The k-th smallest of m p-values is multiplied by m - k + 1, each adjusted value is at least
    the one before it in that order, and none exceeds 1; rejecting where the adjusted value is
    below α keeps the chance of any false rejection among the m at most α. NaN p-values (no
    test) stay NaN and are not counted in m.

    Examples
    --------
    Worked by hand: sorted 0.005, 0.01, 0.03, 0.04 become 4 × 0.005, 3 × 0.01, 2 × 0.03 and
    max(1 × 0.04, 0.06).

    >>> holm_adjusted([0.01, 0.04, 0.03, 0.005, float("nan")]).round(4).tolist()
    [0.03, 0.06, 0.06, 0.02, nan]
    """
    p = np.asarray(p_values, dtype=float)
    out = np.full(p.shape, np.nan)
    tested = np.flatnonzero(np.isfinite(p))
    order = tested[np.argsort(p[tested], kind="stable")]
    m = order.size
    scaled = p[order] * (m - np.arange(m))
    out[order] = np.minimum(np.maximum.accumulate(scaled), 1.0)
    return out


def _measured(animals, measure, condition, log):
    """The animals' finite values of `measure` in `condition` (positive ones for a log measure)."""
    values = animals.loc[animals["condition"] == condition, measure].to_numpy(dtype=float)
    keep = np.isfinite(values) & (values > 0) if log else np.isfinite(values)
    return values[keep]


def _group_values(animals, measure, condition, log):
    """:func:`_measured`, on the log scale for a log measure (where the comparison is made)."""
    values = _measured(animals, measure, condition, log)
    return np.log(values) if log else values


def _compare_one(animals, measure, condition, reference, *, confidence):
    """One row of :func:`compare_conditions`."""
    log = measure in LOG_MEASURES
    a = _group_values(animals, measure, condition, log)
    b = _group_values(animals, measure, reference, log)
    est, low, high, p = _welch(a, b, confidence)
    warning = _comparison_warning({condition: len(a), reference: len(b)}, low, high)
    unmeasured = "; ".join(
        note
        for group, values in ((condition, a), (reference, b))
        if (note := _unmeasured_note(animals, group, len(values)))
    )
    if unmeasured and len(a) and len(b):
        warning = f"{warning}; {unmeasured}" if warning else unmeasured
    if warning:
        _log.warning("%s, %s vs %s: %s", measure, condition, reference, warning)
    transform = math.exp if log else float
    return {
        "measure": measure,
        "condition": condition,
        "reference": reference,
        "animals": len(a),
        "reference_animals": len(b),
        "mean": transform(float(np.mean(a))) if len(a) else math.nan,
        "reference_mean": transform(float(np.mean(b))) if len(b) else math.nan,
        "scale": "ratio" if log else "difference",
        "effect": transform(est),
        "ci_low": transform(low),
        "ci_high": transform(high),
        "confidence": confidence,
        "p_value": p,
        "warning": warning,
    }


def _unmeasured_note(animals, condition, measured):
    """Which share of a condition's animals had no value (no whole object), or "".

    Examples
    --------
    >>> animals = pd.DataFrame({"condition": ["warm"] * 4})
    >>> _unmeasured_note(animals, "warm", 3)
    "1 of 4 animals in 'warm' without a whole object to measure, left out"
    """
    total = int((animals["condition"] == condition).sum())
    if measured >= total:
        return ""
    return (
        f"{total - measured} of {total} animals in {condition!r} without a whole object to "
        "measure, left out"
    )


def _comparison_warning(counts, ci_low, ci_high):
    """Why a comparison has no interval, or an unreliable one, in words ("" if neither).

    Examples
    --------
    >>> _comparison_warning({"cold": 0, "warm": 3}, math.nan, math.nan)
    "no comparison: no animal in 'cold' has a whole object to measure"
    >>> _comparison_warning({"cold": 1, "warm": 3}, math.nan, math.nan)
    "no interval: only 1 animal measured in 'cold', and an interval needs 2 per condition; use at least 3 animals per condition"
    >>> _comparison_warning({"cold": 3, "warm": 3}, 2.0, 2.0)[:60]
    'no test: the per-animal values do not vary within either con'
    """
    empty = [c for c, n in counts.items() if n == 0]
    if empty:
        names = " or ".join(repr(c) for c in empty)
        return f"no comparison: no animal in {names} has a whole object to measure"
    fewest = min(counts.values())
    groups = " and ".join(repr(c) for c, n in counts.items() if n == fewest)
    advice = f"use at least {MIN_ANIMALS} animals per condition"
    if fewest < 2:
        return f"no interval: only 1 animal measured in {groups}, and an interval needs 2 per condition; {advice}"
    if ci_low == ci_high:
        return (
            "no test: the per-animal values do not vary within either condition, so the "
            "interval has zero width and there is no p-value"
        )
    if fewest < MIN_ANIMALS:
        return f"interval unreliable: only {fewest} animals measured in {groups}; {advice}"
    return ""


def _welch(a, b, confidence):
    """Difference of means a - b with Welch's t interval and two-sided p-value.

    NaN interval and p-value when a group has fewer than 2 values; no p-value (NaN) and an
    interval of zero width when neither group varies.
    """
    if len(a) == 0 or len(b) == 0:
        return math.nan, math.nan, math.nan, math.nan
    diff = float(np.mean(a) - np.mean(b))
    if len(a) < 2 or len(b) < 2:
        return diff, math.nan, math.nan, math.nan
    va, vb = np.var(a, ddof=1) / len(a), np.var(b, ddof=1) / len(b)
    se = math.sqrt(va + vb)
    if se == 0:
        # the t statistic is undefined (scipy reports p 0 for any difference, which would read
        # as certainty from, say, every animal having one nucleus per cell): no p-value
        return diff, diff, diff, math.nan
    df = (va + vb) ** 2 / (va**2 / (len(a) - 1) + vb**2 / (len(b) - 1))
    q = sps.t.ppf(0.5 + confidence / 2, df)
    p = 2 * sps.t.sf(abs(diff) / se, df)
    return diff, diff - q * se, diff + q * se, float(p)


REGION_DENSITIES = ("V_V", "S_V", "N_V")
REGION_MEASURES = ("objects", *REGION_DENSITIES)


def region_animal_summaries(regions):
    """Per-animal region measures: the mean count of objects per region, and the densities
    (V_V, S_V, N_V) of all its regions taken together.

    An animal's density is that of its regions pooled, the ratio of the summed contents to the
    summed region volume (the ratio estimator of stereology, common practice): each region's
    density weighs by its volume, so a sliver of a cell at the volume's side counts as little
    as it holds, where a plain mean over regions would weigh it as much as a whole cell.

    Parameters
    ----------
    regions : pandas.DataFrame
        One row per region with ``subject``, ``region_volume_um3`` and the columns of
        :data:`REGION_MEASURES`.

    Returns
    -------
    pandas.DataFrame
        One row per animal, sorted: ``subject``, ``regions`` and ``region_<measure>``.

    Examples
    --------
    >>> r = pd.DataFrame({"subject": ["b", "a", "a"], "region_volume_um3": [2.0, 3.0, 1.0],
    ...                   "objects": [4, 2, 6], "V_V": [0.1, 0.2, 0.4],
    ...                   "S_V": [1.0, 2.0, 3.0], "N_V": [5.0, 1.0, 3.0]})
    >>> a, b = region_animal_summaries(r).round(4).values.tolist()
    >>> a  # V_V (0.2 * 3 + 0.4 * 1) / 4, N_V (1 * 3 + 3 * 1) / 4
    ['a', 2, 4.0, 0.25, 2.25, 1.5]
    """
    rows = []
    for subject, group in regions.groupby("subject", sort=True):
        row = {"subject": subject, "regions": len(group), "region_objects": group["objects"].mean()}
        volume = group["region_volume_um3"].to_numpy(dtype=float)
        for m in REGION_DENSITIES:
            row[f"region_{m}"] = (
                float(np.sum(group[m].to_numpy(dtype=float) * volume) / volume.sum())
                if volume.sum() > 0
                else math.nan
            )
        rows.append(row)
    return pd.DataFrame(
        rows, columns=["subject", "regions", *[f"region_{m}" for m in REGION_MEASURES]]
    )


def sheet_conditions(datasets):
    """The conditions of the sheet, each once, in the order they first appear.

    The first is the default reference condition of :func:`summarise_study`.

    Examples
    --------
    >>> sheet_conditions({"d1": {"condition": "warm"}, "d2": {"condition": "cold"},
    ...                   "d3": {"condition": "warm"}})
    ['warm', 'cold']
    """
    return list(dict.fromkeys(row["condition"] for row in datasets.values()))


def describe_conditions(animals, *, measures, conditions=None):
    """Each measure per condition, over the per-animal values: the description a study with one
    condition gets instead of a comparison, and the group summaries beside any comparison.

    Parameters
    ----------
    animals : pandas.DataFrame
        As from :func:`animal_summaries`: ``condition``, ``objects`` and the measures.
    measures : sequence of str
    conditions : sequence of str, optional
        Order of the rows (e.g. the sheet's order); default sorted.

    Returns
    -------
    pandas.DataFrame
        One row per (measure, condition): ``animals`` (animals of the condition),
        ``measured_animals`` (those with a value), ``mean`` over the measured animals (geometric
        for :data:`LOG_MEASURES`, as in the comparison), ``lowest`` and ``highest`` animal value,
        and ``note`` saying in words why a value is missing or has no spread.

    Examples
    --------
    >>> animals = pd.DataFrame({"subject": list("abc"), "condition": ["warm", "warm", "cold"],
    ...                         "objects": [4, 2, 0], "volume_um3": [1.0, 4.0, float("nan")]})
    >>> table = describe_conditions(animals, measures=["volume_um3"], conditions=["warm", "cold"])
    >>> table[["condition", "measured_animals", "mean", "lowest", "highest"]].values.tolist()
    [['warm', 2, 2.0, 1.0, 4.0], ['cold', 0, nan, nan, nan]]
    >>> table["note"].tolist()
    ['', 'no animal in this condition has a whole object to measure']
    """
    rows = []
    for measure in measures:
        log = measure in LOG_MEASURES
        for condition in _ordered_conditions(animals, conditions):
            values = _measured(animals, measure, condition, log)
            total = int((animals["condition"] == condition).sum())
            notes = []
            if values.size == 0:
                notes.append("no animal in this condition has a whole object to measure")
            elif values.size < total:
                notes.append(
                    f"{total - values.size} of {total} animals without a whole object to "
                    "measure, left out of the mean"
                )
            if values.size == 1:
                notes.append("one animal: no spread between animals")
            note = "; ".join(notes)
            mean = math.nan
            if values.size:
                mean = math.exp(np.log(values).mean()) if log else float(values.mean())
            rows.append(
                {
                    "measure": measure,
                    "condition": condition,
                    "animals": total,
                    "measured_animals": int(values.size),
                    "scale": "geometric mean" if log else "mean",
                    "mean": mean,
                    "lowest": float(values.min()) if values.size else math.nan,
                    "highest": float(values.max()) if values.size else math.nan,
                    "note": note,
                }
            )
    columns = ["measure", "condition", "animals", "measured_animals", "scale", "mean", "lowest"]
    return pd.DataFrame(rows, columns=[*columns, "highest", "note"])


def _pooled(tables, datasets, columns):
    """The datasets' tables stacked, each led by ``dataset`` and the sheet's `columns`."""
    frames = []
    for dataset, table in tables.items():
        table = table.copy()
        table.insert(0, "dataset", dataset)
        for k, column in enumerate(columns, start=1):
            table.insert(k, column, datasets[dataset][column])
        frames.append(table)
    return pd.concat(frames, ignore_index=True)


def summarise_study(
    object_tables,
    region_tables,
    datasets,
    *,
    target,
    measures,
    accuracy,
    reference=None,
    confidence=0.95,
):
    """Per-animal summaries and condition comparisons of one target across the study.

    Parameters
    ----------
    object_tables, region_tables : dict
        Dataset id → measured object table / region table (from the morphometry step).
    datasets : dict
        Dataset id → ``{"condition": ..., "subject": ...}`` (from the sheet).
    target : str
        Named in the first column of the comparison.
    measures : sequence of str
        Object measures to summarise; the region densities of :data:`REGION_MEASURES` follow.
    accuracy : dict
        ``test_f1`` and ``test_jaccard`` of the target, added to every comparison row so no
        result is read without the segmentation accuracy beside it.
    reference : str, optional
        Condition the others are compared with (default: the first condition in the sheet).
    confidence : float

    Returns
    -------
    objects : pandas.DataFrame
        Every object, led by ``dataset``, ``subject`` and ``condition``.
    animals : pandas.DataFrame
        :func:`animal_summaries` joined with :func:`region_animal_summaries`.
    comparison : pandas.DataFrame
        :func:`compare_conditions` of the measures and ``region_<measure>``, led by ``target``,
        followed by the accuracy columns.

    Examples
    --------
    >>> sheet = {f"d{k}": {"condition": "warm" if k < 3 else "cold", "subject": f"m{k}"}
    ...          for k in range(6)}
    >>> objects = {d: pd.DataFrame({"volume_um3": [1.0 + k, 2.0 + k],
    ...                             "touches_volume_border": False})
    ...            for k, d in enumerate(sheet)}
    >>> regions = {d: pd.DataFrame({"region_volume_um3": [5.0], "objects": [2], "V_V": [0.1],
    ...                             "S_V": [1.0], "N_V": [2.0]}) for d in sheet}
    >>> _, animals, comparison = summarise_study(
    ...     objects, regions, sheet, target="mito", measures=["volume_um3"],
    ...     accuracy={"test_f1": 0.9, "test_jaccard": 0.8})
    >>> animals["volume_um3"].round(3).tolist()
    [1.414, 2.449, 3.464, 4.472, 5.477, 6.481]
    >>> comparison.loc[0, ["target", "measure", "condition", "reference", "scale"]].tolist()
    ['mito', 'volume_um3', 'cold', 'warm', 'ratio']
    >>> comparison.columns[-2:].tolist(), float(comparison.loc[0, "test_f1"])
    (['test_f1', 'test_jaccard'], 0.9)
    """
    objects = _pooled(object_tables, datasets, ("subject", "condition"))
    regions = _pooled({d: region_tables[d] for d in object_tables}, datasets, ("subject",))
    conditions = sheet_conditions(datasets)
    reference = reference or conditions[0]
    subjects = {d["subject"]: d["condition"] for d in datasets.values()}
    animals = animal_summaries(objects, measures=measures, subjects=subjects).merge(
        region_animal_summaries(regions), on="subject", how="left"
    )
    all_measures = [*measures, *[f"region_{m}" for m in REGION_MEASURES]]
    comparison = compare_conditions(
        animals,
        measures=all_measures,
        reference=reference,
        confidence=confidence,
        conditions=conditions,
    )
    comparison.insert(0, "target", target)
    for key, value in accuracy.items():
        comparison[key] = value
    return objects, animals, comparison
