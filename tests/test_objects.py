"""Filtering into objects, out of core, against in-memory reference libraries (scipy, scikit-image)."""

import json

import numpy as np
import pandas as pd
import pytest
import zarr
from ome_zarr_models.v05 import Image
from ome_zarr_models.v05.image_label import ImageLabel
from scipy import ndimage
from skimage.draw import ellipsoid as sk_ellipsoid
from skimage.filters import apply_hysteresis_threshold
from skimage.morphology import h_maxima
from skimage.segmentation import watershed

from tessera.errors import TesseraInputError
from tessera.io.omezarr import AXES, multiscale_attrs, open_image
from tessera.io.store_checksums import record_checksums
from tessera.objects.label import label_objects
from tessera.objects.morphology import ball, connectivity_structure
from tessera.objects.split import tie_breaker
from tessera.workflow.config import load_config
from tessera.workflow.jobs.objects import objects_job

SPACING = (40.0, 10.0, 10.0)


def smooth_field(seed, shape=(16, 64, 64)):
    """Random blobby probabilities in [0, 1] plus two hollow shells (objects with a cavity)."""
    rng = np.random.default_rng(seed)
    p = ndimage.gaussian_filter(rng.random(shape), (0.7, 2, 2))
    p = (p - p.min()) / (p.max() - p.min())
    zz, yy, xx = np.indices(shape)
    for c in [(8, 20, 20), (7, 45, 40)]:
        r = np.sqrt(((zz - c[0]) * 4) ** 2 + (yy - c[1]) ** 2 + (xx - c[2]) ** 2)
        p[(r < 9) & (r > 4)] = 0.95
        p[r <= 4] = 0.05
    return p.astype(np.float32)


def physical_ball(radius_nm, spacing):
    """Reference structuring element: the voxels whose centres lie within radius_nm (nm) of the
    centre voxel's in physical space, taken from skimage.draw.ellipsoid (semi-axes in nm, grid
    step = spacing z y x) and cropped to its extent; None for radius 0."""
    if radius_nm == 0:
        return None
    element = sk_ellipsoid(radius_nm, radius_nm, radius_nm, spacing=spacing)
    where = np.argwhere(element)
    return element[tuple(slice(lo, hi + 1) for lo, hi in zip(where.min(0), where.max(0)))]


def reference(p, *, high, low, open_nm=0, close_nm=0, connectivity=26, vmin=0.0, vmax=None):
    """The same steps on the whole volume in memory, with scipy.ndimage doing the work and the
    structuring elements from scikit-image (:func:`physical_ball`)."""
    st = connectivity_structure(connectivity)
    m = p > low
    o, c = physical_ball(open_nm, SPACING), physical_ball(close_nm, SPACING)
    if o is not None:
        m = ndimage.binary_dilation(ndimage.binary_erosion(m, o, border_value=0), o, border_value=0)
    if c is not None:
        m = ndimage.binary_erosion(ndimage.binary_dilation(m, c, border_value=0), c, border_value=1)
    lab, _ = ndimage.label(m, st)
    keep = np.unique(lab[(p > high) & m])
    keep = keep[keep > 0]
    lab[~np.isin(lab, keep)] = 0
    out = lab.copy()
    for k in keep:
        mine = lab == k
        holes = ndimage.binary_fill_holes(mine) & ~mine
        cavities, _ = ndimage.label(holes)
        touching = np.unique(
            cavities[ndimage.binary_dilation((lab > 0) & ~mine, st) & (cavities > 0)]
        )
        out[holes & ~np.isin(cavities, touching)] = k
    volumes = ndimage.sum_labels(np.ones_like(p), out, keep) * np.prod(SPACING) / 1e9
    for k, v in zip(keep, volumes, strict=True):
        if v < vmin or (vmax is not None and v > vmax):
            out[out == k] = 0
    return ndimage.label(out > 0, st)[0]


def run(p, block, **kwargs):
    out = np.zeros(p.shape, np.uint32)
    kwargs.setdefault("fill_max_voxels", 10**9)  # the in-memory reference fills every object
    table = label_objects(p, out, spacing=SPACING, block=block, **kwargs)
    return out, table


BLOCKS = [(16, 64, 64), (5, 17, 23), (4, 32, 16)]


