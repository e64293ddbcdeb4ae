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
from tessera.plotting import pyplot

# size-like measures are compared on the log scale: the effect is a ratio (cold / reference)
LOG_MEASURES = (
    "volume_um3",
    "surface_um2",
    "equivalent_diameter_um",
    "skeleton_length_um",
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


def compare_conditions(animals, *, measures, reference, confidence=0.95):
    """Each condition against `reference`, on per-animal values.

    For measures in :data:`LOG_MEASURES` the comparison is on log values and reported as a
    ratio (condition / reference) with its interval; otherwise as a difference.

    Returns
    -------
    pandas.DataFrame
        One row per (measure, condition): animals per group, the group means, ``effect`` with
        ``ci_low`` and ``ci_high`` (Welch), ``p_value``, ``scale`` ('ratio' or 'difference') and
        ``warning`` (fewer than 3 animals in a group: the interval is wide or undefined).

    Examples
    --------
    >>> animals = pd.DataFrame({"subject": list("abcdef"), "condition": ["warm"] * 3 + ["cold"] * 3,
    ...                         "N_V": [1.0, 2.0, 3.0, 3.0, 4.0, 5.0]})
    >>> row = compare_conditions(animals, measures=["N_V"], reference="warm").iloc[0]
    >>> row["scale"], float(row["effect"]), round(float(row["ci_low"]), 3), round(float(row["p_value"]), 3)
    ('difference', 2.0, -0.267, 0.07)
    """
    if reference not in set(animals["condition"]):
        raise TesseraInputError(
            f"reference condition {reference!r} has no animals; conditions are {sorted(set(animals['condition']))}"
        )
    rows = []
    for measure in measures:
        log = measure in LOG_MEASURES
        for condition in sorted(set(animals["condition"]) - {reference}):
            a = animals.loc[animals["condition"] == condition, measure].to_numpy(dtype=float)
            b = animals.loc[animals["condition"] == reference, measure].to_numpy(dtype=float)
            if log:
                a, b = np.log(a[a > 0]), np.log(b[b > 0])
            a, b = a[np.isfinite(a)], b[np.isfinite(b)]
            est, low, high, p = _welch(a, b, confidence)
            warning = ""
            if min(len(a), len(b)) < MIN_ANIMALS:
                warning = (
                    f"only {min(len(a), len(b))} animal(s) in a group: "
                    + ("no interval" if min(len(a), len(b)) < 2 else "interval unreliable")
                    + f"; use at least {MIN_ANIMALS} animals per condition"
                )
                _log.warning("%s, %s vs %s: %s", measure, condition, reference, warning)
            transform = math.exp if log else (lambda v: v)
            rows.append(
                {
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
            )
    return pd.DataFrame(rows)


def _welch(a, b, confidence):
    """Difference of means a - b with Welch's t interval and two-sided p-value."""
    if len(a) == 0 or len(b) == 0:
        return math.nan, math.nan, math.nan, math.nan
    diff = float(np.mean(a) - np.mean(b))
    if len(a) < 2 or len(b) < 2:
        return diff, math.nan, math.nan, math.nan
    va, vb = np.var(a, ddof=1) / len(a), np.var(b, ddof=1) / len(b)
    se = math.sqrt(va + vb)
    if se == 0:
        return diff, diff, diff, (0.0 if diff else 1.0)
    df = (va + vb) ** 2 / (va**2 / (len(a) - 1) + vb**2 / (len(b) - 1))
    q = sps.t.ppf(0.5 + confidence / 2, df)
    p = 2 * sps.t.sf(abs(diff) / se, df)
    return diff, diff - q * se, diff + q * se, float(p)


REGION_MEASURES = ("objects", "V_V", "S_V", "N_V")


def region_animal_summaries(regions):
    """Per-animal mean over its regions of the region densities (objects per region, V_V, S_V, N_V).

    Parameters
    ----------
    regions : pandas.DataFrame
        One row per region with ``subject`` and the columns of :data:`REGION_MEASURES`.

    Returns
    -------
    pandas.DataFrame
        One row per animal, sorted: ``subject``, ``regions`` and ``region_<measure>``.

    Examples
    --------
    >>> r = pd.DataFrame({"subject": ["b", "a", "a"], "objects": [4, 2, 6], "V_V": [0.1, 0.2, 0.4],
    ...                   "S_V": [1.0, 2.0, 3.0], "N_V": [5.0, 1.0, 3.0]})
    >>> region_animal_summaries(r).values.tolist()
    [['a', 2, 4.0, 0.30000000000000004, 2.5, 2.0], ['b', 1, 4.0, 0.1, 1.0, 5.0]]
    """
    rows = []
    for subject, group in regions.groupby("subject", sort=True):
        row = {"subject": subject, "regions": len(group)}
        row.update({f"region_{m}": float(group[m].mean()) for m in REGION_MEASURES})
        rows.append(row)
    return pd.DataFrame(
        rows, columns=["subject", "regions", *[f"region_{m}" for m in REGION_MEASURES]]
    )


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
    >>> regions = {d: pd.DataFrame({"objects": [2], "V_V": [0.1], "S_V": [1.0], "N_V": [2.0]})
    ...            for d in sheet}
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
    reference = reference or next(iter(datasets.values()))["condition"]
    subjects = {d["subject"]: d["condition"] for d in datasets.values()}
    animals = animal_summaries(objects, measures=measures, subjects=subjects).merge(
        region_animal_summaries(regions), on="subject", how="left"
    )
    all_measures = [*measures, *[f"region_{m}" for m in REGION_MEASURES]]
    comparison = compare_conditions(
        animals, measures=all_measures, reference=reference, confidence=confidence
    )
    comparison.insert(0, "target", target)
    for key, value in accuracy.items():
        comparison[key] = value
    return objects, animals, comparison


def plot_conditions(objects, animals, comparison, path, *, target, accuracy, measures=None):
    """Object distributions (grey) and per-animal values (dots) per condition, effect in the title.

    Parameters
    ----------
    objects, animals, comparison : pandas.DataFrame
        As returned by :func:`summarise_study`.
    path : path or file-like
        Where the PNG goes.
    target : str
    accuracy : dict
        ``test_f1`` of the target, printed in the title.
    measures : sequence of str, optional
        Default: the first six compared measures that objects have.

    Examples
    --------
    >>> import io
    >>> sheet = {f"d{k}": {"condition": "warm" if k < 3 else "cold", "subject": f"m{k}"}
    ...          for k in range(6)}
    >>> objects = {d: pd.DataFrame({"volume_um3": [1.0 + k, 2.0 + k],
    ...                             "touches_volume_border": False})
    ...            for k, d in enumerate(sheet)}
    >>> regions = {d: pd.DataFrame({"objects": [2], "V_V": [0.1], "S_V": [1.0], "N_V": [2.0]})
    ...            for d in sheet}
    >>> accuracy = {"test_f1": 0.9, "test_jaccard": 0.8}
    >>> tables = summarise_study(objects, regions, sheet, target="mito", measures=["volume_um3"],
    ...                          accuracy=accuracy)
    >>> png = io.BytesIO()
    >>> plot_conditions(*tables, png, target="mito", accuracy=accuracy)
    >>> png.getvalue()[:4]
    b'\x89PNG'
    """
    plt = pyplot()

    measures = measures or [m for m in comparison["measure"].unique() if m in objects.columns][:6]
    conditions = sorted(animals["condition"].unique())
    fig, axes = plt.subplots(1, len(measures), figsize=(3.2 * len(measures), 3.6), squeeze=False)
    whole = objects[~objects["touches_volume_border"].astype(bool)]
    for ax, m in zip(axes[0], measures, strict=True):
        for i, c in enumerate(conditions):
            values = whole.loc[whole["condition"] == c, m].dropna().to_numpy(dtype=float)
            if values.size > 1 and np.ptp(values) > 0:
                parts = ax.violinplot(values, positions=[i], showextrema=False, widths=0.8)
                for body in parts["bodies"]:
                    body.set_facecolor("0.8")
            per_animal = animals.loc[animals["condition"] == c, m].to_numpy(dtype=float)
            ax.plot(np.full(per_animal.size, i), per_animal, "o", color="C0", ms=6)
        ax.set_xticks(range(len(conditions)), conditions)
        shown = np.concatenate([whole[m].to_numpy(dtype=float), animals[m].to_numpy(dtype=float)])
        if m in LOG_MEASURES and (np.isfinite(shown) & (shown > 0)).any():
            ax.set_yscale("log")
        row = comparison[comparison["measure"] == m]
        if not row.empty:
            r = row.iloc[0]
            ax.set_title(
                f"{m}\n{r['scale']} {r['effect']:.2f} [{r['ci_low']:.2f}, {r['ci_high']:.2f}]",
                fontsize=8,
            )
        else:
            ax.set_title(m, fontsize=8)
    fig.suptitle(
        f"{target}: objects (grey) and animals (dots); test-tile F1 {accuracy['test_f1']:.3f} — "
        "automatic segmentation, validate on held-out annotation",
        fontsize=8,
    )
    fig.tight_layout()
    fig.savefig(path, dpi=100, format="png")
    plt.close(fig)
