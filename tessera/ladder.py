"""The ladder of cascade sizes: from a configured S stages × L levels, also one more stage and
one more level (or more, up to a budget), each rung scored on the validation tiles, the best
kept.

Which nodes two rungs share follows from :func:`tessera.cascade.spec.node_inputs` and from what
a node's model depends on (:func:`tessera.cascade.spec.node_settings`: every setting but the
number of stages):

* **one more stage** (S+1 × L): the first S stages are the S × L cascade's nodes, file for file;
  only the L + 1 nodes of the new stage are trained.
* **one more level** (S × L+1): the top-down node (1, 0) reads every level of its stage, and every
  node of stage 2 on reads (1, 0), so those differ. Only the bottom-up nodes (1, 1..L) read the
  same maps, all the way up, as before; but the number of levels is one of their settings too:
  it sets the alignment of the training frames (cores padded to multiples of 2^L, margins
  rounded to them), so the pixels sampled (tiles whose sides are not multiples of 2^(L+1)) and
  the margins over which (1, l-1)'s map is computed for (1, l) can change with it, and the model
  records it (a model is refused under other settings). They are trained again: an S × L+1 rung
  shares no node file with S × L.

A node is therefore known by ``(levels, stage, level)`` (:func:`rung_nodes`); the ladder trains
each distinct one once (:func:`ladder_nodes`).

The pick (:func:`choose_rung`) is this module's rule, the one place it is made: the highest
validation F1 (at each rung's own validation threshold, :func:`tessera.threshold.choose_threshold`);
rungs within ``TIE_TOLERANCE`` of the best are ties and go to the smaller model: fewer nodes,
then fewer stages. Test tiles choose nothing.

Examples
--------
>>> ladder_rungs(2, 2, extra_stages=1, extra_levels=1)
[(2, 2), (3, 2), (2, 3)]
>>> len(ladder_nodes(ladder_rungs(2, 2, extra_stages=1, extra_levels=1)))  # 6 + 3 + 8
17
"""

import numpy as np

from tessera.cascade.spec import LIMITS, CascadeSpec, nodes
from tessera.errors import TesseraInputError
from tessera.plotting import pyplot

#: Modes of ``targets.<t>.cascade.mode``: ``fixed`` trains the configured S × L only.
MODES = ("fixed", "ladder")
#: The ladder's settings in a target's ``cascade`` section, with their defaults and limits
#: (inclusive); the config schema states the same (a test keeps them equal). They are not
#: settings of any node: :func:`split_cascade_settings` takes them out before a spec is made.
LADDER_DEFAULTS = {"mode": "fixed", "ladder_extra_stages": 1, "ladder_extra_levels": 1}
EXTRA_LIMITS = {"ladder_extra_stages": (0, 3), "ladder_extra_levels": (0, 3)}
#: Validation F1 differences up to this are ties (a few pixels of a typical validation set;
#: too small to prefer the larger model for).
TIE_TOLERANCE = 1e-4


def split_cascade_settings(settings):
    """(node settings, ladder settings) of a target's ``cascade`` section.

    The first is what :class:`tessera.cascade.spec.CascadeSpec` takes; the second holds the
    keys of ``LADDER_DEFAULTS``, defaults filled in.

    Examples
    --------
    >>> split_cascade_settings({"stages": 2, "levels": 1, "mode": "ladder"})
    ({'stages': 2, 'levels': 1}, {'mode': 'ladder', 'ladder_extra_stages': 1, 'ladder_extra_levels': 1})
    """
    cascade = {k: v for k, v in settings.items() if k not in LADDER_DEFAULTS}
    ladder = {k: settings.get(k, v) for k, v in LADDER_DEFAULTS.items()}
    return cascade, ladder


def ladder_rungs(stages, levels, *, extra_stages=1, extra_levels=1):
    """The rungs (stages, levels): the configured one, then each extra stage, then each extra level.

    Raises
    ------
    TesseraInputError
        A budget outside its limits, or a rung beyond the cascade's own limits (naming the key).

    Examples
    --------
    >>> ladder_rungs(2, 1, extra_stages=2, extra_levels=0)
    [(2, 1), (3, 1), (4, 1)]
    """
    for key, value in (
        ("ladder_extra_stages", extra_stages),
        ("ladder_extra_levels", extra_levels),
    ):
        low, high = EXTRA_LIMITS[key]
        if not isinstance(value, int) or not low <= value <= high:
            raise TesseraInputError(
                f"{key} must be an integer >= {low} and <= {high}, got {value!r}"
            )
    for key, value, extra in (("stages", stages, extra_stages), ("levels", levels, extra_levels)):
        high = LIMITS[key][1]
        if value + extra > high:
            raise TesseraInputError(
                f"ladder_extra_{key} = {extra} goes beyond {high} {key} (the cascade has {value}); "
                f"lower ladder_extra_{key} to at most {high - value}"
            )
    rungs = [(stages, levels)]
    rungs += [(stages + k, levels) for k in range(1, extra_stages + 1)]
    rungs += [(stages, levels + k) for k in range(1, extra_levels + 1)]
    return rungs