@pytest.mark.parametrize("connectivity", [6, 18, 26])
def test_blockwise_labels_equal_scipy_label(connectivity):
    # Reference library: scipy.ndimage.label on the whole volume (same connectivity), including
    # its numbering in raster order of each object's first voxel.
    p = smooth_field(1)
    expected, n = ndimage.label(p > 0.6, connectivity_structure(connectivity))
    assert n > 5
    for block in BLOCKS:
        labels, table = run(p, block, high=0.6, fill_holes=False, connectivity=connectivity)
        np.testing.assert_array_equal(labels, expected)
        assert table["voxels"].tolist() == np.bincount(expected.ravel())[1:].tolist()


def test_hysteresis_equals_scikit_image():
    # Reference: skimage.filters.apply_hysteresis_threshold (strict > thresholds, 6-connected in 3D).
    # tessera counts >= (tessera.threshold); the two differ only at a probability exactly equal to
    # a threshold, which this continuous random field does not hold.
    p = smooth_field(2)
    expected = apply_hysteresis_threshold(p, 0.55, 0.7)
    assert expected.sum() < (p > 0.55).sum()  # the seeds really drop some components
    for block in BLOCKS:
        labels, _ = run(p, block, high=0.7, low=0.55, fill_holes=False, connectivity=6)
        np.testing.assert_array_equal(labels > 0, expected)


@pytest.mark.parametrize(
    "settings",
    [
        dict(high=0.75, low=0.65),
        dict(high=0.75, low=0.65, open_nm=12, close_nm=12, vmin=0.0002, vmax=0.003),
        dict(high=0.8, low=0.7, connectivity=18, vmin=0.0001),
        dict(high=0.8, low=0.6, open_nm=25, connectivity=6),
        # a radius that reaches one voxel along z at 40 nm (and 4 voxels in-plane at 10 nm)
        dict(high=0.75, low=0.65, close_nm=45),
    ],
)
def test_morphology_holes_and_size_equal_the_in_memory_reference(settings):
    p = smooth_field(3)
    expected = reference(p, **settings)
    assert expected.max() >= 5
    kwargs = dict(
        high=settings["high"],
        low=settings["low"],
        open_radius_nm=settings.get("open_nm", 0),
        close_radius_nm=settings.get("close_nm", 0),
        connectivity=settings.get("connectivity", 26),
        min_volume_um3=settings.get("vmin", 0.0),
        max_volume_um3=settings.get("vmax"),
    )
    for block in BLOCKS:
        labels, table = run(p, block, **kwargs)
        np.testing.assert_array_equal(labels, expected)
        assert table["id"].tolist() == list(range(1, expected.max() + 1))


@pytest.mark.parametrize(
    "radius_nm, spacing",
    [(12, SPACING), (25, SPACING), (45, SPACING), (85, SPACING), (60, (30.0, 12.0, 9.0))],
)
def test_ball_is_the_physical_ellipsoid_of_scikit_image(radius_nm, spacing):
    # Reference: skimage.draw.ellipsoid with semi-axes radius_nm and the voxel spacing, i.e. the
    # voxels within radius_nm in nm. With anisotropic voxels it is flat along z (one plane below
    # 40 nm), unlike an element that treats the voxels as cubes.
    expected = physical_ball(radius_nm, spacing)
    element = ball(radius_nm, spacing)
    assert element.shape == expected.shape
    np.testing.assert_array_equal(element, expected)
    assert element.shape[0] < element.shape[1]


def test_cavities_are_filled():
    p = smooth_field(4)
    hollow = (8, 20, 20)
    labels, _ = run(p, (5, 17, 23), high=0.9, fill_holes=True)
    assert labels[hollow] > 0  # the shell's inside now belongs to the shell
    unfilled, _ = run(p, (5, 17, 23), high=0.9, fill_holes=False)
    assert unfilled[hollow] == 0


def test_objects_with_huge_boxes_are_left_unfilled_and_flagged():
    p = smooth_field(4)
    labels, table = run(p, (5, 17, 23), high=0.9, fill_max_voxels=100)
    shell = labels[8, 20, 26]  # a voxel of the hollow shell around (8, 20, 20)
    assert shell > 0 and labels[8, 20, 20] == 0
    assert not table.set_index("id").loc[shell, "cavities_filled"]
    _, table = run(p, (5, 17, 23), high=0.9)
    assert table["cavities_filled"].all()


