"""Training builds only the feature rows it samples; the shortcut changes no number.

Each check recomputes through the straightforward path (the whole feature matrix of a node, then
numpy indexing or the classifier's own prediction of every row) and asks for equality to the last
bit: the shortcuts only copy numbers, so anything less than equality is a bug.
"""

import numpy as np
import pytest

from tessera.cascade.classifiers import make_classifier
from tessera.cascade.fit import (
    _balanced_weights,
    _sample_rows,
    _tile_seed,
    fit_cascade,
    level_labels,
    node_tile,
    out_of_fold_maps,
    prepare_tile,
    train_node,
)
from tessera.cascade.frame import ensure_maps, make_frame, node_matrix, node_rows, share_features
from tessera.cascade.geometry import receptive_radius
from tessera.cascade.geometry import z_halo as tile_z_halo
from tessera.cascade.spec import CascadeSpec, nodes

SPEC = CascadeSpec(
    stages=2,
    levels=1,
    sigmas=(1.0, 2.0),
    coarse_sigmas=(1.0,),
    stencil_radii=(1, 2, 4),
    samples_per_tile=300,
    folds=2,
    seed=5,
    classifier_options={"max_iter": 5},
)


def _tiles(spec, count=4, size=(52, 60), final=None):
    """Tiles of dark discs on a noisy background; labels = the discs, one pixel ignored (255)."""
    radius = receptive_radius(spec, final)
    tiles = []
    for i in range(count):
        rng = np.random.default_rng(i)
        yy, xx = np.mgrid[: size[0] + 2 * radius, : size[1] + 2 * radius] - radius
        cy, cx = rng.uniform(10, 40, 2)
        truth = (yy - cy) ** 2 + (xx - cx) ** 2 < 12**2
        image = 150 - 60 * truth + rng.normal(0, 12, truth.shape)
        labels = truth[radius:-radius, radius:-radius].astype(np.uint8)
        labels[0, 0] = 255
        tiles.append(prepare_tile(spec, f"t{i}", image, labels, fold=i % spec.folds, final=final))
    return tiles


@pytest.fixture(scope="module")
def cascade():
    tiles = _tiles(SPEC)
    return tiles, fit_cascade(SPEC, tiles, target="discs")


def test_sampled_rows_equal_rows_of_the_whole_feature_matrix(cascade):
    # Reference: numpy fancy indexing of the flattened (H, W, C) node_matrix, for every node,
    # with its context maps (stage 2 reads stage 1) and picks at the grid's corners and edges.
    tiles, models = cascade
    tile = tiles[1]
    frame = make_frame(SPEC, tile.frame.stack, tile.labels.shape)
    ensure_maps(frame, (SPEC.stages, 0), models, tile.fold)
    rng = np.random.default_rng(0)
    for node in nodes(SPEC):
        margin = frame.margins[node]
        full = node_matrix(frame, node, margin)
        h, w, c = full.shape
        pick = np.concatenate([[0, w - 1, w, h * w - 1], rng.choice(h * w, 50, replace=False)])
        rows = node_rows(frame, node, margin, pick)
        assert rows.dtype == np.float32 and rows.shape == (pick.size, c)
        np.testing.assert_array_equal(rows, full.reshape(-1, c)[pick])


def _straightforward_rows(spec, node, tiles, upstream):
    """Training rows the plain way: each tile's whole node_matrix, then its sampled rows."""
    rows, ys, groups = [], [], []
    for tile in tiles:
        ensure_maps(tile.frame, node, upstream, tile.fold)
        labels = level_labels(tile.labels, node[1], tile.frame.core_shape)
        rng = np.random.default_rng(_tile_seed(spec, node, tile.tile_id))
        pick = _sample_rows(labels, spec.samples_per_tile, rng)
        x = node_matrix(tile.frame, node, 0)
        rows.append(x.reshape(-1, x.shape[-1])[pick])
        ys.append(labels.ravel()[pick])
        groups.append(np.full(pick.size, tile.fold))
    return np.concatenate(rows), np.concatenate(ys).astype(np.uint8), np.concatenate(groups)


def test_trained_node_equals_a_fit_on_the_whole_matrix_rows(cascade):
    # Reference: scikit-learn's MLPClassifier (through make_classifier, as train_node uses it)
    # fitted on rows taken from whole feature matrices; the node train_node makes from sampled
    # rows alone must hold the same weights, bit for bit, for the full and every fold model.
    tiles, models = cascade
    node = (2, 0)
    stage, level = node
    plain_tiles = [node_tile(SPEC, t, node) for t in tiles]
    X, y, g = _straightforward_rows(SPEC, node, plain_tiles, models)
    seed = SPEC.seed + 7919 * stage + 104729 * level

    def fit(mask):
        clf = make_classifier(SPEC.classifier, seed=seed, threads=1, **SPEC.classifier_options)
        return clf.fit(X[mask], y[mask], sample_weight=_balanced_weights(y[mask]))

    expected = [fit(np.ones(y.size, bool))] + [fit(g != k) for k in range(SPEC.folds)]
    made = train_node(SPEC, stage, level, [node_tile(SPEC, t, node) for t in tiles], models)
    assert made.meta["training_pixels"] == y.size
    for want, got in zip(expected, [made.classifier, *made.fold_classifiers], strict=True):
        a, b = want.to_state()[0], got.to_state()[0]
        assert a.keys() == b.keys()
        for key in a:
            np.testing.assert_array_equal(a[key], b[key], err_msg=key)


