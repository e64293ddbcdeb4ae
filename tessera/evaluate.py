"""Accuracy of a target's cascade on held-out test tiles: pixels, curves, objects, partitions.

Conventions (stated in every output):

* The threshold is the one with the best pixel F1 on the **validation** tiles; test tiles never
  choose anything (:mod:`tessera.threshold`). Pixels labelled 255 (ignore) are left out everywhere.
* Pixel scores pool all test pixels. F1 equals the Dice coefficient, and Jaccard = F1 / (2 − F1).
* Objects are 8-connected regions of each 2D tile (truth and prediction alike); a predicted object
  matches a true one when their intersection over union exceeds 0.5, which makes matches
  one-to-one by construction.
* Partition errors compare the connected components of truth and prediction per tile over the
  labelled pixels, as in the ISBI 2012 and CREMI challenges (Arganda-Carreras et al., Front.
  Neuroanat. 2015): adapted Rand error = 1 − F-score of Rand precision and recall, where Rand
  precision is the fraction of predicted same-object pixel pairs that are truly together
  and Rand recall the fraction of true same-object pairs kept together (background counts as
  one region); variation of information split = H(prediction | truth) and merge =
  H(truth | prediction), in bits.
* Intervals are percentile bootstraps over test tiles (the tile is the resampled unit), over
  the resamples where the score is defined. Test tiles that hold no target and get none
  predicted have no pixel scores (empty, not 0: 0 / 0 is undefined), per tile as in the pooled
  rows. A row scored on too few tiles that hold a true or predicted target pixel
  (``informative_tiles``) says so in its ``note`` (:mod:`tessera.interval_caution`: one such
  tile gives no interval, a few an interval narrower than the uncertainty).
"""

import math

import numpy as np
import pandas as pd
from scipy import ndimage

from tessera.errors import TesseraInputError
from tessera.interval_caution import few_tiles_note
from tessera.label_values import IGNORE
from tessera.plotting import pyplot
from tessera.threshold import (
    apply_threshold,
    choose_threshold,
    confusion,
    informative,
    scores_from_counts,
)

EIGHT = np.ones((3, 3), bool)


def precision_recall_curve(prob, truth):
    """Exact precision–recall curve over every distinct probability (ignore pixels left out).

    Returns
    -------
    precision, recall, thresholds : ndarrays
        As ``sklearn.metrics.precision_recall_curve`` (scikit-learn 1.9): one point per distinct
        probability, thresholds increasing, with the final point (precision 1, recall 0) appended
        to precision and recall.
    """
    prob, truth = np.asarray(prob, np.float64).ravel(), np.asarray(truth).ravel()
    keep = truth != IGNORE
    prob, true = prob[keep], truth[keep] == 1
    if not true.any():
        raise TesseraInputError(
            "the test pixels hold no target: a precision-recall curve is undefined"
        )
    order = np.argsort(-prob, kind="mergesort")
    prob, true = prob[order], true[order]
    last = np.r_[np.flatnonzero(np.diff(prob)), prob.size - 1]  # last index of each distinct value
    tp = np.cumsum(true)[last]
    fp = (last + 1) - tp
    precision, recall = tp / (tp + fp), tp / true.sum()
    # from the lowest threshold upwards
    return np.r_[precision[::-1], 1.0], np.r_[recall[::-1], 0.0], prob[last][::-1]


def average_precision(precision, recall):
    """Area under the step-wise precision–recall curve, Σ (R_n − R_{n−1}) P_n."""
    return float(-np.sum(np.diff(recall) * np.asarray(precision)[:-1]))