def test_size_rule_measures_objects_spanning_blocks_whole():
    # A 4 x 20 x 20 box is 1600 voxels = 0.0064 um^3 at 40 x 10 x 10 nm; cut into 8 pieces of
    # 200 voxels (0.0008 um^3) by the blocks, no piece alone passes a 0.005 um^3 minimum.
    p = np.zeros((8, 40, 40), np.float32)
    p[2:6, 10:30, 10:30] = 0.9
    p[1, 35:37, 35:37] = 0.9  # 4 voxels, removed
    labels, table = run(p, (4, 20, 20), high=0.5, min_volume_um3=0.005)
    assert table["voxels"].tolist() == [1600]
    assert table["volume_um3"].iloc[0] == pytest.approx(1600 * 40 * 10 * 10 / 1e9)
    assert (labels == 1).sum() == 1600 and labels.max() == 1
    row = table.iloc[0]
    assert (row["z0"], row["y0"], row["x0"], row["z1"], row["y1"], row["x1"]) == (
        2,
        10,
        10,
        6,
        30,
        30,
    )
    assert (row["centroid_z_nm"], row["centroid_y_nm"], row["centroid_x_nm"]) == (
        3.5 * 40,
        19.5 * 10,
        19.5 * 10,
    )
    assert not row["touches_volume_border"]


def test_border_and_excluded_section_flags():
    p = np.zeros((6, 20, 20), np.float32)
    p[1:3, 0:4, 5:9] = 0.9  # touches y = 0
    p[3:5, 10:14, 10:14] = 0.9  # crosses the excluded section 4
    _, table = run(p, (3, 10, 10), high=0.5, excluded_sections=[4], bridge_excluded=False)
    assert table["touches_volume_border"].tolist() == [True, False]
    assert table["touches_excluded_section"].tolist() == [False, True]


def test_excluded_sections_are_bridged_so_objects_stay_whole():
    # A rod through z = 1..6 whose section 3 is blank (lost): bridged by interpolating sections 2
    # and 4 it stays one object, flagged; without bridging it falls apart in two.
    p = np.zeros((8, 12, 12), np.float32)
    p[1:7, 4:8, 4:8] = 0.9
    p[3] = 0.0
    labels, table = run(p, (3, 5, 5), high=0.5, excluded_sections=[3])
    assert labels.max() == 1 and table["voxels"].tolist() == [6 * 16]
    assert table["touches_excluded_section"].tolist() == [True]
    labels, _ = run(p, (3, 5, 5), high=0.5, excluded_sections=[3], bridge_excluded=False)
    assert labels.max() == 2


@pytest.mark.parametrize(
    "kwargs, message",
    [
        (dict(high=1.5), "objects threshold high must be a probability in \\[0, 1\\], got 1.5"),
        (dict(high=0.4, low=0.6), "low \\(0.6\\) must not exceed high \\(0.4\\)"),
        (
            dict(high=0.5, min_volume_um3=2.0, max_volume_um3=1.0),
            "objects min_volume_um3 \\(2.0\\) is larger than max_volume_um3 \\(1.0\\)",
        ),
        (dict(high=0.5, connectivity=4), "connectivity must be 6, 18 or 26, got 4"),
        (dict(high=0.5, open_radius_nm=-1), "morphology radius must be >= 0 nm"),
    ],
)
def test_bad_settings_are_refused(kwargs, message):
    with pytest.raises(TesseraInputError, match=message):
        run(np.zeros((2, 8, 8), np.float32), (2, 8, 8), **kwargs)


def test_config_refuses_low_above_high(repo):
    config = {
        "datasets": "x.tsv",
        "targets": {
            "mito": {
                "downsample": 2,
                "annotations": {"labels": "{dataset}.tif"},
                "objects": {"high": 0.5, "low": 0.7},
            }
        },
    }
    with pytest.raises(
        TesseraInputError, match="key targets.mito.objects: low \\(0.7\\) must not exceed high"
    ):
        load_config(config, repo / "config" / "schemas" / "config.schema.yaml")


