"""Objects scored in 3D: a predicted label volume against a truth instance volume.

Conventions (the output columns say them again):

* An object is a non-zero label; 0 is background. Only voxels inside `mask` (all voxels when no
  mask is given) count: an object is counted when at least one of its voxels lies in the mask,
  and its size and overlaps are measured there.
* A predicted object matches a true one when their intersection over union exceeds 0.5
  (common practice). Above 0.5 a true object can share more than half of their union with at
  most one predicted object, so matches are one-to-one without any assignment step.
* Object precision = matched / predicted objects, recall = matched / true objects, F1 their
  harmonic mean, 2 matched / (true + predicted).
* Count error = (predicted − true) / true objects, signed: positive when objects are
  over-counted (splits, specks), negative when under-counted (merges, misses).
* Volume error of matched objects: mean of ``|V_pred − V_true| / V_true`` over the matched pairs
  (and the signed mean as the volume bias), voxel counts inside the mask.
* Voxel scores compare the two masks (every object's voxels against every true object's),
  whatever the ids: precision, recall, F1 (= Dice) and Jaccard of the target voxels, with the
  voxel counts behind them, so that scores of several volumes can be pooled.
* Partition errors compare the two labelings voxel by voxel, background as one region (as the
  test-tile scores do): adapted Rand error = 1 − F-score of Rand precision and recall
  (Arganda-Carreras et al., Front. Neuroanat. 2015), variation of information split =
  H(prediction | truth) and merge = H(truth | prediction), in bits (Meilă, J. Multivar. Anal.
  2007).
"""

import numpy as np
import pandas as pd
from scipy import ndimage

from tessera.errors import TesseraInputError

__all__ = [
    "connected_truth",
    "match_table",
    "mostly_cut",
    "object_scores",
    "overlap_counts",
    "partition_scores",
    "repeat_labels",
    "scores_from_overlaps",
    "size_classes",
    "voxel_ratios",
    "voxel_scores",
    "whole_in_sections",
]

#: The ids 0 (background) and the objects a labeling may hold: non-negative integers.
_INTEGER_KINDS = "iub"


def _as_labels(array, name):
    array = np.asarray(array)
    if array.dtype.kind not in _INTEGER_KINDS:
        raise TesseraInputError(f"{name} must hold integer labels, got {array.dtype}")
    if array.dtype.kind == "i" and array.size and array.min() < 0:
        raise TesseraInputError(f"{name} holds negative labels; object ids are >= 0")
    return array


def connected_truth(labels, *, connectivity=26):
    """True objects of a binary (or any-valued) label volume: its connected components.

    Parameters
    ----------
    labels : (Z, Y, X) ndarray
        Non-zero voxels are target.
    connectivity : {6, 18, 26}, optional
        Neighbours that join voxels into one object (26: faces, edges and corners).

    Returns
    -------
    ndarray of uint32
        Objects numbered 1..N in raster order of their first voxel, 0 background.

    Examples
    --------
    >>> vol = np.zeros((2, 3, 3), np.uint8)
    >>> vol[0, 0, 0] = vol[1, 1, 1] = 1  # corner neighbours
    >>> int(connected_truth(vol).max()), int(connected_truth(vol, connectivity=18).max())
    (1, 2)
    """
    labels = np.asarray(labels)
    if labels.ndim != 3:
        raise TesseraInputError(f"expected a 3D (z, y, x) label volume, got shape {labels.shape}")
    rank = {6: 1, 18: 2, 26: 3}.get(connectivity)
    if rank is None:
        raise TesseraInputError(f"connectivity must be 6, 18 or 26, got {connectivity}")
    out = np.zeros(labels.shape, np.uint32)
    ndimage.label(labels != 0, ndimage.generate_binary_structure(3, rank), output=out)
    return out