def match_objects(truth, pred, *, iou=0.5):
    """True and predicted objects (8-connected per tile) matched one-to-one at IoU > `iou`.

    Returns
    -------
    dict
        ``true_objects``, ``predicted_objects``, ``matched``.
    """
    if iou < 0.5:
        raise TesseraInputError(
            f"the IoU threshold must be >= 0.5 for one-to-one matching, got {iou}"
        )
    truth, pred = np.asarray(truth), np.asarray(pred, bool)
    valid = truth != IGNORE
    t_lab, n_t = ndimage.label((truth == 1) & valid, EIGHT)
    p_lab, n_p = ndimage.label(pred & valid, EIGHT)
    if n_t == 0 or n_p == 0:
        return {"true_objects": n_t, "predicted_objects": n_p, "matched": 0}
    both = (t_lab > 0) & (p_lab > 0)
    pairs, inter = np.unique(np.stack([t_lab[both], p_lab[both]]), axis=1, return_counts=True)
    size_t = np.bincount(t_lab.ravel(), minlength=n_t + 1)
    size_p = np.bincount(p_lab.ravel(), minlength=n_p + 1)
    union = size_t[pairs[0]] + size_p[pairs[1]] - inter
    matched = int(np.sum(inter / union > iou))
    return {"true_objects": n_t, "predicted_objects": n_p, "matched": matched}


def _entropy(counts):
    p = counts[counts > 0] / counts.sum()
    return float(-(p * np.log2(p)).sum())


def partition_errors(truth_labels, pred_labels):
    """Adapted Rand error (with Rand precision and recall) and VOI split / merge of two labelings.

    Both are integer label images of the same pixels (0 = background, one region); pixels are
    compared only where both are given.
    """
    a = np.asarray(truth_labels).ravel().astype(np.int64)
    b = np.asarray(pred_labels).ravel().astype(np.int64)
    pairs, counts = np.unique(np.stack([a, b]), axis=1, return_counts=True)
    counts = counts.astype(np.float64)
    _, ia = np.unique(pairs[0], return_inverse=True)
    _, ib = np.unique(pairs[1], return_inverse=True)
    rows = np.bincount(ia, weights=counts)  # truth region sizes
    cols = np.bincount(ib, weights=counts)  # predicted region sizes
    sum_joint, sum_true, sum_pred = (counts**2).sum(), (rows**2).sum(), (cols**2).sum()
    n = counts.sum()
    # pair counts including each pixel with itself, as the challenges define them
    rand_precision = (sum_joint - n) / (sum_pred - n) if sum_pred > n else 1.0
    rand_recall = (sum_joint - n) / (sum_true - n) if sum_true > n else 1.0
    f = (
        2 * rand_precision * rand_recall / (rand_precision + rand_recall)
        if rand_precision + rand_recall
        else 0.0
    )
    h_joint, h_true, h_pred = _entropy(counts), _entropy(rows), _entropy(cols)
    return {
        "adapted_rand_error": 1.0 - f,
        "rand_precision": rand_precision,
        "rand_recall": rand_recall,
        "voi_split": h_joint - h_true,
        "voi_merge": h_joint - h_pred,
    }


def bootstrap_interval(tile_counts, statistic, *, reps=1000, confidence=0.95, seed=0):
    """Percentile interval of `statistic(summed counts)` over tiles (rows of tp, fp, fn)
    resampled with replacement."""
    counts = np.asarray(tile_counts, dtype=np.float64)
    # tiles of background alone, predicted as such, only repeat the others' sums: with fewer
    # than two tiles that hold anything every resample gives the same value
    if len(counts) < 2 or np.count_nonzero(informative(*counts.T)) < 2:
        return math.nan, math.nan
    rng = np.random.default_rng(seed)
    picks = rng.integers(0, len(counts), size=(reps, len(counts)))
    values = np.array([statistic(*counts[p].sum(axis=0)) for p in picks])
    values = values[~np.isnan(values)]  # resamples where the statistic is undefined
    if not values.size:
        return math.nan, math.nan
    tail = (1 - confidence) / 2 * 100
    return float(np.percentile(values, tail)), float(np.percentile(values, 100 - tail))


