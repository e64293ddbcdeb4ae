"""Training-stage helpers: folds, and held-out scoring against scikit-learn's metrics."""

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import f1_score, jaccard_score, precision_score, recall_score

from tessera.errors import TesseraInputError
from tessera.train import assign_folds, score_tiles


def test_folds_are_deterministic_balanced_and_order_free():
    ids = [f"tile{i}" for i in range(10)]
    folds = assign_folds(ids, 3, seed=1)
    assert folds == assign_folds(list(reversed(ids)), 3, seed=1)
    assert sorted(np.bincount(list(folds.values()))) == [3, 3, 4]
    assert folds != assign_folds(ids, 3, seed=2)


def test_scores_match_sklearn_with_threshold_chosen_on_validation():
    rng = np.random.default_rng(0)
    registry = pd.DataFrame({"tile_id": ["v1", "v2", "t1", "t2"], "role": ["validation", "validation", "test", "test"]})
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
        score_tiles(registry, {"t1": np.zeros((2, 2), np.uint8)}, {"t1": np.zeros((2, 2), np.float32)})
