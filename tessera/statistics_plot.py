"""The study plot of one target: object distributions and per-animal values per condition.

Every panel title says in words what was compared and how (an effect with its interval, an
effect without one, or no comparison), so a reader never meets a bare NaN.
"""

import math

import numpy as np

from tessera.plotting import pyplot
from tessera.statistics import LOG_MEASURES


def plot_conditions(objects, animals, comparison, path, *, target, accuracy, measures=None):
    """Object distributions (grey) and per-animal values (dots) per condition, effect in the title.

    Parameters
    ----------
    objects, animals, comparison : pandas.DataFrame
        As returned by :func:`tessera.statistics.summarise_study`.
    path : path or file-like
        Where the PNG goes.
    target : str
    accuracy : dict
        ``test_f1`` of the target, and ``object_f1_3d`` and ``count_error_3d`` where it has
        them, printed in the title.
    measures : sequence of str, optional
        Default: the first six compared measures that objects have.

    Returns
    -------
    list of str
        The panel titles and the figure title, as drawn (what a reader of the plot sees).

    Examples
    --------
    >>> import io
    >>> import pandas as pd
    >>> from tessera.statistics import summarise_study
    >>> sheet = {f"d{k}": {"condition": "warm" if k < 3 else "cold", "subject": f"m{k}"}
    ...          for k in range(6)}
    >>> objects = {d: pd.DataFrame({"volume_um3": [1.0 + k, 2.0 + k],
    ...                             "touches_volume_border": False})
    ...            for k, d in enumerate(sheet)}
    >>> regions = {d: pd.DataFrame({"region_volume_um3": [5.0], "objects": [2], "V_V": [0.1],
    ...                             "S_V": [1.0], "N_V": [2.0]}) for d in sheet}
    >>> accuracy = {"test_f1": 0.9, "test_jaccard": 0.8}
    >>> tables = summarise_study(objects, regions, sheet, target="mito", measures=["volume_um3"],
    ...                          accuracy=accuracy)
    >>> png = io.BytesIO()
    >>> plot_conditions(*tables, png, target="mito", accuracy=accuracy)[0].splitlines()
    ['volume_um3', 'cold/warm 2.37 [0.90, 6.22]']
    >>> png.getvalue()[:4]
    b'\x89PNG'
    """
    plt = pyplot()

    if not measures:
        compared = [m for m in animals.columns if m in objects.columns and m != "condition"]
        measures = [m for m in compared if m not in ("subject", "objects")][:6] or ["objects"]
    conditions = list(dict.fromkeys([*comparison["reference"], *comparison["condition"]]))
    conditions += sorted(set(animals["condition"]) - set(conditions))
    fig, axes = plt.subplots(1, len(measures), figsize=(3.2 * len(measures), 3.6), squeeze=False)
    whole = objects[~objects["touches_volume_border"].astype(bool)]
    titles = []
    for ax, m in zip(axes[0], measures, strict=True):
        for i, c in enumerate(conditions):
            values = whole.loc[whole["condition"] == c, m].dropna().to_numpy(dtype=float)
            if values.size > 1 and np.ptp(values) > 0:
                parts = ax.violinplot(values, positions=[i], showextrema=False, widths=0.8)
                for body in parts["bodies"]:
                    body.set_facecolor("0.8")
            per_animal = animals.loc[animals["condition"] == c, m].to_numpy(dtype=float)
            ax.plot(np.full(per_animal.size, i), per_animal, "o", color="C0", ms=6)
            if not np.isfinite(per_animal).any():  # say why the column is empty
                ax.text(
                    i,
                    0.5,
                    "no whole\nobject",
                    ha="center",
                    va="center",
                    fontsize=7,
                    color="0.4",
                    transform=ax.get_xaxis_transform(),
                )
        ax.set_xticks(range(len(conditions)), conditions)
        ax.set_xlim(-0.6, len(conditions) - 0.4)
        shown = np.concatenate([whole[m].to_numpy(dtype=float), animals[m].to_numpy(dtype=float)])
        if m in LOG_MEASURES and (np.isfinite(shown) & (shown > 0)).any():
            ax.set_yscale("log")
        rows = comparison[comparison["measure"] == m]
        lines = [_title_line(r) for r in rows.to_dict("records")] or ["no comparison"]
        titles.append("\n".join([m, *lines]))
        ax.set_title(titles[-1], fontsize=8)
    titles.append(
        f"{target}: objects (grey) and animals (dots); {_accuracy_text(accuracy)}\n"
        "automatic segmentation: validate on held-out annotation"
    )
    fig.suptitle(titles[-1], fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=100, format="png")
    plt.close(fig)
    return titles


def _accuracy_text(accuracy):
    """The segmentation's held-out accuracy in a few words: test-tile F1, and the 3D object F1
    and count error where the target has them.

    Examples
    --------
    >>> _accuracy_text({"test_f1": 0.91, "object_f1_3d": 0.85, "count_error_3d": -0.06})
    'test-tile F1 0.910; 3D object F1 0.850, count -6 %'
    >>> _accuracy_text({"test_f1": float("nan")})
    'no test-tile F1 (no test tiles)'
    """
    f1 = accuracy.get("test_f1", math.nan)
    text = f"test-tile F1 {f1:.3f}" if math.isfinite(f1) else "no test-tile F1 (no test tiles)"
    objects = accuracy.get("object_f1_3d", math.nan)
    if math.isfinite(objects):
        text += f"; 3D object F1 {objects:.3f}"
        count = accuracy.get("count_error_3d", math.nan)
        text += f", count {100 * count:+.0f} %" if math.isfinite(count) else ""
    return text


def _title_line(row):
    """One comparison in a few words for a plot title; never a bare NaN.

    Examples
    --------
    >>> _title_line({"condition": "cold", "reference": "warm", "scale": "ratio", "effect": 1.5,
    ...              "ci_low": float("nan"), "ci_high": float("nan")})
    'cold/warm 1.50, no interval'
    >>> _title_line({"condition": "cold", "reference": "warm", "scale": "difference",
    ...              "effect": float("nan"), "ci_low": float("nan"), "ci_high": float("nan")})
    'cold−warm: not compared'
    """
    pair = f"{row['condition']}{'/' if row['scale'] == 'ratio' else '−'}{row['reference']}"
    if not math.isfinite(row["effect"]):
        return f"{pair}: not compared"
    if not (math.isfinite(row["ci_low"]) and math.isfinite(row["ci_high"])):
        return f"{pair} {row['effect']:.2f}, no interval"
    return f"{pair} {row['effect']:.2f} [{row['ci_low']:.2f}, {row['ci_high']:.2f}]"