def _pixel_scores(tp, fp, fn):
    """Pixel scores of pooled counts; undefined (NaN) where tiles hold no target and none is
    predicted, instead of the 0 that choosing a threshold needs."""
    if tp + fp + fn == 0:
        return dict.fromkeys(("precision", "recall", "f1", "jaccard"), math.nan)
    return scores_from_counts(tp, fp, fn)


def _object_scores(true_objects, predicted_objects, matched):
    """Object precision, recall and F1; undefined (NaN) where there is no object at all, as the
    pixel scores are (:func:`_pixel_scores`), else 0 where one side has none.

    Examples
    --------
    >>> _object_scores(4, 2, 2)["object_f1"], _object_scores(3, 0, 0)["object_recall"]
    (0.6666666666666666, 0.0)
    >>> _object_scores(0, 0, 0)["object_f1"]
    nan
    """
    t, p, k = true_objects, predicted_objects, matched
    if t + p == 0:
        return dict.fromkeys(("object_precision", "object_recall", "object_f1"), math.nan)
    return {
        "object_precision": k / p if p else 0.0,
        "object_recall": k / t if t else 0.0,
        "object_f1": 2 * k / (t + p),
    }


def _tile_scores(row, prob, truth, threshold):
    """Pixel counts and scores, object matches and partition errors of one test tile."""
    if prob.shape != truth.shape:
        raise TesseraInputError(
            f"tile {row.tile_id}: prediction {prob.shape} and labels {truth.shape} differ"
        )
    tp, fp, fn, tn = confusion(prob, truth, threshold)
    pred = apply_threshold(prob, threshold)
    objects = match_objects(truth, pred)
    valid = truth != IGNORE
    t_lab = ndimage.label((truth == 1) & valid, EIGHT)[0][valid]
    p_lab = ndimage.label(pred & valid, EIGHT)[0][valid]
    return {
        "tile_id": row.tile_id,
        "dataset": row.dataset,
        "tp": tp,
        "fp": fp,
        "fn": fn,
        "tn": tn,
        **_pixel_scores(tp, fp, fn),
        **objects,
        **partition_errors(t_lab, p_lab),
    }


def _group_summary(name, group, labels, probabilities, threshold, *, confidence, reps, seed):
    """One summary row: the pooled scores of the test tiles in `group` (per-tile rows)."""
    ids = list(group["tile_id"])
    counts = group[["tp", "fp", "fn"]].to_numpy()
    totals = counts.sum(axis=0)
    pixel = _pixel_scores(*totals)
    k = int(informative(*counts.T).sum())
    out = {"dataset": name, "tiles": len(group), "informative_tiles": k}
    out.update({"threshold": threshold, **pixel})
    for metric in ("f1", "jaccard"):
        low, high = bootstrap_interval(
            counts,
            lambda tp, fp, fn, m=metric: _pixel_scores(tp, fp, fn)[m],
            reps=reps,
            confidence=confidence,
            seed=seed,
        )
        out[f"{metric}_ci_low"], out[f"{metric}_ci_high"] = low, high
    test_p = np.concatenate([probabilities[t].ravel() for t in ids])
    test_t = np.concatenate([labels[t].ravel() for t in ids])
    if (test_t == 1).any():
        precision, recall, _ = precision_recall_curve(test_p, test_t)
        out["average_precision"] = average_precision(precision, recall)
    else:
        out["average_precision"] = math.nan
    t_obj, p_obj, matched = (
        int(group[c].sum()) for c in ("true_objects", "predicted_objects", "matched")
    )
    out.update(
        {
            "true_objects": t_obj,
            "predicted_objects": p_obj,
            "matched_objects": matched,
            **_object_scores(t_obj, p_obj, matched),
            "adapted_rand_error": float(group["adapted_rand_error"].mean()),
            "voi_split": float(group["voi_split"].mean()),
            "voi_merge": float(group["voi_merge"].mean()),
            "confidence": confidence,
            "object_rule": "8-connected per tile, IoU > 0.5",
            "note": few_tiles_note(len(group), k),
        }
    )
    return out


