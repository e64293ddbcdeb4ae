"""Training tiles of a cascade node and the scores of predicted tiles.

The workflow trains each (stage, level) node of a target's cascade as its own job
(``tessera.workflow.jobs.train``), so the cascade is visible in the DAG and adding a stage trains
only the new nodes. Annotation tiles are read from the target's working pyramid level with a halo
large enough for the node's receptive field, mirrored beyond the volume
(:func:`tessera.tile_windows.tile_window`).
"""

from functools import partial

import numpy as np
import pandas as pd

from tessera.cascade.api import lazy_tile, receptive_radius, z_halo
from tessera.errors import TesseraInputError
from tessera.label_values import IGNORE
from tessera.threshold import GRID, choose_threshold, confusion, informative, scores_from_counts
from tessera.tile_windows import tile_room, tile_window


def assign_folds(tiles, folds, seed):
    """Fold per training tile: contiguous runs of sections within each dataset.

    Neighbouring sections are highly correlated, so a tile's out-of-fold context must come from
    models that saw no nearby section either: each dataset's tiles are ordered by z and cut into
    `folds` contiguous runs. The seed only decides which run gets which fold number.

    Parameters
    ----------
    tiles : pandas.DataFrame
        Registry rows (``tile_id``, ``dataset``, ``z``).

    Returns
    -------
    dict
        tile_id → fold.

    Examples
    --------
    >>> t = pd.DataFrame({"tile_id": list("abcdef"), "dataset": ["d"] * 6, "z": [5, 0, 1, 4, 2, 3]})
    >>> f = assign_folds(t, 3, 0)
    >>> sorted("".join(sorted(k for k in f if f[k] == i)) for i in range(3))
    ['ad', 'bc', 'ef']
    """
    rng = np.random.default_rng(seed)
    out = {}
    for _, group in tiles.sort_values(["dataset", "z", "tile_id"]).groupby("dataset", sort=True):
        names = rng.permutation(folds)
        n = len(group)
        for rank, tile_id in enumerate(group["tile_id"]):
            out[tile_id] = int(names[rank * folds // n])
    return out


def training_tiles(spec, registry, labels, arrays, *, final, train_datasets=None):
    """The prepared training tiles of node `final`, each with its fold.

    Parameters
    ----------
    spec : CascadeSpec
    registry : pandas.DataFrame
        Tile registry (``tile_id``, ``dataset``, ``role``, ``z``, ``y0``, ``x0``, ``height``,
        ``width``); the rows with role ``train`` are used.
    labels : dict
        Tile id → label image (0/1/255).
    arrays : dict
        Dataset id → (Z, Y, X) working-level array.
    final : (int, int) or None
        The node the tiles are prepared for (its receptive radius is the halo).
    train_datasets : list of str, optional
        Use the training tiles of these datasets only.
    """
    train = registry[registry["role"] == "train"]
    if train_datasets is not None:
        unknown = sorted(set(train_datasets) - set(registry["dataset"]))
        if unknown:
            raise TesseraInputError(
                f"train_datasets names dataset(s) {unknown} without annotated tiles"
            )
        train = train[train["dataset"].isin(list(train_datasets))]
    if train.empty:
        raise TesseraInputError(
            "the split has no training tiles; annotate more tiles or change split.fractions"
        )
    folds = assign_folds(train, spec.folds, spec.seed)
    halo = receptive_radius(spec, final)
    tiles = []
    for _, row in train.iterrows():
        array = arrays[row["dataset"]]
        tiles.append(
            lazy_tile(
                spec,
                row["tile_id"],
                partial(tile_window, array, row, halo, z_halo(spec, final)),
                labels[row["tile_id"]],
                fold=folds[row["tile_id"]],
                final=final,
                room=tile_room(spec, array, row),
            )
        )
    return tiles


def pooled_pixels(tile_ids, labels, probabilities):
    """(probabilities, labels) of every labelled pixel of the tiles, flat (255, ignore, left out).

    Examples
    --------
    >>> labels = {"a": np.array([[1, 255]], np.uint8), "b": np.array([[0]], np.uint8)}
    >>> probs = {"a": np.array([[0.9, 0.5]]), "b": np.array([[0.2]])}
    >>> p, t = pooled_pixels(["a", "b"], labels, probs)
    >>> p.tolist(), t.tolist()
    ([0.9, 0.2], [1, 0])
    """
    probs, truth = [], []
    for t in tile_ids:
        keep = labels[t] != IGNORE
        probs.append(np.asarray(probabilities[t])[keep])
        truth.append(labels[t][keep])
    if not probs:
        return np.zeros(0, np.float32), np.zeros(0, np.uint8)
    return np.concatenate(probs), np.concatenate(truth)


def _unsure_fraction(registry, labels, role):
    ids = registry.loc[registry["role"] == role, "tile_id"]
    unsure = sum(int((labels[t] == IGNORE).sum()) for t in ids)
    return unsure / sum(labels[t].size for t in ids)


def score_tiles(registry, labels, probabilities, *, thresholds=GRID):
    """Pixel scores per role; the threshold is chosen by the best F1 on validation tiles.

    Pixels labelled 255 (ignore) are left out; ``unsure_fraction`` says what share of the
    role's tile pixels that was (scores leave out the unsure border pixels an annotator marks,
    so a wide unsure band raises them); ``informative_tiles`` counts the tiles holding a true
    or predicted target pixel at the threshold (:func:`tessera.threshold.informative`).
    The threshold rule is :func:`tessera.threshold.choose_threshold`.
    """

    def tile_counts(role, threshold):
        """(tiles, 3) counts tp, fp, fn of each tile: pooled scores are of their sums."""
        ids = registry.loc[registry["role"] == role, "tile_id"]
        counts = [confusion(*pooled_pixels([t], labels, probabilities), threshold)[:3] for t in ids]
        return np.asarray(counts, dtype=np.int64).reshape(-1, 3)

    val_ids = registry.loc[registry["role"] == "validation", "tile_id"]
    if not len(val_ids):
        raise TesseraInputError("no validation tiles to choose the threshold on")
    best = choose_threshold(*pooled_pixels(val_ids, labels, probabilities), grid=thresholds)
    rows = []
    for role in ("validation", "test"):
        counts = tile_counts(role, best)
        if len(counts):
            rows.append(
                {
                    "role": role,
                    "tiles": len(counts),
                    "informative_tiles": int(informative(*counts.T).sum()),
                    "threshold": float(best),
                    **scores_from_counts(*(int(c) for c in counts.sum(axis=0))),
                    "unsure_fraction": _unsure_fraction(registry, labels, role),
                }
            )
    return pd.DataFrame(rows)
