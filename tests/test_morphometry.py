"""Morphometry against analytic shapes and reference libraries; densities of a known phantom."""

import math

import numpy as np
import pandas as pd
import pytest
import tifffile
from scipy import ndimage
from skimage.draw import ellipsoid as sk_ellipsoid
from skimage.draw import line_nd
from skimage.measure import marching_cubes, mesh_surface_area, regionprops

from tessera.errors import TesseraInputError
from tessera.morphometry import (
    complexity_index,
    edge_corrected_weights,
    measure_object,
    measure_objects,
    principal_axes,
    region_densities,
    skeleton_measures,
    surface_area,
)
from tessera.workflow.jobs.morphometry import read_region_mask

SPACINGS = [(10, 10, 10), (20, 10, 10), (40, 10, 10), (40, 20, 20)]


def ellipsoid(a, b, c, spacing):
    """Voxelised solid ellipsoid with semi-axes a, b, c nm along z, y, x."""
    n = [int(math.ceil(r / s)) + 2 for r, s in zip((a, b, c), spacing, strict=True)]
    zz, yy, xx = np.ogrid[-n[0] : n[0] + 1, -n[1] : n[1] + 1, -n[2] : n[2] + 1]
    return (zz * spacing[0] / a) ** 2 + (yy * spacing[1] / b) ** 2 + (xx * spacing[2] / c) ** 2 <= 1


def cylinder(radius, length, spacing):
    """Solid cylinder along x: radius and length in nm."""
    n = [
        int(math.ceil(radius / spacing[0])) + 2,
        int(math.ceil(radius / spacing[1])) + 2,
        int(math.ceil(length / 2 / spacing[2])) + 2,
    ]
    zz, yy, xx = np.ogrid[-n[0] : n[0] + 1, -n[1] : n[1] + 1, -n[2] : n[2] + 1]
    return ((zz * spacing[0]) ** 2 + (yy * spacing[1]) ** 2 <= radius**2) & (
        np.abs(xx * spacing[2]) <= length / 2
    )


@pytest.mark.parametrize("spacing", SPACINGS)
def test_sphere_volume_surface_and_sphericity(spacing):
    # Analytic: V = 4/3 pi r^3, A = 4 pi r^2, sphericity 1 (Wadell 1935).
    r = 500.0
    m = measure_object(ellipsoid(r, r, r, spacing), spacing=spacing)
    assert m["volume_um3"] == pytest.approx(4 / 3 * math.pi * 0.5**3, rel=0.01)
    # Tolerance from our measurements: 0.1-0.9 % bias for voxels up to 2:1, 3.8 % at 4:1.
    assert m["surface_um2"] == pytest.approx(4 * math.pi * 0.5**2, rel=0.05)
    assert m["sphericity"] == pytest.approx(1.0, abs=0.05)
    assert m["equivalent_diameter_um"] == pytest.approx(1.0, rel=0.01)


def test_surface_bias_shrinks_with_resolution():
    errors = []
    for s in (40, 20, 10):
        mask = ellipsoid(400, 400, 400, (s, s, s))
        errors.append(abs(surface_area(mask, spacing=(s, s, s)) / (4 * math.pi * 0.4**2) - 1))
    assert errors[0] > errors[1] > errors[2] and errors[2] < 0.01


def thomsen_area(a, b, c):
    """Ellipsoid surface area by Knud Thomsen's approximation (from memory): with p = 1.6075,
    S = 4 pi ((a^p b^p + a^p c^p + b^p c^p) / 3)^(1/p), within about 1.1 % of the exact value."""
    p = 1.6075
    return 4 * math.pi * (((a * b) ** p + (a * c) ** p + (b * c) ** p) / 3) ** (1 / p)