def test_out_of_fold_maps_equal_the_fold_models_on_the_whole_matrix(cascade):
    # Reference: each tile's fold classifier predicting the tile's whole final feature matrix at
    # once; the maps out_of_fold_maps returns form the network's first layer in parts (float32
    # sums in another order, see test_cascade.py): equal within 1e-6.
    tiles, models = cascade
    final = (SPEC.stages, 0)
    oof = out_of_fold_maps(models, tiles)
    for tile in tiles:
        frame = make_frame(SPEC, tile.frame.stack, tile.labels.shape)
        ensure_maps(frame, final, models, tile.fold)
        x = node_matrix(frame, final, 0)
        clf = models[final].for_tile(tile.fold)
        whole = clf.predict(x.reshape(-1, x.shape[-1])).reshape(x.shape[:2])
        h, w = tile.labels.shape
        assert oof[tile.tile_id].shape == (h, w)
        np.testing.assert_allclose(oof[tile.tile_id], whole[:h, :w], rtol=0, atol=1e-6)


def _stack_tiles(spec, size, sections, room=None):
    """One tile of a disc drifting through `sections` sections (the frame's z halo)."""
    radius = receptive_radius(spec)
    rng = np.random.default_rng(3)
    yy, xx = np.mgrid[: size[0] + 2 * radius, : size[1] + 2 * radius] - radius
    truth = np.stack([(yy - 20 - k) ** 2 + (xx - 25) ** 2 < 12**2 for k in range(sections)])
    image = 150 - 60 * truth + rng.normal(0, 12, truth.shape)
    centre = sections // 2
    labels = truth[centre, radius:-radius, radius:-radius].astype(np.uint8)
    return prepare_tile(spec, "t0", image, labels, fold=0, room=room)


@pytest.mark.parametrize(
    ("size", "context", "room"),
    [
        ((52, 60), 0, None),
        ((51, 60), 0, None),
        ((52, 60), 1, None),
        ((52, 60), 0, (0, 8, 4, 400)),  # a tile near the volume's top and left edges
    ],
)
def test_features_cropped_from_the_wider_tile_equal_features_computed_afresh(size, context, room):
    # Reference: the filter bank (scipy.ndimage Gaussian filters and numpy arithmetic) run on
    # each node's own frame, as a job training that node alone runs it. node_tile hands the
    # node the crop of the tile's features instead; they must be equal to the last bit, on
    # every section the node reads (cross-section context reads the sections around). A core
    # of odd size (extended by mirroring to the level grid) is not shared and still equal. A
    # tile near the volume's edges computes features inside the volume only, node by node.
    spec = CascadeSpec(
        **{**SPEC.to_dict(), "levels": 2, "stencil_radii": [1, 2], "context_sections": context}
    )
    tile = _stack_tiles(spec, size, 2 * tile_z_halo(spec) + 1, room)
    for node in nodes(spec):
        cut = node_tile(spec, tile, node)
        halo = receptive_radius(spec, node)
        c = tile.frame.halo - halo
        zc = tile.frame.z_halo - cut.frame.z_halo
        window = tile.frame.stack[
            zc : tile.frame.stack.shape[0] - zc,
            c : c + size[0] + 2 * halo,
            c : c + size[1] + 2 * halo,
        ]
        fresh = make_frame(spec, window, size, final=node, room=room)
        assert fresh.halo == cut.frame.halo <= tile.frame.halo
        assert cut.frame.room == fresh.room
        reach = fresh.z_halo - spec.neighbours
        for offset in range(-reach, reach + 1):
            mine, theirs = cut.frame.section(offset), fresh.section(offset)
            for level in sorted({lv for _, lv in fresh.margins}):
                widest = theirs.widest(level)
                shared = level in mine._features
                assert shared == (size[0] % 4 == 0)
                np.testing.assert_array_equal(
                    mine.features(level, widest), theirs.features(level, widest)
                )
    assert share_features(tile.frame, cut.frame) == []  # nothing left to share


def test_a_node_trained_by_two_processes_equals_one_trained_by_one(cascade):
    # Reference: the node's fold and full classifiers fitted one after another in this process;
    # fitting them side by side in two worker processes must give the same weights to the last
    # bit (every fit runs single-threaded either way), so a model does not depend on the cores
    # that trained it.
    tiles, models = cascade
    node = (2, 0)
    one = train_node(SPEC, *node, [node_tile(SPEC, t, node) for t in tiles], models, threads=1)
    two = train_node(SPEC, *node, [node_tile(SPEC, t, node) for t in tiles], models, threads=2)
    for a, b in zip(
        [one.classifier, *one.fold_classifiers],
        [two.classifier, *two.fold_classifiers],
        strict=True,
    ):
        left, right = a.to_state()[0], b.to_state()[0]
        assert left.keys() == right.keys()
        for key in left:
            np.testing.assert_array_equal(left[key], right[key], err_msg=key)