def evaluate_tiles(
    registry, labels, probabilities, *, confidence=0.95, reps=1000, seed=0, source=None
):
    """All scores of the test tiles of one target (threshold from the validation tiles).

    Parameters
    ----------
    registry : pandas.DataFrame
        Tile registry with ``tile_id``, ``dataset``, ``role``.
    labels, probabilities : dict
        Tile id → label image (0/1/255) / probability map.
    source : str, optional
        The tile set, named in the message when the tiles cannot be scored.

    Returns
    -------
    summary : pandas.DataFrame
        One row for all test tiles and one per dataset: pixel scores with bootstrap intervals,
        average precision, object scores, partition errors.
    per_tile : pandas.DataFrame
        Pixel and object scores of every test tile.
    curve : pandas.DataFrame
        The pooled precision–recall curve of the test tiles.
    """
    roles = set(registry["role"])
    if "test" not in roles:
        raise TesseraInputError(
            "the target has no test tiles; annotate more tiles or change split.fractions"
        )
    if "validation" not in roles:
        raise TesseraInputError("the target has no validation tiles to choose the threshold on")
    test = registry[registry["role"] == "test"]
    if not any((labels[t] == 1).any() for t in test["tile_id"] if t in labels):
        # no precision, recall or curve is defined without a single target pixel
        raise TesseraInputError(
            f"the {len(test)} test tile(s) hold no target pixel, so accuracy cannot be measured; "
            "expected target in at least one test tile: raise tiles.per_dataset or tiles.size",
            source=source,
        )
    missing = [
        t
        for t in registry.loc[registry["role"].isin(["validation", "test"]), "tile_id"]
        if t not in probabilities
    ]
    if missing:
        raise TesseraInputError(f"no prediction for tile(s) {missing[:5]}")
    val_ids = registry.loc[registry["role"] == "validation", "tile_id"]
    val_p = np.concatenate([probabilities[t].ravel() for t in val_ids])
    val_t = np.concatenate([labels[t].ravel() for t in val_ids])
    threshold = float(choose_threshold(val_p, val_t))
    rows = []
    for row in test.itertuples(index=False):
        rows.append(_tile_scores(row, probabilities[row.tile_id], labels[row.tile_id], threshold))
    per_tile = pd.DataFrame(rows)
    summary = []
    groups = [("all", per_tile)] + [(d, g) for d, g in per_tile.groupby("dataset", sort=True)]
    for name, group in groups:
        summary.append(
            _group_summary(
                name,
                group,
                labels,
                probabilities,
                threshold,
                confidence=confidence,
                reps=reps,
                seed=seed,
            )
        )
    all_p = np.concatenate([probabilities[t].ravel() for t in test["tile_id"]])
    all_t = np.concatenate([labels[t].ravel() for t in test["tile_id"]])
    precision, recall, thresholds = precision_recall_curve(all_p, all_t)
    curve = pd.DataFrame(
        {"threshold": np.r_[thresholds, np.nan], "precision": precision, "recall": recall}
    )
    return pd.DataFrame(summary), per_tile, curve


def check_no_leakage(registry, *, source=None):
    """Refuse a split where a held-out tile repeats or overlaps a training tile.

    A tile id may hold one role only, and a validation or test tile may not share pixels with a
    training tile of the same dataset and section.
    """
    repeated = registry["tile_id"][registry["tile_id"].duplicated()].unique()
    if len(repeated):
        raise TesseraInputError(
            f"tile id(s) {list(repeated)[:5]} appear more than once (in several roles?)",
            source=source,
        )
    train = registry[registry["role"] == "train"]
    for row in registry[registry["role"].isin(["validation", "test"])].itertuples(index=False):
        same = train[(train["dataset"] == row.dataset) & (train["z"] == row.z)]
        overlap = (
            (same["y0"] < row.y0 + row.height)
            & (row.y0 < same["y0"] + same["height"])
            & (same["x0"] < row.x0 + row.width)
            & (row.x0 < same["x0"] + same["width"])
        )
        if overlap.any():
            raise TesseraInputError(
                f"{row.role} tile {row.tile_id} overlaps training tile {same.loc[overlap, 'tile_id'].iloc[0]}: "
                "scores on it would be inflated (leakage); fix the split",
                source=source,
            )