def probability_inputs(tmp_path, p, origin=None):
    """A stitched probability map (uint8, two levels, checksummed, level 0 at `origin` nm),
    QC table and scores."""
    image = tmp_path / "probability.ome.zarr"
    group = zarr.open_group(store=str(image), mode="w", zarr_format=3)
    factors = [(1, 1, 1), (1, 2, 2)]
    group.attrs.update(
        {
            "ome": multiscale_attrs(name="p", spacing=SPACING, factors=factors, origin=origin),
            "tessera": {"probability": {"scale": 255.0, "z_factor": 1}},
        }
    )
    stored = np.rint(p * 255).astype(np.uint8)
    group.create_array(name="0", data=stored, chunks=(1, 16, 16), dimension_names=AXES)
    group.create_array(name="1", data=stored[:, ::2, ::2], chunks=(1, 16, 16), dimension_names=AXES)
    record_checksums(image)  # as stitch does: readers refuse stores without records
    qc = tmp_path / "sections.tsv"
    excluded = np.arange(p.shape[0]) == 2
    pd.DataFrame({"z": range(p.shape[0]), "excluded": excluded}).to_csv(qc, sep="\t", index=False)
    scores = tmp_path / "scores.tsv"
    pd.DataFrame({"role": ["validation", "test"], "threshold": [0.62, 0.62]}).to_csv(
        scores, sep="\t", index=False
    )
    return image, qc, scores, stored


def test_objects_job_writes_ngff_labels_table_and_settings(tmp_path):
    p = smooth_field(5, shape=(6, 40, 48))
    origin = [0.0, 5.0, 5.0]  # a map of a 2x working level of 10 nm pixels
    image, qc, scores, stored = probability_inputs(tmp_path, p, origin=origin)
    settings = dict(
        high=None,
        low=None,
        open_radius_nm=0,
        close_radius_nm=0,
        fill_holes=True,
        min_volume_um3=0,
        max_volume_um3=None,
        connectivity=26,
        block=[3, 16, 16],
        bridge_excluded=False,
    )
    out = tmp_path / "objects.ome.zarr"
    objects_job(
        image,
        qc,
        scores,
        out,
        tmp_path / "objects.tsv",
        tmp_path / "objects.json",
        target="mito",
        settings=settings,
    )
    root = zarr.open_group(store=str(out), mode="r")
    Image.from_zarr(root)  # NGFF 0.5 image with its labels (ome-zarr-models)
    ImageLabel.from_zarr(root["labels/mito"])
    labels = root["labels/mito/0"][:]
    # the validation threshold was used: compare with scipy on the stored values
    expected, n = ndimage.label(stored.astype(np.float32) / 255 > 0.62, connectivity_structure(26))
    filled = reference(stored.astype(np.float32) / 255, high=0.62, low=0.62)
    np.testing.assert_array_equal(labels, filled)
    assert n == labels.max()
    np.testing.assert_array_equal(root["labels/mito/1"][:], labels[:, ::2, ::2])
    # NGFF places voxel i at scale * i + translation: label level k holds level-0 voxel f * i,
    # so every label level sits at the image's level-0 origin, over the voxels it labels
    for dataset in root["labels/mito"].attrs["ome"]["multiscales"][0]["datasets"]:
        assert dataset["coordinateTransformations"][1]["translation"] == origin
    table = pd.read_csv(tmp_path / "objects.tsv", sep="\t")
    assert len(table) == n
    used = json.loads((tmp_path / "objects.json").read_text())
    assert used["high"] == 0.62 and used["connectivity"] == 26 and used["excluded_sections"] == [2]
    assert root["labels/mito"].attrs["tessera"]["objects"]["connectivity"] == 26
    # the store reads back through its checksum records: labels written here, levels linked from
    # the probability map (whose records they keep)
    group, info = open_image(out)
    np.testing.assert_array_equal(group["labels/mito/0"][:], labels)
    np.testing.assert_array_equal(info["levels"][1][:], stored[:, ::2, ::2])


def test_objects_job_refuses_a_stack_whose_every_section_qc_excluded(tmp_path):
    # A blank or constant stack has every section flagged flat: measured, it entered the
    # statistics as an animal with no objects and region densities of 0.
    p = smooth_field(5, shape=(4, 32, 32))
    image, qc, scores, _ = probability_inputs(tmp_path, p)
    pd.DataFrame({"z": range(4), "excluded": [True] * 4}).to_csv(qc, sep="\t", index=False)
    settings = dict(
        high=0.5,
        low=None,
        min_volume_um3=0,
        max_volume_um3=None,
        connectivity=26,
        block=[2, 16, 16],
    )
    outputs = [tmp_path / "objects.ome.zarr", tmp_path / "objects.tsv", tmp_path / "objects.json"]
    with pytest.raises(TesseraInputError) as info:
        objects_job(image, qc, scores, *outputs, target="mito", settings=settings)
    assert str(info.value) == (
        f"{qc}: section QC excluded every section of this stack, so no object can be found or "
        "measured; look at its sections.png, and replace a blank or damaged stack or remove its "
        "row from the datasets sheet"
    )
    assert not any(path.exists() for path in outputs)
    # one usable section is enough to look for objects
    pd.DataFrame({"z": range(4), "excluded": [True, True, False, True]}).to_csv(
        qc, sep="\t", index=False
    )
    objects_job(image, qc, scores, *outputs, target="mito", settings=settings)
    assert all(path.exists() for path in outputs)