@pytest.mark.parametrize(
    "semi, spacing",
    [((300, 500, 700), (20, 10, 10)), ((400, 300, 200), (40, 10, 10))],
)
def test_surface_agrees_with_scikit_image_on_the_same_field(semi, spacing):
    # Two references that share nothing with our recipe (no blur of a 0/1 mask):
    # (1) scikit-image on the exact shape: skimage.draw.ellipsoid's signed level set (smooth, so
    #     marching cubes at 0 follows the true surface), meshed with skimage.measure.marching_cubes
    #     at the same anisotropic spacing and measured by mesh_surface_area;
    # (2) Knud Thomsen's formula for the ellipsoid's area (from memory, ~1.1 % accurate).
    # The mask is skimage.draw.ellipsoid with the same spacing, semi-axes in nm along z y x.
    # Tolerance 4 %: ours reads ~1-2 % high on these shapes, while spacing given x y z instead of
    # z y x changes the area by > 40 % and a 1.1 scale error by 10 %.
    a, b, c = semi
    mask = sk_ellipsoid(a, b, c, spacing=spacing)
    level = sk_ellipsoid(a, b, c, spacing=spacing, levelset=True)
    verts, faces, _, _ = marching_cubes(level, level=0.0, spacing=spacing)
    reference = mesh_surface_area(verts, faces) / 1e6
    assert reference == pytest.approx(thomsen_area(a, b, c) / 1e6, rel=0.015)
    ours = surface_area(mask, spacing=spacing)
    assert ours == pytest.approx(reference, rel=0.04)
    assert ours == pytest.approx(thomsen_area(a, b, c) / 1e6, rel=0.04)


@pytest.mark.parametrize("spacing", [(8, 16, 16), (10, 10, 10), (40, 8, 8)])
@pytest.mark.parametrize("thin_axis", [0, 1, 2])
def test_surface_of_a_one_voxel_thin_plate(spacing, thin_axis):
    # A plate one voxel thick along the finest axis is thinner than the blur (one finest voxel),
    # which then never reaches the 0.5 level: the area is that of the voxel staircase, as
    # scikit-image measures it on the 0/1 mask (marching_cubes + mesh_surface_area, the
    # reference). Along a coarser axis the blur is narrower and the blurred surface is kept.
    # Either way a little under the area of the plate's box (geometry).
    shape = [12, 12, 12]
    shape[thin_axis] = 1
    mask = np.ones(shape, bool)
    verts, faces, _, _ = marching_cubes(np.pad(mask.astype(np.float32), 1), 0.5, spacing=spacing)
    reference = mesh_surface_area(verts, faces) / 1e6
    ours = surface_area(mask, spacing=spacing)
    if spacing[thin_axis] == min(spacing):
        assert ours == pytest.approx(reference, rel=1e-6)
    a, b, c = (n * s / 1e3 for n, s in zip(shape, spacing, strict=True))
    box = 2 * (a * b + b * c + a * c)  # µm²: the plate's box; its edges are chamfered
    assert 0.7 * box < ours <= reference <= box


@pytest.mark.parametrize("spacing", SPACINGS)
def test_principal_axes_of_an_ellipsoid(spacing):
    # Analytic: a solid ellipsoid's axis lengths are its diameters 2a, 2b, 2c.
    major, mid, minor = principal_axes(ellipsoid(300, 600, 1200, spacing), spacing=spacing)
    assert (major, mid, minor) == pytest.approx((2.4, 1.2, 0.6), rel=0.03)


def test_axes_agree_with_regionprops_on_isotropic_voxels():
    # Reference: skimage.measure.regionprops axis_major_length / axis_minor_length (in voxels,
    # from the inertia tensor of point voxels). Ours adds each voxel's own extent (s^2 / 12).
    mask = ellipsoid(300, 600, 1200, (10, 10, 10))
    props = regionprops(mask.astype(np.uint8))[0]
    major, _, minor = principal_axes(mask, spacing=(10, 10, 10))
    assert major == pytest.approx(props.axis_major_length * 10 / 1000, rel=0.005)
    assert minor == pytest.approx(props.axis_minor_length * 10 / 1000, rel=0.005)


def test_cylinder_volume_surface_and_elongation():
    # Analytic: V = pi r^2 L, A = 2 pi r L + 2 pi r^2.
    r, length = 150.0, 1500.0
    m = measure_object(cylinder(r, length, (20, 10, 10)), spacing=(20, 10, 10))
    assert m["volume_um3"] == pytest.approx(math.pi * 0.15**2 * 1.5, rel=0.03)
    assert m["surface_um2"] == pytest.approx(
        2 * math.pi * 0.15 * 1.5 + 2 * math.pi * 0.15**2, rel=0.05
    )
    assert m["elongation"] > 4 and m["flatness"] == pytest.approx(1.0, abs=0.1)
    assert m["branch_points"] == 0 and m["end_points"] == 2


