"""Accuracy against downsampling factor, and the cheapest factor that keeps it.

Each factor f cuts the voxels to predict by f² in plane (by f³ where the pyramid of a
near-isotropic stack is reduced in z as well). The study scores the same target
trained at every factor on tiles of the same physical size, and recommends the largest factor
(the cheapest) whose test F1 is within `tolerance` of the best factor's.
"""

import math

import pandas as pd

from tessera.errors import TesseraInputError
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


def factor_curve(factors, scores, *, target, tolerance, z_factors=None):
    """Test accuracy per downsampling factor with its relative prediction cost; the recommendation.

    Parameters
    ----------
    factors : sequence of int
        The in-plane downsampling factors studied.
    scores : sequence of mapping
        For each factor, its overall test scores: ``f1``, ``f1_ci_low``, ``f1_ci_high``,
        ``jaccard``, ``object_f1`` and ``tiles``.
    target : str
    tolerance : float
        F1 a factor may lose against the best one and still be recommended.
    z_factors : sequence of float, optional
        For each factor, how much its level is reduced in z as well (1 for anisotropic
        stacks, whose pyramid keeps every section; f for near-isotropic ones). Default: all 1.

    Returns
    -------
    curve : pandas.DataFrame
        One row per factor, sorted: ``target``, ``factor``, the scores, ``test_tiles``,
        ``z_factor``, ``relative_cost`` (voxels to predict relative to full resolution),
        ``recommended`` and ``tolerance``.
    chosen : int
        The recommended factor (:func:`recommend_factor`).

    Examples
    --------
    >>> scores = [{"f1": f1, "f1_ci_low": f1 - 0.02, "f1_ci_high": f1 + 0.01, "jaccard": 0.8,
    ...            "object_f1": 0.9, "tiles": 6} for f1 in (0.95, 0.93, 0.80)]
    >>> curve, chosen = factor_curve([1, 2, 4], scores, target="mito", tolerance=0.02)
    >>> chosen, curve["relative_cost"].tolist(), curve["recommended"].tolist()
    (2, [1.0, 0.25, 0.0625], [False, True, False])

    Reduced in z too (a near-isotropic pyramid), a factor of 2 predicts an eighth of the voxels:

    >>> curve, _ = factor_curve([1, 2, 4], scores, target="mito", tolerance=0.02,
    ...                         z_factors=[1, 2, 4])
    >>> curve["relative_cost"].tolist()
    [1.0, 0.125, 0.015625]
    """
    z_factors = [1] * len(factors) if z_factors is None else list(z_factors)
    if len(z_factors) != len(factors) or any(not z >= 1 for z in z_factors):
        raise TesseraInputError(f"z_factors must be one number >= 1 per factor, got {z_factors}")
    rows = []
    for factor, z_factor, overall in zip(factors, z_factors, scores, strict=True):
        rows.append(
            {
                "factor": int(factor),
                "f1": overall["f1"],
                "f1_ci_low": overall["f1_ci_low"],
                "f1_ci_high": overall["f1_ci_high"],
                "jaccard": overall["jaccard"],
                "object_f1": overall["object_f1"],
                "test_tiles": int(overall["tiles"]),
                "z_factor": z_factor,
                # voxels to predict relative to full resolution: f x f in plane, and z
                "relative_cost": 1.0 / (factor**2 * z_factor),
            }
        )
    curve = pd.DataFrame(rows).sort_values("factor").reset_index(drop=True)
    chosen = recommend_factor(curve, tolerance=tolerance)
    curve["recommended"] = curve["factor"] == chosen
    curve.insert(0, "target", target)
    curve["tolerance"] = tolerance
    return curve, chosen


def plot_curve(curve, path, *, target, chosen):
    """Test F1 with its interval against the factor (log 2 axis), the recommendation marked.

    Parameters
    ----------
    curve : pandas.DataFrame
        As returned by :func:`factor_curve`.
    path : path or file-like
        Where the PNG goes.
    target : str
    chosen : int
        The recommended factor.

    Examples
    --------
    >>> import io
    >>> scores = [{"f1": f1, "f1_ci_low": f1 - 0.02, "f1_ci_high": f1 + 0.01, "jaccard": 0.8,
    ...            "object_f1": 0.9, "tiles": 6} for f1 in (0.95, 0.93, 0.80)]
    >>> curve, chosen = factor_curve([1, 2, 4], scores, target="mito", tolerance=0.02)
    >>> png = io.BytesIO()
    >>> plot_curve(curve, png, target="mito", chosen=chosen)
    >>> png.getvalue()[:4]
    b'\\x89PNG'
    """
    plt = pyplot()

    fig, ax = plt.subplots(figsize=(4.5, 3.5))
    low = (curve["f1"] - curve["f1_ci_low"]).fillna(0).clip(lower=0)
    high = (curve["f1_ci_high"] - curve["f1"]).fillna(0).clip(lower=0)
    ax.errorbar(curve["factor"], curve["f1"], yerr=[low, high], marker="o", capsize=3)
    ax.axvline(chosen, color="0.6", ls="--", label=f"recommended {chosen}x")
    ax.set_xscale("log", base=2)
    ax.set_xticks(curve["factor"], [f"{f}x" for f in curve["factor"]])
    ax.set(
        xlabel=(
            "downsampling in plane, and in z for near-isotropic data (cost ~ 1/f³)"
            if (curve.get("z_factor", pd.Series([1])) > 1).any()
            else "in-plane downsampling (prediction cost 1/f²)"
        ),
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