# --- separating touching organelles --------------------------------------------------------


def physical_grid(shape, spacing):
    """Voxel-centre coordinates in nm (z, y, x)."""
    return [g * s for g, s in zip(np.indices(shape, dtype=np.float64), spacing, strict=True)]


def balls_volume(centres_radii, shape, spacing):
    """Probability 0.9 inside the union of balls (centre nm, radius nm), 0 outside."""
    zz, yy, xx = physical_grid(shape, spacing)
    p = np.zeros(shape, np.float32)
    for (cz, cy, cx), r in centres_radii:
        p[(zz - cz) ** 2 + (yy - cy) ** 2 + (xx - cx) ** 2 <= r**2] = 0.9
    return p


def split_reference(
    p, *, high, low, depth, spacing=SPACING, connectivity=26, valley=None, vmin=0.0
):
    """In-memory reference of splitting: today's objects (:func:`reference`), the Euclidean
    distance transform of the whole mask with scipy (sampling = spacing, nm) plus tessera's
    documented tie-breaker, markers from scikit-image's h-maxima within each object (its
    highest point when none stands out), and scikit-image's watershed of the whole volume;
    pieces numbered in raster order of their first voxel. With `valley`, the watershed runs on
    the distance scaled by min(p / valley, 1) (filled cavities counting as p = 1), from its
    h-maxima plus each h-maximum of the plain distance whose basin holds none of them (the
    documented rule). With `vmin` (µm³) objects below it are removed first, and then, until
    none is left, the markers of pieces below it are dropped and the watershed run again (an
    object left with one marker or none is one piece)."""
    st = connectivity_structure(connectivity)
    objects = reference(p, high=high, low=low, connectivity=connectivity, vmin=vmin)
    plain = ndimage.distance_transform_edt(objects > 0, sampling=spacing)
    distance = plain.copy()
    if valley is not None:
        sure = np.where((objects > 0) & ~(p > low), 1.0, p.astype(np.float64))
        distance *= np.minimum(sure / valley, 1.0)
    distance += tie_breaker(objects.shape)
    plain += tie_breaker(objects.shape)
    markers = np.zeros(objects.shape, np.int64)
    for k in range(1, objects.max() + 1):
        mine = np.where(objects == k, distance, 0.0)
        peaks = h_maxima(mine, float(depth), footprint=st) > 0
        lab, n = ndimage.label(peaks, st)
        shape_peaks, m = ndimage.label(
            h_maxima(np.where(objects == k, plain, 0.0), float(depth), footprint=st) > 0, st
        )
        if valley is not None and m > 1:
            basins = watershed(-plain, shape_peaks, mask=objects == k, connectivity=st)
            for j in range(1, m + 1):
                if not peaks[basins == j].any():
                    n += 1
                    lab[shape_peaks == j] = n
        if n == 0:
            lab[np.unravel_index(np.argmax(mine), mine.shape)] = 1
        markers[lab > 0] = lab[lab > 0] + markers.max()
    pieces = watershed(-distance, markers, mask=objects > 0, connectivity=st)
    min_voxels = vmin * 1e9 / np.prod(spacing)
    while True:
        sizes = np.bincount(pieces.ravel(), minlength=markers.max() + 1)
        small = (sizes > 0) & (sizes < min_voxels)
        small[0] = False
        if not small.any():
            break
        kept = np.where(small[markers], 0, markers)
        for k in range(1, objects.max() + 1):
            left = np.unique(kept[(objects == k) & (kept > 0)])
            if len(left) <= 1:  # one piece: the object whole, from one of its markers
                mine = (objects == k) & (markers > 0)
                kept[objects == k] = 0
                kept[tuple(np.argwhere(mine)[0])] = markers[mine][0]
        markers = kept
        pieces = watershed(-distance, markers, mask=objects > 0, connectivity=st)
    ids, first = np.unique(pieces.ravel(), return_index=True)
    order = ids[ids > 0][np.argsort(first[ids > 0], kind="stable")]
    lut = np.zeros(pieces.max() + 1, np.int64)
    lut[order] = np.arange(1, len(order) + 1)
    return lut[pieces]


