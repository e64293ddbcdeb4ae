"""Evaluation against scikit-learn and scikit-image, and a hand-worked object matching."""

import numpy as np
import pandas as pd
import pytest
from skimage.metrics import adapted_rand_error, variation_of_information
from sklearn.metrics import (
    average_precision_score,
    f1_score,
    jaccard_score,
    precision_score,
    recall_score,
)
from sklearn.metrics import (
    precision_recall_curve as sk_precision_recall_curve,
)

from tessera.errors import TesseraInputError
from tessera.evaluate import (
    average_precision,
    bootstrap_interval,
    check_no_leakage,
    confusion,
    evaluate_tiles,
    match_objects,
    partition_errors,
    precision_recall_curve,
    scores_from_counts,
)


@pytest.mark.parametrize("seed", range(5))
def test_pixel_scores_equal_scikit_learn(seed):
    # Reference: sklearn.metrics precision/recall/F1/Jaccard on the same binary decisions.
    rng = np.random.default_rng(seed)
    prob = rng.random(2000)
    truth = (rng.random(2000) < prob * 0.8).astype(np.uint8)
    truth[rng.random(2000) < 0.1] = 255  # ignored pixels
    keep = truth != 255
    s = scores_from_counts(*confusion(prob, truth, 0.4)[:3])
    pred = prob[keep] >= 0.4
    assert s["precision"] == pytest.approx(precision_score(truth[keep], pred))
    assert s["recall"] == pytest.approx(recall_score(truth[keep], pred))
    assert s["f1"] == pytest.approx(f1_score(truth[keep], pred))
    assert s["jaccard"] == pytest.approx(jaccard_score(truth[keep], pred))
    # identities: F1 = Dice, J = F1 / (2 - F1)
    tp, fp, fn, _ = confusion(prob, truth, 0.4)
    assert s["f1"] == pytest.approx(2 * tp / (2 * tp + fp + fn))
    assert s["jaccard"] == pytest.approx(s["f1"] / (2 - s["f1"]))


@pytest.mark.parametrize("seed", range(3))
def test_precision_recall_curve_and_average_precision_equal_scikit_learn(seed):
    rng = np.random.default_rng(seed)
    prob = np.round(rng.random(800), 2)  # ties, as in quantised maps
    truth = (rng.random(800) < prob).astype(np.uint8)
    ours = precision_recall_curve(prob, truth)
    ref = sk_precision_recall_curve(truth, prob)
    for a, b in zip(ours, ref):
        np.testing.assert_allclose(a, b)
    assert average_precision(ours[0], ours[1]) == pytest.approx(
        average_precision_score(truth, prob)
    )


def test_partition_errors_equal_scikit_image():
    # Reference: skimage.metrics with background kept as a region (ignore_labels=()). Note
    # skimage's adapted_rand_error returns (error, precision, recall) with the last two swapped
    # relative to its docstring; we report rand_precision = fraction of predicted same-object
    # pairs that are truly together, which is skimage's *third* value.
    rng = np.random.default_rng(3)
    truth = rng.integers(0, 4, (40, 40))
    pred = rng.integers(0, 5, (40, 40))
    pred[:15] = truth[:15]
    ours = partition_errors(truth, pred)
    error, second, third = adapted_rand_error(truth, pred, ignore_labels=())
    assert ours["adapted_rand_error"] == pytest.approx(error)
    assert ours["rand_precision"] == pytest.approx(third) and ours["rand_recall"] == pytest.approx(
        second
    )
    split, merge = variation_of_information(truth, pred, ignore_labels=())
    assert (ours["voi_split"], ours["voi_merge"]) == pytest.approx((split, merge))


def test_object_matching_hand_worked():
    # Truth: A (4x4 = 16 px) and B (2x2 = 4 px). Prediction: A' covers A's left 3 columns
    # (IoU 12/16 = 0.75, a match), B' is B shifted by one column (IoU 2/6 = 0.33, no match),
    # C' is a false object. So 2 true, 3 predicted, 1 matched: precision 1/3, recall 1/2.
    truth = np.zeros((10, 12), np.uint8)
    truth[1:5, 1:5] = 1
    truth[7:9, 8:10] = 1
    pred = np.zeros_like(truth, dtype=bool)
    pred[1:5, 1:4] = True
    pred[7:9, 9:11] = True
    pred[1:3, 9:11] = True
    assert match_objects(truth, pred) == {"true_objects": 2, "predicted_objects": 3, "matched": 1}