def y_shape():
    mask = np.zeros((20, 60, 60), bool)
    for end in [(10, 5, 30), (10, 55, 5), (10, 55, 55)]:
        mask[line_nd((10, 30, 30), end, endpoint=True)] = True
    return ndimage.binary_dilation(mask, ndimage.generate_binary_structure(3, 1), iterations=2)


@pytest.mark.parametrize("step", [1, 2])
def test_skeleton_of_a_y_has_one_branch_point_and_three_ends(step):
    # Worked example: three arms meeting at one point; arm lengths 25, 35.4 and 35.4 voxels.
    spacing = (10 * step, 10, 10)
    length, branches, ends = skeleton_measures(y_shape()[::step], spacing=spacing)
    assert (branches, ends) == (1, 3)
    assert length == pytest.approx((25 + 2 * math.hypot(25, 25)) * 0.01, rel=0.05)


def _turned_ellipsoid(axes, spacing, angle, offset):
    """A solid ellipsoid (semi-axes z y x, nm) turned in plane by `angle`, its centre `offset`
    voxels off the grid."""
    n = [int(math.ceil(max(axes) / s)) + 2 for s in spacing]
    zz, yy, xx = (
        (np.arange(-k, k + 1) + o) * s for k, s, o in zip(n, spacing, offset, strict=True)
    )
    z, y, x = np.meshgrid(zz, yy, xx, indexing="ij")
    c, s = math.cos(angle), math.sin(angle)
    return (z / axes[0]) ** 2 + ((c * y - s * x) / axes[1]) ** 2 + (
        (s * y + c * x) / axes[2]
    ) ** 2 <= 1


@pytest.mark.parametrize("spacing", [(40, 8, 8), (30, 10, 10)])
def test_ellipsoids_in_thick_sections_have_unbranched_skeletons(spacing):
    # A solid ellipsoid is convex and unbranched: its curve skeleton is one line with two ends
    # (common practice in skeleton analysis). Sections 3-5 times thicker than the pixels once
    # gave 1.75 branch points per ellipsoid at 40 x 8 x 8 nm (steps between sections read as side
    # branches); interpolated refinement and pruning of bumps leave at most one in eight.
    rng = np.random.default_rng(0)
    branches = []
    for _ in range(8):
        axes = (rng.uniform(100, 250), rng.uniform(120, 300), rng.uniform(300, 900))
        mask = _turned_ellipsoid(axes, spacing, rng.uniform(0, math.pi), rng.uniform(-0.5, 0.5, 3))
        branches.append(skeleton_measures(mask, spacing=spacing)[1])
    assert sum(branches) <= 1, branches


def test_complexity_index_of_a_sphere_and_growth_with_shape():
    # MCI = SA^3 / (16 pi^2 V^2), Vincent et al. 2019 (definition from memory): for a sphere
    # 9 / (4 pi), and larger for an elongated or branched object of the same volume.
    r = 0.5
    assert complexity_index(4 * math.pi * r**2, 4 / 3 * math.pi * r**3) == pytest.approx(
        9 / (4 * math.pi)
    )
    sphere = measure_object(ellipsoid(500, 500, 500, (10, 10, 10)), spacing=(10, 10, 10))
    rod = measure_object(cylinder(150, 1500, (10, 10, 10)), spacing=(10, 10, 10))
    assert rod["complexity_index"] > 2 * sphere["complexity_index"]


def test_measure_objects_reads_bounding_boxes():
    labels = np.zeros((30, 80, 80), np.uint32)
    labels[5:15, 10:30, 10:30][
        ellipsoid(100, 80, 80, (20, 10, 10))[:10, :20, :20][:10, :20, :20]
    ] = 1
    labels[10:25, 40:70, 40:75] = 2
    table = pd.DataFrame(
        {
            "id": [1, 2],
            "z0": [5, 10],
            "y0": [10, 40],
            "x0": [10, 40],
            "z1": [15, 25],
            "y1": [30, 70],
            "x1": [30, 75],
            "volume_um3": [0.0, 0.0],
        }
    )
    out = measure_objects(labels, table, spacing=(20, 10, 10))
    box = measure_object(labels == 2, spacing=(20, 10, 10))
    assert out.loc[1, "surface_um2"] == pytest.approx(box["surface_um2"])
    assert list(out["id"]) == [1, 2]