def test_split_blockwise_equals_scikit_image_watershed():
    # Reference library: scikit-image (h_maxima, watershed) and scipy (distance_transform_edt)
    # on the whole volume in memory, with the same markers; the block size must not matter.
    p = smooth_field(3)
    expected = split_reference(p, high=0.7, low=0.6, depth=20)
    assert expected.max() > reference(p, high=0.7, low=0.6).max() + 5  # really split some
    for block in BLOCKS:
        labels, table = run(p, block, high=0.7, low=0.6, split_min_depth_nm=20)
        np.testing.assert_array_equal(labels, expected)
        assert table["id"].tolist() == list(range(1, expected.max() + 1))
        assert table["voxels"].tolist() == np.bincount(expected.ravel())[1:].tolist()
        assert table["split_checked"].all()


def test_split_pieces_below_the_size_rule_join_their_neighbours():
    # Reference library: scikit-image's watershed run again from the markers of the pieces the
    # size rule keeps (split_reference). The rule's own statement: no object in the table is
    # smaller than min_volume_um3, and splitting moves voxels between objects, never drops them.
    p = smooth_field(3)
    voxel_um3 = np.prod(SPACING) / 1e9
    free = split_reference(p, high=0.7, low=0.6, depth=20)
    sizes = np.bincount(free.ravel())[1:]
    vmin = float(np.percentile(sizes, 30)) * voxel_um3  # some pieces lie below it
    whole = reference(p, high=0.7, low=0.6, vmin=vmin)
    expected = split_reference(p, high=0.7, low=0.6, depth=20, vmin=vmin)
    assert 2 <= expected.max() < split_reference(p, high=0.7, low=0.6, depth=20).max()
    assert expected.max() > whole.max()  # still split
    for block in BLOCKS:
        labels, table = run(p, block, high=0.7, low=0.6, split_min_depth_nm=20, min_volume_um3=vmin)
        np.testing.assert_array_equal(labels, expected)
        np.testing.assert_array_equal(labels > 0, whole > 0)
        assert table["volume_um3"].min() >= vmin


@pytest.mark.parametrize("spacing", [(40.0, 10.0, 10.0), (30.0, 12.0, 9.0)])
def test_two_touching_balls_split_into_their_analytic_volumes(spacing):
    # Two balls of radius 220 and 160 nm whose centres are 0.9 x (220 + 160) nm apart touch over
    # a patch (neck radius ~100 nm, depth of the smaller maximum ~60 nm > 40). Published
    # formula: a ball holds 4/3 pi r^3; each piece must come within 5 % of it (the overlap lens
    # is ~1 % of the smaller ball).
    r1, r2 = 220.0, 160.0
    c1 = (400.0, 400.0, 300.0)
    c2 = (400.0 + 60.0, 400.0, 300.0 + np.sqrt((0.9 * (r1 + r2)) ** 2 - 60.0**2))
    shape = tuple(int(800 / s) + 1 for s in spacing[:2]) + (int(1000 / spacing[2]) + 1,)
    p = balls_volume([(c1, r1), (c2, r2)], shape, spacing)
    out = np.zeros(shape, np.uint32)
    kwargs = dict(spacing=spacing, high=0.5, block=(7, 31, 29), fill_max_voxels=10**9)
    whole = label_objects(p, out.copy(), **kwargs)
    assert len(whole) == 1  # one connected component before splitting
    table = label_objects(p, out, split_min_depth_nm=40, **kwargs)
    assert len(table) == 2 and out.max() == 2
    volumes = table["volume_um3"].to_numpy()
    analytic = 4 / 3 * np.pi * np.array([r1, r2]) ** 3 / 1e9
    np.testing.assert_allclose(volumes, analytic, rtol=0.05)
    assert out[tuple(int(round(c / s)) for c, s in zip(c1, spacing, strict=True))] == 1


