"""Maps beyond a volume's edge are the mirror of the maps inside it.

A block at an edge (a small volume in one block) classifies only the volume: where a node reads
a context map beyond the edge, it reads the map inside, mirrored. The references are numpy's
``np.pad(mode="symmetric")`` (half-sample mirror) and the cascade's parts run by hand: the
filter bank on the mirrored image and the classifier's own ``predict`` on the assembled rows.
"""

import numpy as np
import pytest
from scipy import ndimage

from tessera.cascade.api import (
    CascadeSpec,
    fit_cascade,
    mirrored_block,
    mirrored_stack,
    predict_frame,
    predict_section,
    prepare_tile,
    receptive_radius,
    volume_room,
)
from tessera.cascade.features import filter_bank
from tessera.cascade.frame import mirror_beyond_volume
from tessera.errors import TesseraInputError


def _discs(shape, seed):
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[: shape[0], : shape[1]]
    truth = np.zeros(shape, bool)
    for cy, cx in rng.uniform(0, max(shape), (6, 2)):
        truth |= (yy - cy) ** 2 + (xx - cx) ** 2 < 7**2
    return (150 - 60 * truth + rng.normal(0, 10, shape)).astype(np.float32), truth


def _train(spec):
    tiles = []
    radius = receptive_radius(spec)
    for i in range(4):
        image, truth = _discs((40 + 2 * radius, 40 + 2 * radius), i)
        labels = truth[radius:-radius, radius:-radius].astype(np.uint8)
        tiles.append(prepare_tile(spec, f"t{i}", image, labels, fold=i % 2))
    return fit_cascade(spec, tiles, target="discs")


SPEC = CascadeSpec(
    stages=2,
    levels=0,
    sigmas=(1.0, 2.0),
    stencil_radii=(2, 5),
    samples_per_tile=200,
    folds=2,
    classifier_options={"max_iter": 20},
)


@pytest.fixture(scope="module")
def models():
    return _train(SPEC)


@pytest.mark.parametrize("pads", [(0, 0, 0, 0), (2, 1, 0, 3), (5, 7, 9, 4)])
def test_mirror_beyond_volume_is_numpys_symmetric_pad(pads):
    # Reference: numpy's pad mode "symmetric" (the edge value repeated, then the inside), applied
    # in rounds when a pad is longer than the array, as a mirror repeated beyond itself is.
    prob = np.arange(12, dtype=np.float32).reshape(3, 4)
    want = prob
    top, bottom, left, right = pads
    while top or bottom or left or right:
        step = [min(top, want.shape[0]), min(bottom, want.shape[0])]
        step += [min(left, want.shape[1]), min(right, want.shape[1])]
        want = np.pad(want, ((step[0], step[1]), (step[2], step[3])), mode="symmetric")
        top, bottom, left, right = (a - b for a, b in zip((top, bottom, left, right), step))
    np.testing.assert_array_equal(mirror_beyond_volume(prob, pads), want)


def test_the_second_stage_reads_the_first_stages_map_mirrored_at_the_edge(models):
    # Reference, built by hand for a whole section: stage 1's map of the section alone; the
    # filter bank of the mirrored image (its own mirror_edges); stage 2's rows = those features
    # plus the stencil samples of stage 1's map padded with np.pad(mode="symmetric"), in the
    # order the cascade names them (centre, then n s w e nw ne sw se per radius); then the
    # stage-2 classifier's predict. The cascade's prediction of the whole section must equal it.
    image, _ = _discs((37, 45), 11)
    first = {node: m for node, m in models.items() if node[0] == 1}
    stage1 = predict_section(first, image)
    feats = filter_bank(image, sigmas=SPEC.sigmas)
    r = max(SPEC.stencil_radii)
    padded = np.pad(stage1, r, mode="symmetric")
    h, w = image.shape
    samples = []
    for k in (0, *SPEC.stencil_radii):
        shifts = [(0, 0)] if k == 0 else [(-k, 0), (k, 0), (0, -k), (0, k)]
        shifts += [] if k == 0 else [(-k, -k), (-k, k), (k, -k), (k, k)]
        for dy, dx in shifts:
            samples.append(padded[r + dy : r + dy + h, r + dx : r + dx + w, np.newaxis])
    rows = np.concatenate([feats, *samples], axis=-1).reshape(h * w, -1)
    want = models[(2, 0)].classifier.predict(rows).reshape(h, w)
    got = predict_section(models, image)
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-6)
    # Stage 1 of one level sees only mirror-invariant image features, so its map of the
    # mirrored image is the mirror of its map: classifying the halo on the mirrored image (a
    # frame without room) gives the same numbers here, to rounding.
    halo = receptive_radius(SPEC)
    window = mirrored_stack(image[np.newaxis], 0, 0, -halo, h + halo, -halo, w + halo)
    np.testing.assert_allclose(predict_frame(models, window, (h, w)), got, rtol=0, atol=1e-6)