def test_densities_of_a_known_phantom():
    # Phantom: two regions of 10 x 40 x 40 voxels; region 1 holds two 4 x 10 x 10 boxes, region 2
    # one box cut by the volume border. V_V and N_V follow by counting (common practice: V_V =
    # object volume / reference volume, N_V = number / reference volume).
    spacing = (50, 10, 10)
    regions = np.zeros((10, 40, 80), np.uint8)
    regions[:, :, :40] = 1
    regions[:, :, 40:] = 2
    labels = np.zeros_like(regions, dtype=np.uint32)
    labels[2:6, 5:15, 5:15] = 1
    labels[2:6, 20:30, 20:30] = 2
    labels[0:4, 10:20, 60:70] = 3  # touches z = 0
    objects = pd.DataFrame(
        {
            "id": [1, 2, 3],
            "surface_um2": [0.1, 0.1, 0.1],
            "touches_volume_border": [False, False, True],
            "z0": [2, 2, 0],
            "y0": [5, 20, 10],
            "x0": [5, 20, 60],
            "z1": [6, 6, 4],
            "y1": [15, 30, 20],
            "x1": [15, 30, 70],
        }
    )
    table, home = region_densities(labels, regions, objects, spacing=spacing, block=(4, 16, 16))
    voxel = 50 * 10 * 10 / 1e9
    region_volume = 10 * 40 * 40 * voxel
    one, two = table.iloc[0], table.iloc[1]
    assert one["V_V"] == pytest.approx(800 / 16000) and two["V_V"] == pytest.approx(400 / 16000)
    assert one["N_V_exclude_touching"] == pytest.approx(2 / region_volume) and two["N_V"] == 0
    # each whole 4 x 10 x 10 box fits at (10-4-1)(40-10-1)(80-10-1) of the 10*40*80 positions
    weight = (10 * 40 * 80) / ((10 - 4 - 1) * (40 - 10 - 1) * (80 - 10 - 1))
    assert one["N_V"] == pytest.approx(2 * weight / region_volume)
    assert two["N_V_biased"] == pytest.approx(1 / region_volume)
    assert one["S_V"] == pytest.approx(0.2 / region_volume)
    assert home.to_dict() == {1: 1, 2: 1, 3: 2}


def test_edge_corrected_count_is_unbiased_where_excluding_cut_objects_is_not():
    # Monte Carlo check of the Miles–Lantuéjoul estimator (Miles 1974, Lantuéjoul 1980; from
    # memory): boxes of two sizes, placed uniformly at random (Poisson numbers) over every
    # position where they meet a 20 x 60 x 60 window. Averaged over many windows, the weighted
    # count of whole boxes per voxel recovers the true density of each size; the plain count of
    # whole boxes falls short, the more so for the large ones.
    rng = np.random.default_rng(7)
    window = np.array([20, 60, 60])
    density = 2e-4  # boxes per voxel, for each size
    for size in ([2, 6, 6], [8, 30, 30]):
        size = np.array(size)
        reach = window + size - 1  # positions of the low corner where the box meets the window
        corrected, plain = [], []
        for _ in range(3000):
            n = rng.poisson(density * np.prod(reach))
            low = rng.integers(0, reach, size=(n, 3)) - (size - 1)
            whole = ((low >= 1) & (low + size <= window - 1)).all(axis=1)
            extents = np.repeat(size[None], whole.sum(), axis=0)
            corrected.append(edge_corrected_weights(extents, tuple(window)).sum() / np.prod(window))
            plain.append(whole.sum() / np.prod(window))
        assert np.mean(corrected) == pytest.approx(density, rel=0.05)
        expected_plain = density * np.prod(window - size - 1) / np.prod(window)
        assert np.mean(plain) == pytest.approx(expected_plain, rel=0.05)
    assert (
        expected_plain < 0.5 * density
    )  # the large boxes: excluding cut ones loses more than half