def test_bootstrap_interval_brackets_the_pooled_value():
    rng = np.random.default_rng(0)
    counts = np.stack(
        [rng.integers(50, 100, 20), rng.integers(0, 30, 20), rng.integers(0, 30, 20)], 1
    )
    f1 = lambda tp, fp, fn: scores_from_counts(tp, fp, fn)["f1"]  # noqa: E731
    low, high = bootstrap_interval(counts, f1, reps=500)
    assert low < f1(*counts.sum(axis=0)) < high and high - low < 0.2


def registry(roles):
    rows = [
        {
            "tile_id": f"t{i}",
            "dataset": "d1" if i % 2 else "d2",
            "z": i,
            "y0": 0,
            "x0": 0,
            "height": 8,
            "width": 8,
            "role": r,
        }
        for i, r in enumerate(roles)
    ]
    return pd.DataFrame(rows)


def test_evaluate_tiles_pools_test_tiles_only():
    rng = np.random.default_rng(1)
    reg = registry(["train", "validation", "validation", "test", "test", "test"])
    labels = {t: (rng.random((8, 8)) < 0.4).astype(np.uint8) for t in reg["tile_id"]}
    probs = {
        t: np.clip(labels[t] * 0.7 + rng.random((8, 8)) * 0.5, 0, 1).astype(np.float32)
        for t in reg["tile_id"]
    }
    probs["t0"] = np.zeros((8, 8), np.float32)  # a training tile: must not matter
    summary, per_tile, curve = evaluate_tiles(reg, labels, probs, reps=200)
    assert list(per_tile["tile_id"]) == ["t3", "t4", "t5"]
    overall = summary.iloc[0]
    pooled = np.concatenate([probs[t].ravel() for t in ("t3", "t4", "t5")])
    truth = np.concatenate([labels[t].ravel() for t in ("t3", "t4", "t5")])
    assert overall["f1"] == pytest.approx(f1_score(truth, pooled >= overall["threshold"]))
    assert overall["average_precision"] == pytest.approx(average_precision_score(truth, pooled))
    assert list(summary["dataset"]) == ["all", "d1", "d2"]


def test_rows_scored_on_few_tiles_say_so():
    # Reference: a percentile bootstrap (Efron & Tibshirani 1993) that resamples one unit draws
    # the same unit every time, so it has no interval to give; a row on so few tiles says so.
    rng = np.random.default_rng(2)
    reg = registry(["validation"] * 2 + ["test"] * 6)
    labels = {t: (rng.random((8, 8)) < 0.4).astype(np.uint8) for t in reg["tile_id"]}
    probs = {
        t: np.clip(labels[t] * 0.6 + rng.random((8, 8)) * 0.5, 0, 1).astype(np.float32)
        for t in reg["tile_id"]
    }
    reg.loc[reg["tile_id"] == "t3", "dataset"] = "d3"  # the one test tile of dataset d3
    summary, _, _ = evaluate_tiles(reg, labels, probs, reps=200)
    rows = summary.set_index("dataset")
    assert np.isnan(rows.loc["d3", "f1_ci_low"]) and np.isfinite(rows.loc["d3", "f1"])
    assert rows.loc["d3", "note"] == "only 1 test tile: no interval; annotate at least 5 for one"
    assert rows.loc["all", "tiles"] == 6 and rows.loc["all", "note"] == ""
    assert rows.loc["d2", "note"].startswith("only 3 test tiles: the interval is unreliable")


def _best_hundredth(truth, prob):
    """Lowest of the hundredths 0.01 .. 0.99 with the best F1 of ``prob >= t``, brute force from
    the definition F1 = 2 TP / (2 TP + FP + FN) (common practice), independent of tessera."""
    best, best_f1 = None, -1.0
    for k in range(1, 100):
        pred, true = prob >= k / 100, truth == 1
        tp, fp, fn = np.sum(pred & true), np.sum(pred & ~true), np.sum(~pred & true)
        f1 = 2 * tp / (2 * tp + fp + fn)
        if f1 > best_f1:  # strictly better only: ties keep the lower threshold
            best, best_f1 = k / 100, f1
    return best


