"""Splitting touching organelles along a probability valley, against in-memory references
(scipy's distance transform, scikit-image's h-maxima and watershed) and published volumes."""

import numpy as np
import pytest
from scipy import ndimage
from skimage.morphology import h_maxima
from skimage.segmentation import watershed

from tessera.errors import TesseraInputError
from tessera.objects.label import label_objects
from tessera.objects.morphology import connectivity_structure
from tessera.objects.split import split_touching, tie_breaker
from tessera.workflow.config import load_config

SPACING = (40.0, 10.0, 10.0)
ST = connectivity_structure(26)


def blobs(seed, shape=(12, 48, 56)):
    """Random blobby probabilities in [0, 1] with many touching blobs above 0.5."""
    rng = np.random.default_rng(seed)
    p = ndimage.gaussian_filter(rng.random(shape), (0.8, 2.5, 2.5))
    return ((p - p.min()) / (p.max() - p.min())).astype(np.float32)


def object_markers(height, valley, mine, depth):
    """Markers of one object (0 elsewhere): scikit-image's h-maxima of the scaled distance
    `valley`, plus each h-maximum of the plain distance `height` whose basin (scikit-image's
    watershed of -height from those maxima) holds none of them (tessera's documented rule)."""
    shape_peaks, _ = ndimage.label(
        h_maxima(np.where(mine, height, 0.0), float(depth), footprint=ST) > 0, ST
    )
    peaks = h_maxima(np.where(mine, valley, 0.0), float(depth), footprint=ST) > 0
    markers, n = ndimage.label(peaks, ST)
    if shape_peaks.max() > 1:
        basins = watershed(-height, shape_peaks, mask=mine, connectivity=ST)
        for k in range(1, shape_peaks.max() + 1):
            if not peaks[basins == k].any():
                n += 1
                markers[shape_peaks == k] = n
    if n == 0:
        markers[np.unravel_index(np.argmax(np.where(mine, valley, 0.0)), mine.shape)] = 1
    return markers


def valley_reference(p, *, threshold, depth, valley, spacing=SPACING):
    """The split of the whole volume in memory: objects are scipy's 26-connected components of
    ``p >= threshold``; the plain elevation is scipy's Euclidean distance (sampling = spacing,
    nm) and the scaled one that distance times min(p / valley, 1) (None: not scaled), both
    plus tessera's documented tie-breaker; markers per :func:`object_markers`; pieces come
    from scikit-image's watershed of the scaled elevation, numbered in raster order of their
    first voxel."""
    objects, n = ndimage.label(p >= threshold, ST)
    distance = ndimage.distance_transform_edt(objects > 0, sampling=spacing)
    scale = 1.0 if valley is None else np.minimum(p.astype(np.float64) / valley, 1.0)
    height = distance + tie_breaker(objects.shape)
    scaled = distance * scale + tie_breaker(objects.shape)
    markers = np.zeros(objects.shape, np.int64)
    for k in range(1, n + 1):
        mine = object_markers(height, scaled, objects == k, depth)
        markers[mine > 0] = mine[mine > 0] + markers.max()
    pieces = watershed(-scaled, markers, mask=objects > 0, connectivity=ST)
    ids, first = np.unique(pieces.ravel(), return_index=True)
    order = ids[ids > 0][np.argsort(first[ids > 0], kind="stable")]
    lut = np.zeros(pieces.max() + 1, np.int64)
    lut[order] = np.arange(1, len(order) + 1)
    return lut[pieces]


def run(p, block, spacing=SPACING, **kwargs):
    out = np.zeros(p.shape, np.uint32)
    table = label_objects(
        p, out, spacing=spacing, high=0.5, block=block, fill_holes=False, **kwargs
    )
    return out, table


