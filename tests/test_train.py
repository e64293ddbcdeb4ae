"""Training-stage helpers: folds, and held-out scoring against scikit-learn's metrics."""

import logging

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import (
    f1_score,
    jaccard_score,
    precision_recall_curve,
    precision_score,
    recall_score,
)

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


def reference_threshold(truth, prob):
    """The hundredth 0.01 .. 0.99 with the best F1 of ``prob >= t`` (ties: the lowest).

    The rule as documented (a fixed grid of hundredths, best validation F1, lowest on ties),
    computed from scikit-learn's precision_recall_curve rather than from tessera's grid: the
    curve has one point per distinct probability p (decisions ``prob >= p``); a hundredth t
    makes the same decisions as the smallest distinct probability >= t, and the curve's
    appended last point (precision 1, recall 0, F1 0) stands for "nothing above t".
    """
    precision, recall, thresholds = precision_recall_curve(truth, prob)
    f1 = 2 * precision * recall / np.maximum(precision + recall, 1e-300)
    hundredths = np.arange(1, 100) / 100
    scores = f1[np.searchsorted(thresholds, hundredths)]
    return hundredths[np.flatnonzero(scores == scores.max())[0]]


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
    best = reference_threshold(val_t, val_p)
    assert table.loc["test", "threshold"] == pytest.approx(best)
    test_t = np.concatenate([labels[t][keep[t]] for t in ("t1", "t2")])
    test_pred = np.concatenate([probs[t][keep[t]] for t in ("t1", "t2")]) >= best
    # Reference: sklearn.metrics precision_score, recall_score, f1_score, jaccard_score.
    assert table.loc["test", "precision"] == pytest.approx(precision_score(test_t, test_pred))
    assert table.loc["test", "recall"] == pytest.approx(recall_score(test_t, test_pred))
    assert table.loc["test", "f1"] == pytest.approx(f1_score(test_t, test_pred))
    assert table.loc["test", "jaccard"] == pytest.approx(jaccard_score(test_t, test_pred))


def test_tiles_holding_nothing_are_not_counted_as_informative():
    # A test tile of background alone with nothing predicted adds nothing to TP, FP or FN
    # (F1 = 2TP / (2TP + FP + FN), common practice); one with a false positive does.
    registry = pd.DataFrame(
        {"tile_id": ["v1", "t1", "t2", "t3"], "role": ["validation", "test", "test", "test"]}
    )
    target = np.zeros((6, 6), np.uint8)
    target[1:4, 1:4] = 1
    labels = {"v1": target, "t1": target.copy()}
    labels.update({t: np.zeros((6, 6), np.uint8) for t in ("t2", "t3")})
    probs = {t: np.where(labels[t] == 1, 0.9, 0.1).astype(np.float32) for t in labels}
    probs["t3"][0, 0] = 0.95  # a false positive on an otherwise empty tile
    table = score_tiles(registry, labels, probs).set_index("role")
    assert table.loc["test", "tiles"] == 3 and table.loc["test", "informative_tiles"] == 2
    assert table.loc["validation", "informative_tiles"] == 1


# Probabilities on half-hundredths (0.005, 0.015, ..., 0.995): never equal to a grid value, so
# the decisions at each hundredth do not depend on how the grid's floats are rounded.
HALF_HUNDREDTHS = (np.arange(100) + 0.5) / 100


def separated_tile(rng, shape, low, high):
    """Labels 0/1/255 and probabilities: every negative below `low`, every positive above `high`."""
    truth = (rng.random(shape) < 0.4).astype(np.uint8)
    positive = rng.choice(HALF_HUNDREDTHS[HALF_HUNDREDTHS > high], shape)
    negative = rng.choice(HALF_HUNDREDTHS[HALF_HUNDREDTHS < low], shape)
    prob = np.where(truth == 1, positive, negative).astype(np.float32)
    truth[0, :3] = 255  # unsure pixels: left out of scoring
    prob[0, :3] = 0.995
    return truth, prob