def test_evaluation_uses_the_threshold_chosen_on_validation_tiles():
    # Probabilities on half-hundredths (never on a grid value). Validation pixels separate
    # perfectly for thresholds in (0.305, 0.375), hundredths 0.31 .. 0.37, the lowest 0.31; test
    # pixels separate at 0.10 instead. Tuning on the test tiles would report 0.10 and F1 = 1.
    rng = np.random.default_rng(2)
    half = (np.arange(100) + 0.5) / 100
    reg = registry(["validation", "validation", "test", "test", "test"])
    gaps = [(0.31, 0.37), (0.31, 0.37), (0.1, 0.1), (0.1, 0.1), (0.1, 0.1)]
    labels, probs = {}, {}
    for t, (low, high) in zip(reg["tile_id"], gaps, strict=True):
        truth = (rng.random((8, 8)) < 0.4).astype(np.uint8)
        prob = np.where(
            truth == 1, rng.choice(half[half > high], (8, 8)), rng.choice(half[half < low], (8, 8))
        )
        truth[0, :2] = 255  # ignored pixels, with a probability that would count as foreground
        prob[0, :2] = 0.995
        labels[t], probs[t] = truth, prob.astype(np.float32)

    def pooled(ids):
        keep = [labels[t] != 255 for t in ids]
        return (
            np.concatenate([labels[t][k] for t, k in zip(ids, keep, strict=True)]),
            np.concatenate([probs[t][k] for t, k in zip(ids, keep, strict=True)]),
        )

    val_t, val_p = pooled(["t0", "t1"])
    test_t, test_p = pooled(["t2", "t3", "t4"])
    assert _best_hundredth(val_t, val_p) == 0.31  # as worked out above
    assert _best_hundredth(test_t, test_p) == 0.10  # the two sets disagree
    summary, per_tile, _ = evaluate_tiles(reg, labels, probs, reps=50)
    overall = summary.iloc[0]
    assert list(summary["threshold"]) == pytest.approx([0.31] * len(summary))
    # Reference: sklearn.metrics on the test pixels cut at the validation choice.
    pred = test_p >= 0.31
    assert f1_score(test_t, pred) < 0.95  # the choice is visible in the test scores
    assert overall["precision"] == pytest.approx(precision_score(test_t, pred))
    assert overall["recall"] == pytest.approx(recall_score(test_t, pred))
    assert overall["f1"] == pytest.approx(f1_score(test_t, pred))
    assert overall["jaccard"] == pytest.approx(jaccard_score(test_t, pred))
    for row in per_tile.itertuples(index=False):
        keep = labels[row.tile_id] != 255
        tile_truth, tile_pred = labels[row.tile_id][keep], probs[row.tile_id][keep] >= 0.31
        assert row.f1 == pytest.approx(f1_score(tile_truth, tile_pred))


def test_test_tiles_without_any_target_are_refused_in_one_line():
    # Precision, recall and the precision-recall curve are undefined without a single positive
    # (their definitions); the study cannot state its accuracy, so it stops and says why.
    reg = registry(["validation", "test", "test"])
    labels = {"t0": np.eye(8, dtype=np.uint8), "t1": np.zeros((8, 8), np.uint8)}
    labels["t2"] = np.full((8, 8), 255, np.uint8)  # all ignored
    probs = {t: np.full((8, 8), 0.2, np.float32) for t in labels}
    with pytest.raises(
        TesseraInputError,
        match=r"^tiles/: the 2 test tile\(s\) hold no target pixel, so accuracy cannot be "
        r"measured; expected target in at least one test tile: raise tiles\.per_dataset",
    ):
        evaluate_tiles(reg, labels, probs, source="tiles/")
    labels["t1"][3, 3] = 1
    summary = evaluate_tiles(reg, labels, probs, reps=10)[0]
    # every pixel is above the threshold chosen on t0: 1 true of 64 predicted (t2 is ignored)
    assert summary.loc[0, "recall"] == 1.0 and summary.loc[0, "precision"] == 1 / 64