def test_valley_split_out_of_core_equals_scikit_image_watershed():
    # Reference libraries: scipy (label, distance_transform_edt) and scikit-image (h_maxima,
    # watershed) on the whole volume in memory with the same elevation; neither the block size
    # nor where a block cuts an object may change a byte.
    p = blobs(5)
    expected = valley_reference(p, threshold=0.5, depth=20, valley=0.8)
    by_shape = valley_reference(p, threshold=0.5, depth=20, valley=None)
    assert expected.max() > by_shape.max()  # the probability really splits more objects
    for block in [(12, 48, 56), (5, 17, 23), (4, 32, 16)]:
        labels, table = run(p, block, split_min_depth_nm=20, split_valley_probability=0.8)
        np.testing.assert_array_equal(labels, expected)
        assert table["id"].tolist() == list(range(1, expected.max() + 1))
        assert table["voxels"].tolist() == np.bincount(expected.ravel())[1:].tolist()


def two_pressed_balls(spacing, *, radius=200.0, apart=0.55, dip=0.55, band_nm=25.0):
    """Two balls of `radius` (nm) whose centres are ``apart * 2 * radius`` apart along x, so
    they meet on a wide disc (no neck to speak of), probability 0.95 inside and `dip` within
    `band_nm` of the plane halfway between the centres."""
    d = apart * 2 * radius
    extent = (2 * radius + 160.0, 2 * radius + 160.0, 2 * radius + d + 160.0)
    shape = tuple(int(e / s) + 1 for e, s in zip(extent, spacing, strict=True))
    zz, yy, xx = (g * s for g, s in zip(np.indices(shape), spacing, strict=True))
    centre = [radius + 80.0, radius + 80.0, radius + 80.0]
    p = np.zeros(shape, np.float32)
    for cx in (centre[2], centre[2] + d):
        inside = (zz - centre[0]) ** 2 + (yy - centre[1]) ** 2 + (xx - cx) ** 2 <= radius**2
        p[inside] = 0.95
    mid = centre[2] + d / 2
    p[(p > 0) & (np.abs(xx - mid) <= band_nm)] = dip
    return p, radius, d


@pytest.mark.parametrize("spacing", [(40.0, 10.0, 10.0), (30.0, 12.0, 9.0)])
def test_pressed_balls_split_along_the_valley_into_their_analytic_volumes(spacing):
    # Two balls of radius r = 200 nm with centres 220 nm apart meet on a disc of radius
    # sqrt(r^2 - 110^2) = 167 nm: their shape alone leaves the smaller maximum only ~33 nm above
    # the saddle, under the 40 nm asked, so they stay one object. A dip of probability along
    # the contact lowers the saddle and they split along the mid-plane. Published formulas
    # (Euclid; spherical cap V = pi h^2 (3r - h) / 3): each piece is a ball of 4/3 pi r^3 less
    # a cap of height h = r - 110 nm; each must come within 5 % of it.
    p, r, d = two_pressed_balls(spacing)
    kwargs = dict(split_min_depth_nm=40, block=(7, 31, 29))
    whole, _ = run(p, spacing=spacing, **kwargs)
    assert whole.max() == 1
    out, table = run(p, spacing=spacing, split_valley_probability=0.9, **kwargs)
    assert len(table) == 2 and out.max() == 2
    h = r - d / 2
    analytic = (4 / 3 * np.pi * r**3 - np.pi * h**2 * (3 * r - h) / 3) / 1e9
    np.testing.assert_allclose(table["volume_um3"].to_numpy(), analytic, rtol=0.05)
    # each ball's centre is in a piece of its own
    centres_x = (r + 80.0, r + 80.0 + d)
    zc, yc = (int(round((r + 80.0) / s)) for s in spacing[:2])
    assert {int(out[zc, yc, int(round(x / spacing[2]))]) for x in centres_x} == {1, 2}