def test_a_block_a_halo_away_from_every_edge_is_not_changed(models):
    # A core with the whole halo of volume around it reads no mirrored map: giving the frame the
    # room it has changes no bit (reference: the same frame without a room).
    image, _ = _discs((120, 120), 3)
    halo = receptive_radius(SPEC)
    core = (120 - 2 * halo, 120 - 2 * halo)
    window = image[np.newaxis]
    room = volume_room(SPEC, image.shape, (halo, halo + core[0], halo, halo + core[1]))
    assert room == (halo,) * 4
    np.testing.assert_array_equal(
        predict_frame(models, window, core, room=room), predict_frame(models, window, core)
    )


def test_a_single_stage_pixel_classifier_does_not_depend_on_the_room():
    # One stage at one level reads no map: the edge rule cannot change a number (a plain pixel
    # classifier of the filter bank on the mirrored image, as before).
    spec = CascadeSpec(**{**SPEC.to_dict(), "stages": 1})
    single = _train(spec)
    image, _ = _discs((30, 41), 5)
    halo = receptive_radius(spec)
    h, w = image.shape
    window = mirrored_stack(image[np.newaxis], 0, 0, -halo, h + halo, -halo, w + halo)
    np.testing.assert_array_equal(
        predict_section(single, image), predict_frame(single, window, (h, w))
    )


def test_a_core_beyond_the_volume_is_refused():
    with pytest.raises(TesseraInputError, match="lies beyond a volume"):
        volume_room(CascadeSpec(levels=2), (16, 16), (0, 20, 0, 8))


def test_the_room_of_a_tile_off_the_grid_is_rounded_down_to_it():
    # Arithmetic: a core at y 7..15 of a 30-row volume (extended to 32 on the 4 px grid) has 7
    # rows above it, 4 on the grid; 32 - 15 = 17 below, 16 on the grid. A block on the grid
    # keeps its exact room.
    spec = CascadeSpec(levels=2)
    assert volume_room(spec, (30, 30), (7, 15, 0, 30)) == (4, 16, 0, 0)
    assert volume_room(spec, (30, 30), (8, 16, 4, 12)) == (8, 16, 4, 20)


@pytest.mark.parametrize(
    "window",
    [
        (0, 5, 0, 7, 0, 6),  # inside
        (-2, 3, 4, 9, -1, 6),  # across one edge per axis
        (-4, 9, -7, 14, -6, 12),  # beyond both edges, pads shorter than the volume
        (-13, 18, -20, 27, -15, 21),  # pads longer than the volume: the mirror repeats
        (3, 12, 1, 4, 5, 17),  # the mirror reaches past the part inside: gathered instead
        (7, 9, 8, 10, 7, 9),  # wholly beyond the volume
    ],
)
def test_mirrored_block_reads_as_scipys_reflect_mode(window):
    # Reference: scipy.ndimage.map_coordinates with order 0 and mode "reflect" (half-sample
    # symmetric, d c b a | a b c d | d c b a) at the window's integer coordinates.
    volume = np.random.default_rng(3).integers(0, 256, (5, 7, 6)).astype(np.uint8)
    z0, z1, y0, y1, x0, x1 = window
    grid = np.meshgrid(np.arange(z0, z1), np.arange(y0, y1), np.arange(x0, x1), indexing="ij")
    want = ndimage.map_coordinates(volume, np.stack(grid).astype(float), order=0, mode="reflect")
    got = mirrored_block(volume, *window)
    assert got.dtype == volume.dtype
    np.testing.assert_array_equal(got, want)