def test_a_dataset_without_target_or_prediction_has_undefined_pixel_scores():
    # F1 = 2TP / (2TP + FP + FN) is 0 / 0 on a tile with no target and nothing predicted: the
    # dataset's row and the tile's own row are left empty (NaN), not scored 0; and a pooled
    # row resting on one tile that holds anything has no interval (every bootstrap resample
    # sums copies of that one tile: Efron & Tibshirani 1993, the resampled unit is the tile).
    reg = registry(["validation", "test", "test"])  # t1 in d1, t2 in d2
    target = np.zeros((8, 8), np.uint8)
    target[2:6, 2:6] = 1
    labels = {"t0": target, "t1": target.copy(), "t2": np.zeros((8, 8), np.uint8)}
    probs = {t: np.where(labels[t] == 1, 0.9, 0.1).astype(np.float32) for t in labels}
    summary, per_tile, _ = evaluate_tiles(reg, labels, probs, reps=200)
    summary = summary.set_index("dataset")
    assert np.isnan(summary.loc["d2", ["precision", "recall", "f1", "jaccard"]]).all()
    objects = ["object_precision", "object_recall", "object_f1"]
    assert np.isnan(summary.loc["d2", objects].astype(float)).all()  # 0 true, 0 predicted
    assert (summary.loc["d1", objects] == 1.0).all()
    empty = per_tile.set_index("tile_id").loc["t2", ["precision", "recall", "f1", "jaccard"]]
    assert np.isnan(empty.astype(float)).all()
    assert summary.loc["d1", "f1"] == summary.loc["all", "f1"] == 1.0
    assert summary.loc["all", "tiles"] == 2 and summary.loc["all", "informative_tiles"] == 1
    assert np.isnan(summary.loc["all", ["f1_ci_low", "f1_ci_high"]].astype(float)).all()
    assert summary.loc["all", "note"].startswith(
        "only 1 of 2 test tiles holds the target or a prediction: no interval"
    )


def test_tiles_of_background_alone_do_not_count_towards_an_interval():
    # Six test tiles, two holding target: the pooled F1 is that of the two (the empty tiles add
    # nothing to TP, FP or FN; F1 = 2TP / (2TP + FP + FN), common practice), and the note says
    # the interval rests on two tiles, not six.
    reg = registry(["validation"] + ["test"] * 6)
    target = np.zeros((8, 8), np.uint8)
    target[2:6, 2:6] = 1
    labels = {t: np.zeros((8, 8), np.uint8) for t in reg["tile_id"]}
    labels["t0"], labels["t1"], labels["t2"] = target, target.copy(), target.copy()
    probs = {t: np.where(labels[t] == 1, 0.9, 0.1).astype(np.float32) for t in labels}
    probs["t2"][2, 2] = 0.0  # one true pixel missed
    reg["dataset"] = "d1"
    summary = evaluate_tiles(reg, labels, probs, reps=200)[0].set_index("dataset")
    assert summary.loc["all", "f1"] == pytest.approx(2 * 31 / (2 * 31 + 0 + 1))
    assert summary.loc["all", "informative_tiles"] == 2
    assert summary.loc["all", "note"].startswith(
        "only 2 of 6 test tiles hold the target or a prediction: the interval is unreliable"
    )


def test_missing_test_tiles_and_leakage_are_refused():
    reg = registry(["train", "validation", "train"])
    with pytest.raises(
        TesseraInputError,
        match=r"the target has no test tiles; annotate more tiles or change split\.fractions",
    ):
        evaluate_tiles(reg, {}, {})
    leaky = registry(["train", "test"])
    leaky.loc[1, ["dataset", "z"]] = ["d2", 0]  # same dataset and section as t0
    with pytest.raises(
        TesseraInputError,
        match=r"test tile t1 overlaps training tile t0: scores on it would be inflated \(leakage\); fix the split",
    ):
        check_no_leakage(leaky)
    twice = pd.concat([registry(["train"]), registry(["test"])], ignore_index=True)
    with pytest.raises(
        TesseraInputError,
        match=r"tile id\(s\) \['t0'\] appear more than once \(in several roles\?\)",
    ):
        check_no_leakage(twice)


def test_empty_predictions_score_zero_without_failing():
    reg = registry(["validation", "test"])
    labels = {"t0": np.ones((8, 8), np.uint8), "t1": np.ones((8, 8), np.uint8)}
    probs = {"t0": np.zeros((8, 8), np.float32), "t1": np.zeros((8, 8), np.float32)}
    summary, _, _ = evaluate_tiles(reg, labels, probs, reps=50)
    assert summary.iloc[0]["f1"] == 0.0 and summary.iloc[0]["object_recall"] == 0.0