def dumbbell(spacing, *, waist_p):
    """Two balls of radius 200 nm, centres 700 nm apart, joined by a rod of radius 180 nm; the
    rod's middle 100 nm have probability `waist_p`, the rest 0.95."""
    shape = (21, 61, 121)
    zz, yy, xx = (g * s for g, s in zip(np.indices(shape), spacing, strict=True))
    p = np.zeros(shape, np.float32)
    body = (zz - 400.0) ** 2 + (yy - 300.0) ** 2 <= 180.0**2
    body &= (xx >= 250.0) & (xx <= 950.0)
    for cx in (250.0, 950.0):
        body |= (zz - 400.0) ** 2 + (yy - 300.0) ** 2 + (xx - cx) ** 2 <= 200.0**2
    p[body] = 0.95
    p[body & (np.abs(xx - 600.0) <= 50.0)] = waist_p
    return p


def test_dumbbell_with_a_sure_waist_stays_whole_and_an_unsure_one_splits():
    # A neck of radius 180 nm between maxima of 200 nm rises only ~20 nm (Euclid): by shape one
    # object at a depth of 40 nm. A waist as sure as the rest (0.95 >= 0.9) leaves the distance
    # as it is, so the organelle stays whole; the same waist at 0.5 halves the saddle's height
    # (to ~100 nm, 100 nm under both maxima) and splits it at the waist.
    p = dumbbell(SPACING, waist_p=0.95)
    kwargs = dict(split_min_depth_nm=40, split_valley_probability=0.9, block=(8, 32, 32))
    out, table = run(p, **kwargs)
    assert len(table) == 1
    np.testing.assert_array_equal(out > 0, p >= 0.5)
    out, table = run(dumbbell(SPACING, waist_p=0.5), **kwargs)
    assert len(table) == 2
    assert out[10, 30, 25] != out[10, 30, 95] and out[10, 30, 25] > 0 and out[10, 30, 95] > 0


def test_no_probability_gives_todays_split():
    # probability None, or a valley no voxel of the mask falls below (every voxel 0.95 >= 0.9),
    # is the split by shape alone: scikit-image's watershed on the plain distance (reference).
    p = blobs(6)
    mask_p = np.where(p >= 0.5, 0.95, 0.0).astype(np.float32)
    expected = valley_reference(mask_p, threshold=0.5, depth=20, valley=None)
    assert expected.max() > ndimage.label(mask_p >= 0.5, ST)[1]  # some objects are split
    today, _ = run(mask_p, (5, 17, 23), split_min_depth_nm=20)
    np.testing.assert_array_equal(today, expected)
    sure, _ = run(mask_p, (5, 17, 23), split_min_depth_nm=20, split_valley_probability=0.9)
    assert sure.tobytes() == today.tobytes()
    mask = p[2:8, 10:40, 10:40] >= 0.5
    kw = dict(spacing=SPACING, min_depth_nm=20, structure=ST)
    plain = split_touching(mask, **kw)
    assert split_touching(mask, probability=None, valley_probability=0.8, **kw).tobytes() == (
        plain.tobytes()
    )
    assert split_touching(mask, probability=p[2:8, 10:40, 10:40], **kw).tobytes() == (
        plain.tobytes()
    )


@pytest.mark.parametrize("value", [1.5, 0, -0.2, float("nan"), True])
def test_bad_valley_probability_is_refused(value):
    with pytest.raises(
        TesseraInputError, match=r"objects split_valley_probability must be in \(0, 1\], got"
    ):
        run(np.zeros((2, 8, 8), np.float32), (2, 8, 8), split_valley_probability=value)


def test_config_refuses_a_valley_probability_out_of_range_naming_the_key(repo):
    def config(objects):
        target = {"downsample": 2, "annotations": {"labels": "{dataset}.tif"}, "objects": objects}
        return {"datasets": "x.tsv", "targets": {"mito": target}}

    schema = repo / "config" / "schemas" / "config.schema.yaml"
    with pytest.raises(TesseraInputError) as high:
        load_config(config({"split_valley_probability": 1.5}), schema)
    assert "key targets.mito.objects.split_valley_probability: 1.5 is greater than" in str(
        high.value
    )
    loaded = load_config(config({"split_valley_probability": None}), schema)
    assert loaded["targets"]["mito"]["objects"]["split_valley_probability"] is None


