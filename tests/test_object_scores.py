"""Objects scored in 3D: against scikit-image, scipy, numpy and a hand-worked example."""

import numpy as np
import pandas as pd
import pytest
from scipy import ndimage
from skimage.measure import label as sk_label
from skimage.metrics import adapted_rand_error, variation_of_information
from sklearn.metrics import f1_score, jaccard_score, precision_score, recall_score

from tessera.errors import TesseraInputError
from tessera.object_scores import (
    connected_truth,
    match_table,
    object_scores,
    overlap_counts,
    partition_scores,
    repeat_labels,
    size_classes,
    voxel_scores,
    whole_in_sections,
)

# The hand-worked example: every row of both sections holds the same 12 columns, so each column
# is 2 sections x 2 rows = 4 voxels.
#   truth: 1 1 . 2 2 2 . 3 3 4 . .
#   pred:  5 5 . 6 6 9 . 7 7 7 . 8
# object 1 = 5 exactly (IoU 1); object 2 split into 6 (IoU 8/12) and 9 (IoU 4/12); objects 3 and
# 4 merged into 7 (IoU 8/12 with 3, 4/12 with 4); 8 lies on background.
TRUTH_ROW = [1, 1, 0, 2, 2, 2, 0, 3, 3, 4, 0, 0]
PRED_ROW = [5, 5, 0, 6, 6, 9, 0, 7, 7, 7, 0, 8]


def _volume(row):
    return np.broadcast_to(np.array(row, np.uint16), (2, 2, len(row))).copy()


def test_hand_worked_example():
    s = object_scores(_volume(TRUTH_ROW), _volume(PRED_ROW))
    # Worked by hand from the rows above: 4 true objects, 5 predicted, matches (1,5) IoU 1,
    # (2,6) IoU 2/3, (3,7) IoU 2/3; IoU > 0.5 is the common-practice matching rule.
    assert (s["truth_objects"], s["predicted_objects"], s["matched_objects"]) == (4, 5, 3)
    assert s["object_precision"] == pytest.approx(3 / 5)
    assert s["object_recall"] == pytest.approx(3 / 4)
    assert s["object_f1"] == pytest.approx(2 * 3 / (4 + 5))
    assert s["count_error"] == pytest.approx((5 - 4) / 4)
    # matched volumes (voxels): 8 vs 8, 8 vs 12, 12 vs 8 -> relative errors 0, -1/3, +1/2
    assert s["matched_volume_error"] == pytest.approx((0 + 1 / 3 + 1 / 2) / 3)
    assert s["matched_volume_bias"] == pytest.approx((0 - 1 / 3 + 1 / 2) / 3)


def test_hand_worked_split_and_merge_are_flagged_per_object():
    table = match_table(overlap_counts(_volume(TRUTH_ROW), _volume(PRED_ROW)))
    by_truth = table.set_index("truth")
    # object 2 touches two predicted objects (split); 7, the best match of 3 and 4, covers both
    # (merge); worked by hand from the rows above
    assert by_truth.loc[2, "pred_overlapping"] == 2
    assert by_truth.loc[3, "truth_sharing"] == 2
    assert by_truth.loc[4, "pred"] == 7 and not by_truth.loc[4, "matched"]
    assert by_truth["iou"].to_numpy() == pytest.approx([1, 8 / 12, 8 / 12, 4 / 12])


def test_mask_leaves_out_objects_and_voxels_outside_it():
    mask = np.ones((2, 2, 12), bool)
    mask[:, :, 9:] = False  # hides object 4, predicted 8, and the part of 7 over object 4
    s = object_scores(_volume(TRUTH_ROW), _volume(PRED_ROW), mask=mask)
    # by hand: truth 1, 2, 3; prediction 5, 6, 9, 7; matches (1,5), (2,6), (3,7) now IoU 1
    assert (s["truth_objects"], s["predicted_objects"], s["matched_objects"]) == (3, 4, 3)
    assert s["object_recall"] == 1.0
    assert s["matched_volume_bias"] == pytest.approx((0 - 1 / 3 + 0) / 3)


