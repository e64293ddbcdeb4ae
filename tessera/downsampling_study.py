"""Accuracy against downsampling factor, and the cheapest factor that keeps it.

Each factor f of 2 cuts the voxels to predict by f² in-plane. The study scores the same target
trained at every factor on tiles of the same physical size, and recommends the largest factor
(the cheapest) whose test F1 is within `tolerance` of the best factor's.
"""

import math

import pandas as pd

from tessera.errors import TesseraInputError
from tessera.io.atomic import atomic_path, write_table
from tessera.plotting import pyplot


def recommend_factor(curve, *, tolerance):
    """The largest factor whose F1 is within `tolerance` of the best F1.

    Examples
    --------
    >>> c = pd.DataFrame({"factor": [1, 2, 4, 8], "f1": [0.95, 0.95, 0.93, 0.80]})
    >>> recommend_factor(c, tolerance=0.02)
    4
    """
    if curve.empty:
        raise TesseraInputError("no factors to compare")
    best = curve["f1"].max()
    ok = curve[curve["f1"] >= best - tolerance]
    return int(ok["factor"].max())


def downsampling_job(summaries, factors, out_curve, out_plot, *, target, tolerance):
    """Collect the test F1 of every factor, add the relative prediction cost, recommend one."""
    rows = []
    for factor, path in zip(factors, summaries):
        table = pd.read_csv(path, sep="\t")
        overall = table[table["dataset"] == "all"].iloc[0]
        rows.append(
            {
                "factor": int(factor),
                "f1": overall["f1"],
                "f1_ci_low": overall["f1_ci_low"],
                "f1_ci_high": overall["f1_ci_high"],
                "jaccard": overall["jaccard"],
                "object_f1": overall["object_f1"],
                "test_tiles": int(overall["tiles"]),
                # voxels to predict relative to full resolution (in-plane reduction f x f)
                "relative_cost": 1.0 / factor**2,
            }
        )
    curve = pd.DataFrame(rows).sort_values("factor").reset_index(drop=True)
    chosen = recommend_factor(curve, tolerance=tolerance)
    curve["recommended"] = curve["factor"] == chosen
    curve.insert(0, "target", target)
    curve["tolerance"] = tolerance
    write_table(out_curve, curve)
    with atomic_path(out_plot) as tmp:
        plot_curve(curve, tmp, target=target, chosen=chosen)
    return {
        "recommended": chosen,
        "f1": dict(zip(curve["factor"].tolist(), curve["f1"].round(4).tolist())),
    }


def plot_curve(curve, path, *, target, chosen):
    plt = pyplot()

    fig, ax = plt.subplots(figsize=(4.5, 3.5))
    low = (curve["f1"] - curve["f1_ci_low"]).fillna(0).clip(lower=0)
    high = (curve["f1_ci_high"] - curve["f1"]).fillna(0).clip(lower=0)
    ax.errorbar(curve["factor"], curve["f1"], yerr=[low, high], marker="o", capsize=3)
    ax.axvline(chosen, color="0.6", ls="--", label=f"recommended {chosen}x")
    ax.set_xscale("log", base=2)
    ax.set_xticks(curve["factor"], [f"{f}x" for f in curve["factor"]])
    ax.set(
        xlabel="in-plane downsampling (prediction cost 1/f²)",
        ylabel="test-tile pixel F1",
        ylim=(
            max(
                0,
                math.floor(curve["f1_ci_low"].min(skipna=True) * 10) / 10
                if curve["f1_ci_low"].notna().any()
                else 0,
            ),
            1.0,
        ),
        title=f"{target}: accuracy vs downsampling",
    )
    ax.legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=100, format="png")
    plt.close(fig)