def test_region_mask_of_another_shape_is_refused(tmp_path):
    path = tmp_path / "cells.tif"
    cells = np.zeros((6, 40, 40), np.uint16)
    cells[:, 20:, :] = 3
    tifffile.imwrite(path, cells)
    with pytest.raises(
        TesseraInputError,
        match=r"cells\.tif: region mask has shape \(6, 40, 40\), which at the working level "
        r"\(1x1x1 smaller\) is \(6, 40, 40\); the image there is \(6, 30, 30\)",
    ):
        read_region_mask(path, shape=(6, 30, 30), factors=(1, 1, 1), out=np.zeros((6, 30, 30)))
    out, full, _, n_ids = read_region_mask(
        path, shape=(6, 20, 20), factors=(1, 2, 2), out=np.ones((6, 20, 20))
    )
    np.testing.assert_array_equal(out, cells[:, ::2, ::2])  # every 2nd voxel, labels not averaged
    assert full == (6, 40, 40) and n_ids == len(np.unique(cells[cells > 0]))
    # one row short reduces to the same working shape (ceil(39 / 2) = 20): the stack's own
    # full-resolution shape tells
    tifffile.imwrite(path, cells[:, :39])
    with pytest.raises(
        TesseraInputError,
        match=r"cells\.tif: region mask has shape \(6, 39, 40\), the stack \(6, 40, 40\)",
    ):
        read_region_mask(
            path,
            shape=(6, 20, 20),
            factors=(1, 2, 2),
            out=np.ones((6, 20, 20)),
            full_shape=(6, 40, 40),
        )


@pytest.mark.parametrize(
    ("cells", "message"),
    [
        # labels are whole numbers >= 0 (0 outside every region): common practice for label
        # images (scikit-image's regionprops takes non-negative integer labels)
        (
            np.full((6, 8, 8), 1.5, np.float32),
            r"region mask must hold integer labels \(0 outside every region\), got float32",
        ),
        (
            np.full((6, 8, 8), -1, np.int16),
            r"region mask holds negative values \(lowest -1, page 0\)",
        ),
        (np.zeros((6, 8, 8), np.uint16), r"region mask has no region \(every voxel is 0\)"),
    ],
)
def test_region_mask_must_hold_labels_and_a_region(tmp_path, cells, message):
    path = tmp_path / "cells.tif"
    tifffile.imwrite(path, cells)
    with pytest.raises(TesseraInputError, match=message) as info:
        read_region_mask(path, shape=(6, 8, 8), factors=(1, 1, 1), out=np.zeros((6, 8, 8)))
    assert str(info.value).startswith(str(path)) and "\n" not in str(info.value)


def test_empty_object_is_refused():
    with pytest.raises(TesseraInputError, match="cannot measure an empty object"):
        measure_object(np.zeros((3, 3, 3), bool), spacing=(1, 1, 1))


@pytest.mark.parametrize(
    ("page", "tag", "value", "message"),
    [
        # TIFF 6.0 tags of page 2 rewritten in place, as a bit error in its directory would
        (2, "ImageWidth", 17, r"page 2 has shape \(16, 17\), expected \(16, 16\) like page 0"),
        (2, "BitsPerSample", 12, r"page 2 has bitspersample 12, expected 16 like page 0"),
        # page 3's pixels read from page 0's directory: silently other region labels
        (3, "StripOffsets", 8, r"the directory of page 0 and the pixels of page 3 overlap"),
        (None, None, None, r"cannot read as TIFF: unpack requires a buffer"),  # cut to 4 bytes
    ],
)
def test_damaged_region_mask_is_refused_in_one_line(tmp_path, page, tag, value, message):
    path = tmp_path / "cells.tif"
    regions = (np.arange(6 * 16 * 16) % 7).astype(np.uint16).reshape(6, 16, 16)
    tifffile.imwrite(path, regions, photometric="minisblack")
    if tag is None:
        path.write_bytes(path.read_bytes()[:4])
    else:
        with tifffile.TiffFile(path, mode="r+") as tif:
            tif.pages[page].tags[tag].overwrite(value)
    with pytest.raises(TesseraInputError, match=message) as info:
        read_region_mask(path, shape=(6, 16, 16), factors=(1, 1, 1), out=np.zeros((6, 16, 16)))
    assert str(info.value).startswith(str(path)) and "\n" not in str(info.value)