def rung_name(stages, levels):
    """A rung's name, ``<stages>x<levels>``.

    Examples
    --------
    >>> rung_name(3, 2)
    '3x2'
    """
    return f"{stages}x{levels}"


def rung_nodes(stages, levels):
    """The nodes of a rung, each as ``(levels, stage, level)``: the key that names its model.

    Examples
    --------
    >>> rung_nodes(2, 1)
    [(1, 1, 1), (1, 1, 0), (1, 2, 1), (1, 2, 0)]
    """
    return [(levels, s, lv) for s, lv in nodes(CascadeSpec(stages=stages, levels=levels))]


def ladder_nodes(rungs):
    """Every distinct node of the rungs, in training order of first use: each is trained once.

    Examples
    --------
    >>> ladder_nodes([(1, 0), (2, 0)])
    [(0, 1, 0), (0, 2, 0)]
    """
    return list(dict.fromkeys(n for rung in rungs for n in rung_nodes(*rung)))


def choose_rung(scores, *, tolerance=TIE_TOLERANCE):
    """The rung to predict with: the best validation F1; ties go to the smaller model.

    Parameters
    ----------
    scores : pandas.DataFrame
        One row per rung with ``stages``, ``levels`` and ``f1`` (validation pixel F1).
    tolerance : float
        F1 differences up to this count as ties.

    Returns
    -------
    pandas.DataFrame
        The rows ordered by node count, with ``rung``, ``nodes`` and ``chosen`` added (exactly
        one True).

    Examples
    --------
    >>> import pandas as pd
    >>> s = pd.DataFrame({"stages": [2, 3, 2], "levels": [2, 2, 3], "f1": [0.80, 0.84, 0.84]})
    >>> # 3x2 and 2x3 tie; 2x3 has fewer nodes (2 x 4 against 3 x 3)
    >>> t = choose_rung(s)
    >>> t.loc[t["chosen"], "rung"].item(), t["nodes"].tolist()
    ('2x3', [6, 8, 9])
    """
    if scores.empty:
        raise TesseraInputError("no rungs to choose from")
    f1 = np.asarray(scores["f1"], dtype=np.float64)
    if not np.all(np.isfinite(f1)):
        raise TesseraInputError(f"validation F1 must be finite, got {f1.tolist()}")
    table = scores.copy()
    table.insert(0, "rung", [rung_name(s, lv) for s, lv in zip(table["stages"], table["levels"])])
    table["nodes"] = [len(rung_nodes(s, lv)) for s, lv in zip(table["stages"], table["levels"])]
    table = table.sort_values(["nodes", "stages"], kind="stable").reset_index(drop=True)
    ties = table["f1"] >= table["f1"].max() - tolerance
    # sorted by size: the first tie is the smallest model
    table["chosen"] = False
    table.loc[int(np.flatnonzero(ties)[0]), "chosen"] = True
    return table


def plot_ladder(table, path, *, target):
    """Validation F1 of each rung (ordered by node count), the chosen one marked.

    Examples
    --------
    >>> import io
    >>> import pandas as pd
    >>> s = pd.DataFrame({"stages": [2, 3], "levels": [2, 2], "f1": [0.80, 0.84]})
    >>> png = io.BytesIO()
    >>> plot_ladder(choose_rung(s), png, target="mito")
    >>> png.getvalue()[:4]
    b'\\x89PNG'
    """
    plt = pyplot()
    fig, ax = plt.subplots(figsize=(4.5, 3.5))
    x = np.arange(len(table))
    ax.plot(x, table["f1"], marker="o", color="C0")
    chosen = np.flatnonzero(table["chosen"].to_numpy())
    ax.plot(
        x[chosen], table["f1"].to_numpy()[chosen], "o", ms=12, mfc="none", mec="C3", label="chosen"
    )
    labels = [f"{r}\n{n} nodes" for r, n in zip(table["rung"], table["nodes"])]
    ax.set_xticks(x, labels)
    ax.set(
        xlabel="stages x levels",
        ylabel="validation pixel F1",
        title=f"{target}: cascade size (validation tiles)",
    )
    ax.legend(loc="lower right")
    fig.tight_layout()
    fig.savefig(path, format="png", dpi=100)
    plt.close(fig)
