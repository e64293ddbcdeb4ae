"""Settings held, when the workflow loads, against what they imply: the tile size against the
sections of stacks already checked, the prediction block against the cascade's halo."""

import os

import pytest

from tessera.errors import TesseraInputError
from tessera.workflow.files.stack_check import write_stack_check
from tessera.workflow.load_time_checks import check_prediction_block, check_tiles_fit_checked_stacks


def _checked_stack(results, dataset, shape):
    write_stack_check(results / dataset / "ingest" / "stack_check.json", {"shape": list(shape)})


def test_tiles_larger_than_checked_sections_are_refused_at_load(tmp_path):
    # rule sample_tiles refuses such a size too, but only after Snakemake has cleared the
    # dataset's earlier tiles; once a stack is checked its shape is known when the config loads
    targets = {
        "mito": {
            "tiles": {"size": 200},
            "downsample": 2,
            "annotations": {"labels": "t/{dataset}.tif"},
            "annotated_datasets": None,
        }
    }
    _checked_stack(tmp_path, "a1", (16, 401, 500))  # 201 x 250 px at 2x (rounded up)
    check_tiles_fit_checked_stacks(targets, ["a1", "a2"], results=tmp_path)  # a2: not checked yet
    _checked_stack(tmp_path, "a2", (16, 300, 500))  # 150 x 250 px at 2x
    with pytest.raises(TesseraInputError) as info:
        check_tiles_fit_checked_stacks(targets, ["a1", "a2"], results=tmp_path)
    assert str(info.value) == (
        "config/config.yaml: key targets.mito.tiles.size: 200 px exceeds the sections of "
        f"dataset a2 at downsample 2 (150 x 250 px, from {tmp_path / 'a2/ingest/stack_check.json'})"
        "; expected at most 150"
    )
    # a dataset that gives the target no tiles, or a painted target, is not held to it
    targets["mito"]["annotated_datasets"] = ["a1"]
    check_tiles_fit_checked_stacks(targets, ["a1", "a2"], results=tmp_path)
    painted = {"tiles": {"size": 999}, "downsample": 1, "annotations": {"painted": {}}}
    check_tiles_fit_checked_stacks({"p": painted}, ["a1"], results=tmp_path)


def test_the_check_of_a_stack_since_replaced_refuses_nothing(tmp_path):
    # A stack refused as too small and then replaced by a corrected file must not stay refused
    # by the record of the file it replaced: rule check_stack checks the new one first. The
    # record still holds for the file it describes, unchanged since.
    targets = {"mito": {"tiles": {"size": 200}, "downsample": 1, "annotations": {"labels": "x"}}}
    stack = tmp_path / "small.tif"
    stack.write_bytes(b"old")
    check = tmp_path / "a1" / "ingest" / "stack_check.json"
    write_stack_check(check, {"path": str(stack), "format": "tiff_stack", "shape": [4, 48, 48]})
    os.utime(stack, (1_000_000, 1_000_000))  # written before its check
    stacks = {"a1": (str(stack), "tiff_stack", None)}
    with pytest.raises(TesseraInputError, match="expected at most 48"):
        check_tiles_fit_checked_stacks(targets, ["a1"], results=tmp_path, stacks=stacks)
    stack.write_bytes(b"new")  # replaced after its check
    check_tiles_fit_checked_stacks(targets, ["a1"], results=tmp_path, stacks=stacks)
    os.utime(stack, (1_000_000, 1_000_000))
    moved = {"a1": (str(tmp_path / "elsewhere.tif"), "tiff_stack", None)}  # another file named
    check_tiles_fit_checked_stacks(targets, ["a1"], results=tmp_path, stacks=moved)


# Halos worked by hand from the documented reaches (tessera.cascade.features._scale_reach,
# tessera.cascade.geometry.receptive_radius): at sigma s a Gaussian reaches int(4 s + 0.5) px,
# the structure tensor smooths again at s, finite differences add 4 (so 2 int(4 s + 0.5) + 4),
# the feature halo 1 more and the level grid 1 spare. One stage without levels at sigma 1:
# 2 * 4 + 4 + 2 = 14 px; the output smoothed at sigma 2 reaches int(8.5) = 8 px more: 22 px.
def test_a_prediction_block_smaller_than_the_halo_is_refused_at_load():
    # rule shard_plan refuses such a block too, but only after Snakemake has cleared the
    # dataset's earlier plan; the halo follows from the cascade settings alone
    mito = {
        "cascade": {"stages": 1, "levels": 0, "sigmas": [1.0], "dims": 2},
        "output_smoothing_px": 2.0,
    }
    check_prediction_block([4, 22, 22], {"mito": mito}, {"mito": [(1, 0)]})
    with pytest.raises(TesseraInputError) as info:
        check_prediction_block([4, 21, 64], {"mito": mito}, {"mito": [(1, 0)]})
    assert str(info.value) == (
        "config/config.yaml: predict.block [4, 21, 64] is smaller in y or x than the model's "
        "halo of 22 px: every block would read more halo than core; use blocks of at least 22 "
        "px (a few times more is efficient); the halo of target mito, from its cascade "
        "settings and output_smoothing_px"
    )


def test_a_block_below_every_halo_a_cascade_may_get_is_refused_at_load():
    # A ladder of 1 and 2 stages: stage 2 reads stage 1's map up to stencil radius 8 (+ 1 px
    # of level grid), 9 px beyond the 14 of the image features: 23 px. The smallest halo, 14,
    # is held against the block, whichever rung is chosen.
    ladder = {
        "cascade": {"stages": 1, "levels": 0, "sigmas": [1.0], "dims": 2, "mode": "ladder"},
        "output_smoothing_px": 0.0,
    }
    rungs = {"mito": [(1, 0), (2, 0)]}
    check_prediction_block([4, 14, 14], {"mito": ladder}, rungs)
    with pytest.raises(TesseraInputError) as info:
        check_prediction_block([4, 13, 64], {"mito": ladder}, rungs)
    assert str(info.value) == (
        "config/config.yaml: predict.block [4, 13, 64] is smaller in y or x than the model's "
        "halo of 14 px: every block would read more halo than core; use blocks of at least 14 "
        "px (a few times more is efficient); the halo of target mito, the smallest its cascade "
        "settings allow (its ladder's rungs or dims auto may need more)"
    )
    # dims auto with sigmas unset: the 2D scales end at 7 (2 * 28 + 4 + 2 = 62 px), the 3D at
    # 10 (2 * 40 + 4 + 2 = 86 px)
    auto = {
        "cascade": {"stages": 1, "levels": 0, "sigmas": None, "dims": "auto"},
        "output_smoothing_px": 0.0,
    }
    check_prediction_block([4, 62, 62], {"mito": auto}, {"mito": [(1, 0)]})
    with pytest.raises(TesseraInputError, match=r"halo of 62 px: .* the smallest its cascade"):
        check_prediction_block([4, 61, 61], {"mito": auto}, {"mito": [(1, 0)]})
    # beside neighbours dims auto can only be 2: the halo is known
    auto["cascade"]["neighbours"] = 1
    with pytest.raises(TesseraInputError, match=r"halo of 62 px: .*from its cascade settings"):
        check_prediction_block([4, 61, 61], {"mito": auto}, {"mito": [(1, 0)]})