def test_a_filled_cavity_counts_as_sure():
    # A cavity enclosed in the sure waist of the dumbbell above is filled (step 4) and belongs
    # to the organelle: its low probability must not open a valley there. Were it counted at
    # its probability (0), the waist would be a ring ~30 nm thick (Euclid: (180 - 120) / 2) and
    # the dumbbell would split.
    p = dumbbell(SPACING, waist_p=0.95)
    zz, yy, xx = (g * s for g, s in zip(np.indices(p.shape), SPACING, strict=True))
    p[(zz - 400.0) ** 2 + (yy - 300.0) ** 2 + (xx - 600.0) ** 2 <= 120.0**2] = 0.0
    out = np.zeros(p.shape, np.uint32)
    table = label_objects(
        p,
        out,
        spacing=SPACING,
        high=0.5,
        block=(8, 32, 32),
        fill_max_voxels=10**9,
        split_min_depth_nm=40,
        split_valley_probability=0.9,
    )
    assert len(table) == 1 and table["cavities_filled"].all()
    np.testing.assert_array_equal(out > 0, ndimage.binary_fill_holes(p >= 0.5))


def test_an_excluded_section_is_bridged_before_the_split_reads_it():
    # A sure rod (0.95) crosses a section QC excluded whose probabilities are lost (0). The mask
    # bridges it from the sections above and below (linear interpolation), and so must the
    # split: read as it is stored, the lost section would be a valley and cut the rod in two.
    spacing = (40.0, 10.0, 10.0)
    shape = (24, 40, 40)
    zz, yy, xx = (g * s for g, s in zip(np.indices(shape), spacing, strict=True))
    p = np.where((yy - 200.0) ** 2 + (xx - 200.0) ** 2 <= 150.0**2, 0.95, 0.0)
    p[(zz < 40.0) | (zz > 880.0)] = 0.0
    p = p.astype(np.float32)
    p[12] = 0.0
    out = np.zeros(shape, np.uint32)
    table = label_objects(
        p,
        out,
        spacing=spacing,
        high=0.5,
        block=(8, 16, 16),
        excluded_sections=[12],
        split_min_depth_nm=40,
        split_valley_probability=0.9,
    )
    assert len(table) == 1 and table["touches_excluded_section"].all()
    assert out[12].any() and len(np.unique(out[out > 0])) == 1


def test_an_unsure_organelle_keeps_the_cut_its_shape_gives():
    # Two balls of radius 200 nm, centres 380 nm apart, meet on a disc of radius
    # sqrt(200^2 - 190^2) = 62 nm (Euclid): by shape each maximum stands ~138 nm above the
    # saddle, over the 100 nm asked, so they split. The second ball is unsure (0.55): scaled
    # by 0.55 / 0.9 its maximum falls to ~122 nm, under 100 nm above the saddle, and would
    # merge with the first; the probability may add cuts but not remove this one.
    spacing = (40.0, 10.0, 10.0)
    shape = (15, 50, 90)
    zz, yy, xx = (g * s for g, s in zip(np.indices(shape), spacing, strict=True))
    p = np.zeros(shape, np.float32)
    for cx, value in ((220.0, 0.95), (600.0, 0.55)):
        ball = (zz - 280.0) ** 2 + (yy - 245.0) ** 2 + (xx - cx) ** 2 <= 200.0**2
        p[ball & (p == 0)] = value
    kwargs = dict(split_min_depth_nm=100, block=(8, 32, 32))
    by_shape, _ = run(p, spacing=spacing, **kwargs)
    assert by_shape.max() == 2
    out, table = run(p, spacing=spacing, split_valley_probability=0.9, **kwargs)
    assert len(table) == 2
    assert out[7, 24, 22] != out[7, 24, 60] and out[7, 24, 22] > 0 and out[7, 24, 60] > 0