def test_dumbbell_with_a_neck_wider_than_the_setting_stays_whole():
    # Two balls of radius 200 nm joined by a rod of radius a along the axis through their
    # centres. The distance's maxima sit at the centres (200 nm), the saddle on the rod near its
    # radius a, so the depth is about 200 - a: a wide neck (a = 180) is one object at 40 nm,
    # a thin one (a = 60) two.
    spacing = (40.0, 10.0, 10.0)
    shape = (21, 61, 121)
    zz, yy, xx = physical_grid(shape, spacing)
    centres = [(400.0, 300.0, 250.0), (400.0, 300.0, 950.0)]
    for neck, expected in ((180.0, 1), (60.0, 2)):
        p = balls_volume([(c, 200.0) for c in centres], shape, spacing)
        rod = ((zz - 400.0) ** 2 + (yy - 300.0) ** 2 <= neck**2) & (xx >= 250) & (xx <= 950)
        p[rod] = 0.9
        out = np.zeros(shape, np.uint32)
        table = label_objects(
            p, out, spacing=spacing, high=0.5, block=(8, 32, 32), split_min_depth_nm=40
        )
        assert len(table) == expected, neck


def test_split_switched_off_gives_todays_bytes():
    # Off (no depth) is the filtering of the tests above, byte for byte, and so is a depth no
    # object reaches (no seed stands out, every object stays whole); reference: scipy, via
    # the in-memory `reference`.
    p = smooth_field(3)
    expected = reference(p, high=0.75, low=0.65, open_nm=12)
    kwargs = dict(high=0.75, low=0.65, open_radius_nm=12)
    off, table_off = run(p, (5, 17, 23), **kwargs)
    np.testing.assert_array_equal(off, expected)
    assert off.tobytes() == run(p, (5, 17, 23), split_min_depth_nm=None, **kwargs)[0].tobytes()
    assert "split_checked" not in table_off
    deep, table_deep = run(p, (4, 32, 16), split_min_depth_nm=10**4, **kwargs)
    assert deep.tobytes() == off.tobytes()
    pd.testing.assert_frame_equal(table_deep.drop(columns="split_checked"), table_off)


def test_objects_too_large_to_split_stay_whole_and_flagged():
    # The limit counts the voxels of the object's bounding box with one voxel of margin (where
    # the volume allows): at the box's size it is split, one voxel below it stays whole, flagged.
    spacing = (40.0, 10.0, 10.0)
    p = balls_volume(
        [((400.0, 300.0, 250.0), 200.0), ((400.0, 300.0, 600.0), 200.0)], (21, 61, 91), spacing
    )
    kwargs = dict(spacing=spacing, high=0.5, block=(8, 32, 32), split_min_depth_nm=40)
    whole = label_objects(p, np.zeros(p.shape, np.uint32), **kwargs | {"split_min_depth_nm": None})
    lo = whole[["z0", "y0", "x0"]].to_numpy()[0] - 1
    hi = whole[["z1", "y1", "x1"]].to_numpy()[0] + 1
    box = int(np.prod(np.minimum(hi, p.shape) - np.maximum(lo, 0)))
    table = label_objects(p, np.zeros(p.shape, np.uint32), split_max_voxels=box, **kwargs)
    assert len(table) == 2 and table["split_checked"].all()
    out = np.zeros(p.shape, np.uint32)
    table = label_objects(p, out, split_max_voxels=box - 1, **kwargs)
    assert len(table) == 1 and not table["split_checked"].any()
    np.testing.assert_array_equal(out > 0, p > 0.5)


@pytest.mark.parametrize(
    "kwargs, message",
    [
        (dict(split_min_depth_nm=-5), "objects split_min_depth_nm must be > 0 nm, got -5"),
        (
            dict(split_min_depth_nm=300, max_volume_um3=0.05),
            "split_min_depth_nm \\(300 nm\\) exceeds 229 nm, the radius of a ball of "
            "max_volume_um3 \\(0.05 um\\^3\\): no object could be split",
        ),
    ],
)
def test_bad_split_settings_are_refused(kwargs, message):
    # 229 nm = (3 x 0.05 um^3 / 4 pi)^(1/3), the radius of a ball of that volume (Euclid).
    with pytest.raises(TesseraInputError, match=message):
        run(np.zeros((2, 8, 8), np.float32), (2, 8, 8), high=0.5, **kwargs)


