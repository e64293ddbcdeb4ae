"""Training tiles in other orientations: the grid's flips and quarter turns, and what they train."""

import numpy as np
import pytest

from tessera.cascade.api import CascadeSpec, fit_cascade, prepare_tile, receptive_radius
from tessera.cascade.features import filter_bank
from tessera.cascade.geometry import volume_room
from tessera.cascade.orientations import (
    ORIENTATION_COUNTS,
    ORIENTATIONS,
    orient_plane,
    orient_room,
)
from tessera.cascade.spec import node_settings
from tessera.cascade.store import load_node, save_node
from tessera.errors import TesseraInputError


def test_the_orientations_are_the_eight_symmetries_of_the_square():
    # Reference: numpy's rot90 and transpose; the symmetry group of the square has 8 elements,
    # the four rotations of the array and of its transpose.
    a = np.arange(12).reshape(3, 4)
    ours = [orient_plane(a, o) for o in ORIENTATIONS]
    reference = [np.rot90(b, k) for b in (a, a.T) for k in range(4)]
    assert len({r.tobytes() + bytes(r.shape) for r in reference}) == 8
    for r in reference:
        assert sum(o.shape == r.shape and np.array_equal(o, r) for o in ours) == 1
    # the second orientation, the first beyond identity, is the transpose
    assert np.array_equal(ours[1], a.T)
    # only the last two axes turn: sections stay in order
    stack = np.arange(24).reshape(2, 3, 4)
    assert np.array_equal(
        orient_plane(stack, ORIENTATIONS[5])[1], orient_plane(stack[1], ORIENTATIONS[5])
    )


@pytest.mark.parametrize("orientation", ORIENTATIONS)
def test_a_turned_tile_has_the_room_of_its_turned_box(orientation):
    # The room of a box in a volume, turned, equals the room of the turned box in the turned
    # volume; the turned box is found by turning a mask of it (numpy as the reference).
    spec = CascadeSpec(levels=2)
    shape, box = (32, 48), (8, 20, 4, 36)
    mask = np.zeros(shape, bool)
    mask[box[0] : box[1], box[2] : box[3]] = True
    turned = orient_plane(mask, orientation)
    ys, xs = np.nonzero(turned)
    turned_box = (ys.min(), ys.max() + 1, xs.min(), xs.max() + 1)
    assert volume_room(spec, turned.shape, turned_box) == orient_room(
        volume_room(spec, shape, box), orientation
    )


@pytest.mark.parametrize("orientation", ORIENTATIONS[1:])
def test_image_features_turn_with_the_image(orientation):
    # Why only the context needs turned tiles: the filter bank's channels are isotropic, so the
    # features of a turned image are the turned features (common practice for Gaussian-derivative
    # invariants; float32 rounding apart).
    image = np.random.default_rng(3).normal(128, 30, (40, 52)).astype(np.float32)
    sigmas = (0.7, 1.6, 3.5)
    direct = filter_bank(orient_plane(image, orientation), sigmas=sigmas)
    turned = np.moveaxis(
        orient_plane(np.moveaxis(filter_bank(image, sigmas=sigmas), -1, 0), orientation), 0, -1
    )
    assert np.allclose(direct, turned, atol=2e-3 * np.abs(turned).max())


def _tiles(spec, windows, labels, ids, folds):
    return [
        prepare_tile(spec, tile_id, window, label, fold=fold)
        for tile_id, window, label, fold in zip(ids, windows, labels, folds, strict=True)
    ]


def test_two_orientations_train_the_same_model_as_the_tiles_and_their_transposes(tmp_path):
    # The setting adds no other change: with 2 orientations a node is fitted on exactly the rows
    # of the tiles plus their transposed copies (made here with numpy), half the samples each.
    rng = np.random.default_rng(5)
    yy, xx = np.mgrid[:40, :40]
    labels = [(((yy - 14 - 6 * i) ** 2 + (xx - 22) ** 2) < 64).astype(np.uint8) for i in range(2)]
    common = dict(stages=2, levels=1, sigmas=(1.0, 2.0), coarse_sigmas=(1.0,), folds=2, seed=0)
    turned = CascadeSpec(**common, samples_per_tile=200, orientations=2)
    plain = CascadeSpec(**common, samples_per_tile=100)
    r = receptive_radius(plain)
    windows = [
        np.pad(150 - 60 * label + rng.normal(0, 10, label.shape), r, mode="symmetric")
        for label in labels
    ]
    models = fit_cascade(turned, _tiles(turned, windows, labels, ["a", "b"], [0, 1]), target="t")
    both = list(zip(windows, labels, strict=True))
    expanded = _tiles(
        plain,
        [x for w, _ in both for x in (w, orient_plane(w, ORIENTATIONS[1]))],
        [x for _, lab in both for x in (lab, orient_plane(lab, ORIENTATIONS[1]))],
        ["a", "a:orientation1", "b", "b:orientation1"],
        [0, 0, 1, 1],
    )
    reference = fit_cascade(plain, expanded, target="t")
    for node, model in models.items():
        ours, _ = model.classifier.to_state()
        theirs, _ = reference[node].classifier.to_state()
        assert ours.keys() == theirs.keys()
        assert all(np.array_equal(ours[k], theirs[k]) for k in ours), node
        assert model.meta["training_pixels"] == reference[node].meta["training_pixels"]
    # recorded with the model, and a model of another setting is refused
    assert node_settings(turned)["orientations"] == 2
    assert "orientations" not in node_settings(plain)  # models made before the setting: same files
    save_node(models[(1, 0)], tmp_path / "m.npz")
    with pytest.raises(TesseraInputError, match="orientations"):
        load_node(tmp_path / "m.npz", spec=CascadeSpec(**common, samples_per_tile=200))


@pytest.mark.parametrize("count", [0, 3, 16, True])
def test_other_orientation_counts_are_refused(count):
    assert count not in ORIENTATION_COUNTS or isinstance(count, bool)
    with pytest.raises(TesseraInputError, match="orientations must be one of 1, 2, 4, 8"):
        CascadeSpec(orientations=count)