def test_hand_worked_voxel_scores():
    s = object_scores(_volume(TRUTH_ROW), _volume(PRED_ROW))
    # by hand from the rows: 8 target columns in the truth, 9 in the prediction, 8 in both
    # (every true column is predicted; column 12 is predicted on background), 4 voxels each
    assert (s["true_voxels"], s["predicted_voxels"], s["shared_voxels"]) == (32, 36, 32)
    assert s["voxel_precision"] == pytest.approx(8 / 9)
    assert s["voxel_recall"] == 1.0
    assert s["voxel_f1"] == pytest.approx(2 * 8 / (8 + 9))
    assert s["voxel_jaccard"] == pytest.approx(8 / 9)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_voxel_scores_equal_scikit_learn_on_the_masks(seed):
    truth, pred = _random_labelings(seed)
    mask = np.zeros(truth.shape, bool)
    mask[1:5] = True
    s = voxel_scores(overlap_counts(truth, pred, mask=mask))
    # scikit-learn's binary scores of the target masks inside the mask (reference library)
    t, p = truth[mask] > 0, pred[mask] > 0
    assert s["voxel_precision"] == pytest.approx(precision_score(t, p))
    assert s["voxel_recall"] == pytest.approx(recall_score(t, p))
    assert s["voxel_f1"] == pytest.approx(f1_score(t, p))
    assert s["voxel_jaccard"] == pytest.approx(jaccard_score(t, p))


def test_voxel_scores_without_target_voxels_are_undefined():
    empty = np.zeros((1, 2, 2), np.uint8)
    s = voxel_scores(overlap_counts(empty, empty))
    assert (s["true_voxels"], s["predicted_voxels"], s["shared_voxels"]) == (0, 0, 0)
    assert all(np.isnan(s[k]) for k in ("voxel_precision", "voxel_recall", "voxel_jaccard"))


def test_iou_of_exactly_one_half_is_not_a_match():
    truth = np.array([[[1, 1, 1, 1]]])
    pred = np.array([[[2, 2, 0, 0]]])
    # IoU 2/4 = 0.5; matches need IoU > 0.5 (common practice: strictly above keeps them unique)
    assert object_scores(truth, pred)["matched_objects"] == 0
    assert object_scores(truth, np.array([[[2, 2, 2, 0]]]))["matched_objects"] == 1


def _random_labelings(seed, shape=(6, 20, 20)):
    rng = np.random.default_rng(seed)
    smooth = ndimage.gaussian_filter(rng.random(shape), 1.5)
    truth = ndimage.label(smooth > np.quantile(smooth, 0.6))[0]
    noisy = ndimage.gaussian_filter(smooth + 0.02 * rng.standard_normal(shape), 1.0)
    pred = ndimage.label(noisy > np.quantile(noisy, 0.55))[0] * 3  # other ids on purpose
    return truth, pred


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_partition_scores_equal_scikit_image(seed):
    truth, pred = _random_labelings(seed)
    mask = np.zeros(truth.shape, bool)
    mask[2:5] = True
    s = partition_scores(overlap_counts(truth, pred, mask=mask))
    t, p = truth[mask], pred[mask]
    # scikit-image 0.26, background counted as a region (ignore_labels=()); its "precision"
    # is relative to the truth, so our Rand precision is its recall and vice versa
    error, sk_prec, sk_rec = adapted_rand_error(t, p, ignore_labels=())
    assert s["arand"] == pytest.approx(error)
    assert s["rand_precision"] == pytest.approx(sk_rec)
    assert s["rand_recall"] == pytest.approx(sk_prec)
    # skimage returns [H(image1 | image0), H(image0 | image1)] in bits: split, then merge
    split, merge = variation_of_information(t, p)
    assert s["voi_split"] == pytest.approx(split)
    assert s["voi_merge"] == pytest.approx(merge)
    assert s["voi_split"] != pytest.approx(s["voi_merge"])  # the test tells the two apart


def test_connected_truth_equals_scikit_image_label():
    truth, _ = _random_labelings(3)
    binary = truth > 0
    binary[1, 1, 1] = binary[2, 2, 2] = True  # a corner contact at least
    # skimage.measure.label: connectivity=3 is 26-connected in 3D, 1 is 6-connected; both number
    # objects in raster order
    assert np.array_equal(connected_truth(binary), sk_label(binary, connectivity=3))
    assert np.array_equal(connected_truth(binary, connectivity=6), sk_label(binary, connectivity=1))
    assert connected_truth(binary).max() != connected_truth(binary, connectivity=6).max()