def test_config_refuses_bad_split_settings_naming_the_key(repo):
    def config(objects):
        target = {"downsample": 2, "annotations": {"labels": "{dataset}.tif"}, "objects": objects}
        return {"datasets": "x.tsv", "targets": {"mito": target}}

    schema = repo / "config" / "schemas" / "config.schema.yaml"
    with pytest.raises(TesseraInputError) as negative:
        load_config(config({"split_min_depth_nm": -5}), schema)
    assert "key targets.mito.objects.split_min_depth_nm: -5 is less than" in str(negative.value)
    with pytest.raises(TesseraInputError) as too_deep:
        load_config(config({"split_min_depth_nm": 300, "max_volume_um3": 0.05}), schema)
    assert "key targets.mito.objects: split_min_depth_nm (300 nm) exceeds 229 nm" in str(
        too_deep.value
    )
    with pytest.raises(TesseraInputError) as auto_too_deep:
        # a ball of radius 29 nm at most
        load_config(config({"min_volume_um3": 0, "max_volume_um3": 0.0001}), schema)
    assert "key targets.mito.objects: split_min_depth_nm (auto, at least 30 nm) exceeds 29 nm" in (
        str(auto_too_deep.value)
    )
    with pytest.raises(TesseraInputError) as unit_in_text:
        load_config(config({"split_min_depth_nm": "40nm"}), schema)
    assert "key targets.mito.objects.split_min_depth_nm: '40nm' does not match '^auto$'" in str(
        unit_in_text.value
    )
    loaded = load_config(config({}), schema)["targets"]["mito"]["objects"]
    assert loaded["split"] is True and loaded["split_min_depth_nm"] == "auto"


@pytest.mark.parametrize(
    "split, valley, setting",
    [(False, 0.8, 20), (True, None, 20), (True, 0.8, 20), (True, None, "auto")],
)
def test_objects_job_passes_the_split_switch_and_depth(tmp_path, split, valley, setting):
    # The config's off switch reaches the library: off = today's labels (scipy reference)
    # whatever the valley probability, on = the scikit-image watershed reference (on the
    # distance scaled by the probability when a valley probability is set); the settings file
    # records the keys.
    p = smooth_field(3)
    image, qc, scores, stored = probability_inputs(tmp_path, p)
    settings = dict(
        high=0.71,  # no stored value k / 255 equals a threshold (>= and > then agree)
        low=0.61,
        open_radius_nm=0,
        close_radius_nm=0,
        fill_holes=True,
        min_volume_um3=0,
        max_volume_um3=None,
        connectivity=26,
        # 8 blocks hold the volume: every object's cavities are filled, as in the reference
        block=[8, 32, 64],
        bridge_excluded=False,
        split=split,
        split_min_depth_nm=setting,
        split_valley_probability=valley,
    )
    out = tmp_path / "objects.ome.zarr"
    args = (image, qc, scores, out, tmp_path / "o.tsv", tmp_path / "o.json")
    objects_job(*args, target="mito", settings=settings)
    labels = zarr.open_group(store=str(out), mode="r")["labels/mito/0"][:]
    values = stored.astype(np.float32) / 255
    # auto: the larger of 30 nm and the coarsest voxel side, by hand for SPACING (40, 10, 10)
    depth = 40 if setting == "auto" else setting
    expected = (split_reference if split else reference)(
        values, high=0.71, low=0.61, **({"depth": depth, "valley": valley} if split else {})
    )
    np.testing.assert_array_equal(labels, expected)
    if split and valley:  # the probability really changes the split here
        assert not np.array_equal(labels, split_reference(values, high=0.71, low=0.61, depth=depth))
    used = json.loads((tmp_path / "o.json").read_text())
    assert used["split"] is split and used["split_min_depth_nm"] == depth
    assert used["split_min_depth_setting"] == setting
    assert used["split_valley_probability"] == valley


def test_scratch_chunks_divide_the_block_and_stay_small():
    # Storage only: each scratch chunk must tile the block (clipped to the volume) exactly, so
    # that the passes write whole chunks, and hold at most SCRATCH_CHUNK_VOXELS where the
    # block's even sides allow (divisibility, plain arithmetic).
    from tessera.objects.label import SCRATCH_CHUNK_VOXELS, scratch_chunks

    for block, shape in [
        ((32, 512, 512), (64, 256, 256)),
        ((32, 512, 512), (1000, 3000, 3000)),
        ((16, 250, 250), (40, 1000, 1000)),
        ((7, 9, 11), (100, 100, 100)),
        ((64, 64, 64), (5, 3, 2)),
    ]:
        chunks = scratch_chunks(block, shape)
        clipped = [min(b, s) for b, s in zip(block, shape)]
        assert all(c >= 1 and k % c == 0 for c, k in zip(chunks, clipped)), (block, shape)
        if any(c % 2 == 0 for c in chunks):
            assert np.prod(chunks) <= SCRATCH_CHUNK_VOXELS, (block, shape, chunks)