def plot_evaluation(summary, per_tile, curve, out_curve, out_tiles, *, target):
    """The test tiles' precision–recall curve and per-tile F1 (bars, by dataset)."""
    plt = pyplot()

    overall = summary[summary["dataset"] == "all"].iloc[0]
    fig, ax = plt.subplots(figsize=(4.5, 4))
    ax.plot(curve["recall"], curve["precision"], drawstyle="steps-post")
    ax.plot(
        [overall["recall"]],
        [overall["precision"]],
        "o",
        label=f"threshold {overall['threshold']:.2f}",
    )
    ax.set(
        xlabel="recall",
        ylabel="precision",
        xlim=(0, 1.01),
        ylim=(0, 1.01),
        title=f"{target}: test tiles, AP {overall['average_precision']:.3f}",
    )
    ax.legend(loc="lower left", fontsize=8)
    fig.tight_layout()
    fig.savefig(out_curve, dpi=100, format="png")
    plt.close(fig)
    fig, ax = plt.subplots(figsize=(max(4, 0.3 * len(per_tile) + 1), 3.5))
    colours = {d: f"C{i % 10}" for i, d in enumerate(sorted(per_tile["dataset"].unique()))}
    ax.bar(range(len(per_tile)), per_tile["f1"], color=[colours[d] for d in per_tile["dataset"]])
    for i in np.flatnonzero(per_tile["f1"].isna().to_numpy()):  # no target, none predicted
        ax.text(i, 0.02, "empty", rotation=90, ha="center", va="bottom", fontsize=6)
    ax.set_xticks(range(len(per_tile)), per_tile["tile_id"], rotation=90, fontsize=6)
    # two lines: a figure of a few tiles is narrow
    ax.set(ylabel="pixel F1", ylim=(0, 1), title=f"{target}: F1 per test tile\n(colour = dataset)")
    fig.tight_layout()
    fig.savefig(out_tiles, dpi=100, format="png")
    plt.close(fig)


def plot_overlays(images, labels, probabilities, threshold, path, *, target, tiles=4):
    """Raw, truth, prediction and errors (red: false positive, blue: false negative) of test tiles."""
    plt = pyplot()

    ids = list(images)[:tiles]
    fig, axes = plt.subplots(
        max(1, len(ids)), 4, figsize=(9, 2.3 * max(1, len(ids))), squeeze=False
    )
    for row, tile_id in zip(axes, ids, strict=False):
        raw, truth = images[tile_id], labels[tile_id]
        pred = apply_threshold(probabilities[tile_id], threshold)
        errors = np.zeros((*truth.shape, 3))
        errors[pred & (truth == 0)] = (1, 0, 0)
        errors[~pred & (truth == 1)] = (0, 0.4, 1)
        errors[pred & (truth == 1)] = (0.8, 0.8, 0.8)
        for ax, (title, img, cmap) in zip(
            row,
            [
                ("raw", raw, "gray"),
                ("truth", truth == 1, "gray"),
                ("prediction", pred, "gray"),
                ("errors", errors, None),
            ],
            strict=False,
        ):
            ax.imshow(img, cmap=cmap, interpolation="nearest")
            ax.set_title(f"{tile_id} {title}", fontsize=7)
            ax.axis("off")
    fig.suptitle(f"{target}: test tiles (red false positive, blue false negative)", fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=100, format="png")
    plt.close(fig)
