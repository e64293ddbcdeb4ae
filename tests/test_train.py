"""Training-stage helpers: folds, and held-out scoring against scikit-learn's metrics."""

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import f1_score, jaccard_score, precision_score, recall_score

from tessera.cascade.api import CascadeSpec
from tessera.errors import TesseraInputError
from tessera.train import assign_folds, score_tiles
from tessera.train import training_tiles as _training_tiles


def test_folds_are_contiguous_in_z_balanced_and_order_free():
    # Neighbouring sections are highly correlated (common practice), so folds are runs of z.
    tiles = pd.DataFrame(
        {
            "tile_id": [f"a{i}" for i in range(9)] + [f"b{i}" for i in range(6)],
            "dataset": ["a"] * 9 + ["b"] * 6,
            "z": list(range(0, 18, 2)) + list(range(6)),
        }
    )
    folds = assign_folds(tiles, 3, seed=1)
    assert folds == assign_folds(tiles.iloc[::-1], 3, seed=1)
    assert sorted(np.bincount(list(folds.values()))) == [5, 5, 5]
    for _dataset, group in tiles.groupby("dataset"):
        sequence = [folds[t] for t in group.sort_values("z")["tile_id"]]
        changes = sum(a != b for a, b in zip(sequence, sequence[1:], strict=False))
        assert changes == 2  # three contiguous runs


def test_scores_match_sklearn_with_threshold_chosen_on_validation():
    rng = np.random.default_rng(0)
    registry = pd.DataFrame(
        {"tile_id": ["v1", "v2", "t1", "t2"], "role": ["validation", "validation", "test", "test"]}
    )
    labels, probs = {}, {}
    for t in registry["tile_id"]:
        truth = (rng.random((20, 20)) < 0.3).astype(np.uint8)
        truth[0, :5] = 255  # unsure pixels: left out of scoring
        labels[t] = truth
        probs[t] = np.clip(truth * 0.6 + rng.random((20, 20)) * 0.5, 0, 1).astype(np.float32)
    table = score_tiles(registry, labels, probs).set_index("role")
    keep = {t: labels[t] != 255 for t in labels}
    val_t = np.concatenate([labels[t][keep[t]] for t in ("v1", "v2")])
    val_p = np.concatenate([probs[t][keep[t]] for t in ("v1", "v2")])
    grid = np.linspace(0.01, 0.99, 99)
    best = grid[np.argmax([f1_score(val_t, val_p >= g) for g in grid])]
    assert table.loc["test", "threshold"] == pytest.approx(best)
    test_t = np.concatenate([labels[t][keep[t]] for t in ("t1", "t2")])
    test_pred = np.concatenate([probs[t][keep[t]] for t in ("t1", "t2")]) >= best
    # Reference: sklearn.metrics precision_score, recall_score, f1_score, jaccard_score.
    assert table.loc["test", "precision"] == pytest.approx(precision_score(test_t, test_pred))
    assert table.loc["test", "recall"] == pytest.approx(recall_score(test_t, test_pred))
    assert table.loc["test", "f1"] == pytest.approx(f1_score(test_t, test_pred))
    assert table.loc["test", "jaccard"] == pytest.approx(jaccard_score(test_t, test_pred))


def test_scoring_needs_validation_tiles():
    registry = pd.DataFrame({"tile_id": ["t1"], "role": ["test"]})
    with pytest.raises(TesseraInputError, match="no validation tiles"):
        score_tiles(
            registry, {"t1": np.zeros((2, 2), np.uint8)}, {"t1": np.zeros((2, 2), np.float32)}
        )


def test_training_can_be_restricted_to_some_datasets():
    spec = CascadeSpec(stages=1, levels=0, sigmas=(1.0,), folds=2)
    rows = [
        {
            "tile_id": f"{d}{i}",
            "dataset": d,
            "z": i,
            "y0": 0,
            "x0": 0,
            "height": 8,
            "width": 8,
            "role": "train",
        }
        for d in ("a", "b")
        for i in range(2)
    ]
    registry = pd.DataFrame(rows)
    labels = {r["tile_id"]: np.tile([0, 1], (8, 4)).astype(np.uint8) for r in rows}
    arrays = {d: np.zeros((2, 8, 8), np.float32) for d in ("a", "b")}
    tiles = _training_tiles(spec, registry, labels, arrays, final=None, train_datasets=["b"])
    assert sorted(t.tile_id for t in tiles) == ["b0", "b1"]
    with pytest.raises(TesseraInputError, match=r"train_datasets names dataset\(s\) \['c'\]"):
        _training_tiles(spec, registry, labels, arrays, final=None, train_datasets=["c"])