def test_threshold_comes_from_validation_tiles_not_test_tiles():
    # Validation pixels separate perfectly for any threshold in (0.305, 0.375): F1 = 1 on a
    # plateau of hundredths 0.31 .. 0.37, whose lowest is 0.31 (the documented tie rule). Test
    # pixels separate at 0.10 instead, so a threshold tuned on test tiles would be 0.10.
    rng = np.random.default_rng(5)
    registry = pd.DataFrame(
        {"tile_id": ["v1", "v2", "t1", "t2"], "role": ["validation", "validation", "test", "test"]}
    )
    gaps = {"v1": (0.31, 0.37), "v2": (0.31, 0.37), "t1": (0.1, 0.1), "t2": (0.1, 0.1)}
    labels, probs = {}, {}
    for t, (low, high) in gaps.items():
        labels[t], probs[t] = separated_tile(rng, (12, 12), low, high)

    def pooled(ids):
        keep = [labels[t] != 255 for t in ids]
        return (
            np.concatenate([labels[t][k] for t, k in zip(ids, keep, strict=True)]),
            np.concatenate([probs[t][k] for t, k in zip(ids, keep, strict=True)]),
        )

    val_t, val_p = pooled(["v1", "v2"])
    test_t, test_p = pooled(["t1", "t2"])
    expected = reference_threshold(val_t, val_p)
    assert expected == 0.31  # worked out by hand above
    assert reference_threshold(test_t, test_p) == 0.10  # the two sets disagree
    table = score_tiles(registry, labels, probs).set_index("role")
    assert table.loc["validation", "threshold"] == pytest.approx(0.31)
    assert table.loc["test", "threshold"] == pytest.approx(0.31)
    # Reference: sklearn.metrics on the test pixels cut at the validation choice.
    pred = test_p >= expected
    assert f1_score(test_t, pred) < 0.95  # the validation choice costs the test tiles something
    assert table.loc["test", "precision"] == pytest.approx(precision_score(test_t, pred))
    assert table.loc["test", "recall"] == pytest.approx(recall_score(test_t, pred))
    assert table.loc["test", "f1"] == pytest.approx(f1_score(test_t, pred))
    assert table.loc["test", "jaccard"] == pytest.approx(jaccard_score(test_t, pred))
    assert table.loc["validation", "f1"] == pytest.approx(f1_score(val_t, val_p >= expected))
    # the share of pixels marked unsure (255), counted by hand from the tiles
    for role, ids in (("validation", ["v1", "v2"]), ("test", ["t1", "t2"])):
        unsure = sum(int((labels[i] == 255).sum()) for i in ids) / sum(labels[i].size for i in ids)
        assert table.loc[role, "unsure_fraction"] == pytest.approx(unsure)


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


def test_tiles_read_on_use_train_the_same_node_and_are_released():
    # A training job reads each tile's window when its rows are taken and drops it after, so it
    # holds one window at a time; the node must be the one made from tiles prepared up front.
    from tessera.cascade.api import prepare_tile, receptive_radius, train_node, z_halo
    from tessera.tile_windows import tile_room, tile_window

    spec = CascadeSpec(stages=1, levels=0, sigmas=(1.0, 2.0), folds=2, samples_per_tile=50)
    rng = np.random.default_rng(3)
    volume = rng.random((6, 40, 40)).astype(np.float32)
    rows = [
        {"tile_id": f"t{z}", "dataset": "a", "z": z, "y0": 4, "x0": 8, "height": 16,
         "width": 16, "role": "train"}
        for z in range(1, 5)
    ]  # fmt: skip
    registry = pd.DataFrame(rows)
    labels = {r["tile_id"]: (volume[r["z"], 4:20, 8:24] > 0.5).astype(np.uint8) for r in rows}
    lazy = _training_tiles(spec, registry, labels, {"a": volume}, final=None)
    folds = {t.tile_id: t.fold for t in lazy}
    halo, zh = receptive_radius(spec), z_halo(spec, None)
    eager = [
        prepare_tile(
            spec,
            r["tile_id"],
            tile_window(volume, r, halo, zh),
            labels[r["tile_id"]],
            fold=folds[r["tile_id"]],
            room=tile_room(spec, volume, r),
        )
        for r in rows
    ]
    a = train_node(spec, 1, 0, lazy, {}, target="t")
    b = train_node(spec, 1, 0, eager, {}, target="t")
    models = zip(
        [a.classifier, *a.fold_classifiers], [b.classifier, *b.fold_classifiers], strict=True
    )
    for x, y in models:
        for u, v in zip(x._arrays().values(), y._arrays().values(), strict=True):
            np.testing.assert_array_equal(u, v)
    assert all(t._frame is None for t in lazy)  # released after their rows were taken
    assert all(t._frame is not None for t in eager)  # tiles given whole are kept


def test_mixed_near_isotropic_and_thick_sections_are_named_in_the_log(caplog):
    # dims auto computes 3D only when every stack is near-isotropic (z spacing at most twice
    # the in-plane spacing, the README's rule); one stack of 20 nm sections among 5 nm
    # FIB-SEM-like ones turns the whole target to 2D, and the job's log names that stack
    from tessera.workflow.jobs.train import _warn_mixed_isotropy

    with caplog.at_level(logging.WARNING):
        _warn_mixed_isotropy({"fib1": 1.0, "fib2": 1.0, "thick": 4.0})
    assert len(caplog.records) == 1
    assert "dataset(s) thick have z spacing 4 times" in caplog.records[0].getMessage()
    caplog.clear()
    with caplog.at_level(logging.WARNING):
        _warn_mixed_isotropy({"fib1": 1.0, "fib2": 1.6})  # all near-isotropic: 3D, no warning
        _warn_mixed_isotropy({"ss1": 5.0, "ss2": 4.0})  # all thick sections: 2D, as expected
    assert caplog.records == []