def test_repeat_labels_equals_numpy_kron():
    labels = np.arange(1, 13, dtype=np.uint32).reshape(1, 3, 4)
    # numpy.kron with a block of ones repeats every voxel as a block
    full = np.kron(labels, np.ones((2, 3, 2), np.uint32))
    assert np.array_equal(repeat_labels(labels, (2, 3, 2), full.shape), full)
    assert np.array_equal(repeat_labels(labels, (2, 3, 2), (2, 8, 7)), full[:, :8, :7])


def test_size_classes_equal_pandas_qcut_of_ranks():
    volumes = np.random.default_rng(4).integers(1, 50, 31)
    ranks = pd.Series(volumes).rank(method="first")
    # pandas.qcut on distinct ranks gives equal-count classes
    expected = pd.qcut(ranks, 3, labels=["small", "medium", "large"]).astype(str)
    assert size_classes(volumes).tolist() == expected.tolist()


def test_bad_inputs_name_what_is_wrong():
    with pytest.raises(TesseraInputError, match="truth must hold integer labels, got float64"):
        object_scores(np.zeros((1, 2, 2)), np.zeros((1, 2, 2), int))
    with pytest.raises(
        TesseraInputError, match=r"truth \(1, 2, 2\) and prediction \(1, 2, 3\) differ in shape"
    ):
        object_scores(np.zeros((1, 2, 2), int), np.zeros((1, 2, 3), int))
    with pytest.raises(
        TesseraInputError,
        match=r"the IoU threshold must be in \[0.5, 1\) for one-to-one matching, got 0.3",
    ):
        object_scores(np.zeros((1, 2, 2), int), np.zeros((1, 2, 2), int), iou=0.3)
    with pytest.raises(
        TesseraInputError, match="prediction holds negative labels; object ids are >= 0"
    ):
        object_scores(np.zeros((1, 2, 2), int), -np.ones((1, 2, 2), int))


def test_huge_object_ids_give_the_hand_worked_scores():
    # ids near the top of uint32 on both sides: pair codes of truth x prediction ids would pass
    # 2**63 if formed from the raw ids; the scores must not depend on the ids' values
    big = np.uint32(4_000_000_000)
    truth = np.where(_volume(TRUTH_ROW) > 0, big + _volume(TRUTH_ROW), 0).astype(np.uint32)
    pred = np.where(_volume(PRED_ROW) > 0, big + _volume(PRED_ROW), 0).astype(np.uint32)
    s = object_scores(truth, pred)
    assert (s["truth_objects"], s["predicted_objects"], s["matched_objects"]) == (4, 5, 3)
    assert s["matched_volume_bias"] == pytest.approx((0 - 1 / 3 + 1 / 2) / 3)


@pytest.mark.parametrize("slab", [(0, 5), (3, 9), (10, 16), (4, 5)])
def test_whole_in_sections_equals_the_bounding_boxes_of_scipy(slab):
    # Reference: scipy.ndimage.find_objects gives each object's bounding box; an object lies
    # wholly within sections z0..z1-1 when its box's z range does, and inside the volume when
    # its box touches none of the volume's faces (an object cut by the border is a part); it
    # has a voxel there when a voxel of it is in the slab.
    rng = np.random.default_rng(7)
    labels = sk_label(ndimage.gaussian_filter(rng.random((16, 24, 24)), 1.5) > 0.52)
    z0, z1 = slab
    boxes = ndimage.find_objects(labels)
    in_slab = set(np.unique(labels[z0:z1])) - {0}

    def inside_volume(box):
        return all(
            0 < axis.start and axis.stop < n for axis, n in zip(box, labels.shape, strict=True)
        )

    whole = sum(
        1
        for k, box in enumerate(boxes, 1)
        if k in in_slab and z0 <= box[0].start and box[0].stop <= z1 and inside_volume(box)
    )
    assert whole_in_sections(labels, z0, z1) == (whole, len(in_slab))
    assert len(in_slab) > 0