def repeat_labels(labels, factors, shape):
    """Labels made on a reduced grid, repeated onto the full grid (each voxel a block).

    Parameters
    ----------
    labels : (Z, Y, X) ndarray
        Labels on the grid reduced by `factors`, ``ceil(shape / factors)`` voxels.
    factors : sequence of 3 int
        Reduction (z, y, x) of the labels' grid.
    shape : sequence of 3 int
        The full grid; the repeated blocks are cut to it at the far edges.

    Returns
    -------
    ndarray
        `labels` at `shape`, same dtype; no label is averaged or invented.

    Examples
    --------
    >>> repeat_labels(np.array([[[1, 2], [3, 4]]]), (1, 2, 2), (1, 3, 3))[0].tolist()
    [[1, 1, 2], [1, 1, 2], [3, 3, 4]]
    """
    labels = np.asarray(labels)
    factors = tuple(int(f) for f in factors)
    shape = tuple(int(s) for s in shape)
    expected = tuple(-(-s // f) for s, f in zip(shape, factors, strict=True))
    if labels.shape != expected:
        raise TesseraInputError(
            f"labels of shape {labels.shape} do not cover {shape} reduced {factors}: expected "
            f"{expected}"
        )
    for axis, f in enumerate(factors):
        labels = np.repeat(labels, f, axis=axis)
    return labels[: shape[0], : shape[1], : shape[2]]


def overlap_counts(truth, pred, *, mask=None):
    """Voxel counts of every (true label, predicted label) pair inside `mask`.

    Returns
    -------
    pandas.DataFrame
        ``truth``, ``pred``, ``voxels``: one row per pair that shares voxels, background (0)
        included, sorted by ``truth`` then ``pred``.

    Examples
    --------
    >>> overlap_counts(np.array([[[0, 1, 1]]]), np.array([[[0, 0, 5]]])).to_dict("list")
    {'truth': [0, 1, 1], 'pred': [0, 0, 5], 'voxels': [1, 1, 1]}
    """
    truth, pred = _as_labels(truth, "truth"), _as_labels(pred, "prediction")
    if truth.shape != pred.shape:
        raise TesseraInputError(f"truth {truth.shape} and prediction {pred.shape} differ in shape")
    if mask is not None:
        mask = np.asarray(mask, bool)
        if mask.shape != truth.shape:
            raise TesseraInputError(f"mask {mask.shape} and truth {truth.shape} differ in shape")
        truth, pred = truth[mask], pred[mask]
    t, p = truth.ravel(), pred.ravel()
    if t.size == 0:
        return pd.DataFrame({"truth": [], "pred": [], "voxels": []}, dtype=np.int64)
    t_ids, t = np.unique(t, return_inverse=True)  # dense ids: pair codes cannot overflow
    p_ids, p = np.unique(p, return_inverse=True)
    width = len(p_ids)
    codes, voxels = np.unique(t.astype(np.int64) * width + p, return_counts=True)
    return pd.DataFrame(
        {
            "truth": t_ids[codes // width].astype(np.int64),
            "pred": p_ids[codes % width].astype(np.int64),
            "voxels": voxels.astype(np.int64),
        }
    )


def match_table(overlaps, *, iou=0.5):
    """Every true object with its best-overlapping predicted object, and whether they match.

    Parameters
    ----------
    overlaps : pandas.DataFrame
        From :func:`overlap_counts`.
    iou : float, optional
        A pair matches when its intersection over union exceeds this (>= 0.5, so that matches
        are one-to-one).

    Returns
    -------
    pandas.DataFrame
        One row per true object: ``truth``, ``truth_voxels``, ``pred`` (best IoU, 0 if none),
        ``pred_voxels``, ``iou``, ``matched``, ``pred_overlapping`` (predicted objects it
        touches: more than one suggests a split) and ``truth_sharing`` (true objects the best
        predicted object touches: more than one suggests a merge).
    """
    if not 0.5 <= iou < 1:
        raise TesseraInputError(
            f"the IoU threshold must be in [0.5, 1) for one-to-one matching, got {iou}"
        )
    size_t = overlaps.groupby("truth")["voxels"].sum()
    size_p = overlaps.groupby("pred")["voxels"].sum()
    both = overlaps[(overlaps["truth"] > 0) & (overlaps["pred"] > 0)].copy()
    both["iou"] = both["voxels"] / (
        size_t.loc[both["truth"]].to_numpy() + size_p.loc[both["pred"]].to_numpy() - both["voxels"]
    )
    best = both.sort_values(["truth", "iou", "pred"], ascending=[True, False, True])
    best = best.drop_duplicates("truth").set_index("truth")
    truths = size_t.index[size_t.index > 0]
    pred = best["pred"].reindex(truths, fill_value=0).astype(np.int64)
    shared = both.groupby("pred")["truth"].nunique()
    table = pd.DataFrame(
        {
            "truth": truths.astype(np.int64),
            "truth_voxels": size_t.loc[truths].to_numpy(np.int64),
            "pred": pred.to_numpy(),
            "pred_voxels": size_p.reindex(pred.to_numpy(), fill_value=0).to_numpy(np.int64),
            "iou": best["iou"].reindex(truths, fill_value=0.0).to_numpy(np.float64),
            "pred_overlapping": both.groupby("truth")["pred"]
            .nunique()
            .reindex(truths, fill_value=0)
            .to_numpy(np.int64),
            "truth_sharing": shared.reindex(pred.to_numpy(), fill_value=0).to_numpy(np.int64),
        }
    )
    table["matched"] = table["iou"] > iou
    return table.reset_index(drop=True)


def _entropy_bits(counts):
    p = counts[counts > 0] / counts.sum()
    return float(-(p * np.log2(p)).sum())


def partition_scores(overlaps):
    """Adapted Rand error (with Rand precision and recall) and VOI split and merge, in bits.

    Parameters
    ----------
    overlaps : pandas.DataFrame
        From :func:`overlap_counts`; background (0) is one region of each labeling.

    Returns
    -------
    dict
        ``arand``, ``rand_precision`` (predicted same-object voxel pairs that are truly
        together), ``rand_recall`` (true same-object pairs kept together), ``voi_split``,
        ``voi_merge``.
    """
    n_ij = overlaps["voxels"].to_numpy(np.float64)
    a = overlaps.groupby("truth")["voxels"].sum().to_numpy(np.float64)
    b = overlaps.groupby("pred")["voxels"].sum().to_numpy(np.float64)
    n = n_ij.sum()
    # pairs of distinct voxels together in both, in truth, in prediction (times two)
    joint, true_pairs, pred_pairs = n_ij @ n_ij - n, a @ a - n, b @ b - n
    precision = joint / pred_pairs if pred_pairs > 0 else 1.0
    recall = joint / true_pairs if true_pairs > 0 else 1.0
    f = 2 * precision * recall / (precision + recall) if precision + recall else 0.0
    h_joint = _entropy_bits(n_ij)
    return {
        "arand": float(1.0 - f),
        "rand_precision": float(precision),
        "rand_recall": float(recall),
        "voi_split": h_joint - _entropy_bits(a),
        "voi_merge": h_joint - _entropy_bits(b),
    }


def voxel_ratios(true, predicted, shared):
    """Precision, recall, F1 (= Dice) and Jaccard from voxel counts of two masks.

    Parameters
    ----------
    true, predicted : int
        Target voxels of the truth and of the prediction.
    shared : int
        Voxels that are target in both.

    Returns
    -------
    dict
        ``voxel_precision``, ``voxel_recall``, ``voxel_f1``, ``voxel_jaccard``; each NaN when
        its denominator is 0 (no target voxel on that side).

    Examples
    --------
    >>> voxel_ratios(4, 3, 2)["voxel_jaccard"]
    0.4
    """
    union = true + predicted - shared

    def ratio(numerator, denominator):
        return numerator / denominator if denominator else float("nan")

    return {
        "voxel_precision": ratio(shared, predicted),
        "voxel_recall": ratio(shared, true),
        "voxel_f1": ratio(2 * shared, true + predicted),
        "voxel_jaccard": ratio(shared, union),
    }


def voxel_scores(overlaps):
    """Voxel counts and :func:`voxel_ratios` of the target masks behind `overlaps`.

    Parameters
    ----------
    overlaps : pandas.DataFrame
        From :func:`overlap_counts` (background included).

    Returns
    -------
    dict
        ``true_voxels``, ``predicted_voxels``, ``shared_voxels`` and the ratios.

    Examples
    --------
    >>> s = voxel_scores(overlap_counts(np.array([[[0, 1, 1, 1]]]), np.array([[[3, 3, 0, 4]]])))
    >>> s["true_voxels"], s["predicted_voxels"], s["shared_voxels"], s["voxel_jaccard"]
    (3, 3, 2, 0.5)
    """
    voxels = overlaps["voxels"].to_numpy(np.int64)
    in_truth = overlaps["truth"].to_numpy() > 0
    in_pred = overlaps["pred"].to_numpy() > 0
    counts = {
        "true_voxels": int(voxels[in_truth].sum()),
        "predicted_voxels": int(voxels[in_pred].sum()),
        "shared_voxels": int(voxels[in_truth & in_pred].sum()),
    }
    return {**counts, **voxel_ratios(*counts.values())}


def object_scores(truth, pred, *, mask=None, iou=0.5):
    """Object and partition scores of a predicted label volume against true instances.

    Parameters
    ----------
    truth, pred : (Z, Y, X) ndarray of int
        Instance labels, 0 background. Use :func:`connected_truth` when the truth is binary.
    mask : (Z, Y, X) ndarray of bool, optional
        The voxels to score (e.g. the held-out sections); all when None.
    iou : float, optional
        Matching threshold, >= 0.5 (see the module notes).

    Returns
    -------
    dict
        ``truth_objects``, ``predicted_objects``, ``matched_objects``, ``object_precision``,
        ``object_recall``, ``object_f1``, ``count_error``, ``matched_volume_error``,
        ``matched_volume_bias``, the entries of :func:`voxel_scores` and of
        :func:`partition_scores`. Precision, recall
        and F1 are 0 when there is nothing to match; count and volume errors NaN when undefined.

    Examples
    --------
    >>> truth = np.array([[[1, 1, 0, 2, 2, 2]]])
    >>> pred = np.array([[[7, 7, 0, 8, 0, 9]]])
    >>> s = object_scores(truth, pred)
    >>> s["matched_objects"], s["object_precision"], s["object_recall"], s["count_error"]
    (1, 0.3333333333333333, 0.5, 0.5)
    """
    return scores_from_overlaps(overlap_counts(truth, pred, mask=mask), iou=iou)


def scores_from_overlaps(overlaps, *, iou=0.5):
    """:func:`object_scores` from the overlap counts of :func:`overlap_counts`."""
    matches = match_table(overlaps, iou=iou)
    n_true = len(matches)
    n_pred = int(overlaps.loc[overlaps["pred"] > 0, "pred"].nunique())
    matched = matches[matches["matched"]]
    k = len(matched)
    relative = (matched["pred_voxels"] - matched["truth_voxels"]) / matched["truth_voxels"]
    return {
        "truth_objects": n_true,
        "predicted_objects": n_pred,
        "matched_objects": k,
        "object_precision": k / n_pred if n_pred else 0.0,
        "object_recall": k / n_true if n_true else 0.0,
        "object_f1": 2 * k / (n_true + n_pred) if n_true + n_pred else 0.0,
        "count_error": (n_pred - n_true) / n_true if n_true else float("nan"),
        "matched_volume_error": float(relative.abs().mean()) if k else float("nan"),
        "matched_volume_bias": float(relative.mean()) if k else float("nan"),
        **voxel_scores(overlaps),
        **partition_scores(overlaps),
    }


def size_classes(voxels, *, names=("small", "medium", "large")):
    """Size class of each object: equal-count classes (terciles for three) of its volume.

    Examples
    --------
    >>> size_classes([5, 1, 9, 3, 7, 2]).tolist()
    ['medium', 'small', 'large', 'medium', 'large', 'small']
    """
    voxels = np.asarray(voxels, np.float64)
    if voxels.size == 0:
        return np.array([], dtype=object)
    # rank in volume order (ties by position), cut into len(names) equal groups
    rank = np.empty(voxels.size, np.int64)
    rank[np.argsort(voxels, kind="stable")] = np.arange(voxels.size)
    return np.asarray(names, dtype=object)[rank * len(names) // voxels.size]


def whole_in_sections(labels, z0, z1):
    """How many objects of `labels` lie wholly within sections ``z0 .. z1 - 1`` and inside the
    volume, and how many have a voxel there.

    An object scored on a slab of sections that it extends beyond is scored on its cut faces
    only, and the sections it crosses outside the slab may have been used to train or tune the
    model. An object touching a face of the volume (its first or last section, or the border of
    the sections) is cut by it as well, so it is not whole either, wherever the slab lies: a
    stack thinner than the organelles are long holds few whole ones.

    Parameters
    ----------
    labels : (P, M, N) ndarray of int
        Objects of the whole volume (non-negative ids, 0 background).
    z0, z1 : int
        The slab's first section and the one past its last.

    Returns
    -------
    whole, present : int

    Examples
    --------
    >>> lab = np.zeros((6, 4, 4), np.uint8)
    >>> lab[1:3, 1, 1] = 1  # whole within sections 1-3
    >>> lab[2:5, 2, 2] = 2  # runs on to section 4
    >>> lab[1:3, 0, 2] = 3  # cut by the border of the sections
    >>> whole_in_sections(lab, 1, 4), whole_in_sections(lab, 0, 6)
    ((1, 3), (2, 3))
    """
    labels = _as_labels(labels, "labels")
    size = int(labels.max(initial=0)) + 1
    inside, outside = np.zeros(size, bool), np.zeros(size, bool)
    last = labels.shape[0] - 1

    def seen(values):
        return np.bincount(values.ravel().astype(np.intp, copy=False), minlength=size) > 0

    # a section at a time: a bincount needs its ids as intp, 8 bytes each, and a copy of the
    # whole volume so converted would take several times the memory of the labels themselves
    for z in range(labels.shape[0]):
        section = labels[z]
        present = seen(section)
        (inside if z0 <= z < z1 else outside)[present] = True
        if z in (0, last):  # the volume's first and last sections are faces
            outside[present] = True
        else:
            border = np.concatenate([section[0], section[-1], section[:, 0], section[:, -1]])
            outside[seen(border)] = True
    inside[0] = outside[0] = False  # background
    return int(np.count_nonzero(inside & ~outside)), int(np.count_nonzero(inside))


def mostly_cut(whole, present):
    """Whether fewer than half of the objects present in a slab lie whole within it (the rule
    behind the cautions of the 3D object scores and the methods paragraph).

    Examples
    --------
    >>> mostly_cut(7, 102), mostly_cut(60, 102), mostly_cut(0, 0)
    (True, False, False)
    """
    return bool(present) and 2 * whole < present
