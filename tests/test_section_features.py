"""3D features of one section: against scipy.ndimage (directly and through the 3D filter bank),
numpy's eigvalsh and analytic values."""

import numpy as np
import pytest
from scipy import ndimage

from tessera.cascade import section_features
from tessera.cascade.features import feature_names, feature_radius, filter_bank
from tessera.cascade.section_features import (
    EIGENVALUE_TOLERANCE,
    section_bank_z_reach,
    section_filter_bank_3d,
    symmetric_eigenvalues_3x3,
)
from tessera.errors import TesseraInputError

SIGMAS = (0.7, 1.6, 3.0)
EPS32 = float(np.finfo(np.float32).eps)
# anisotropic (z coarser: σ_z in sections smaller than in plane) and near-isotropic with every
# axis different (z finest: the in-plane σ are scaled down, each by its own ratio)
SPACINGS = [(25.0, 10.0, 10.0), (9.0, 10.0, 11.0)]


def _stack(spacing, *, extra=0, seed=0, shape=(36, 40)):
    """Smooth random grey values 0-255 over the centre and reach + `extra` sections each side."""
    r = section_bank_z_reach(SIGMAS, spacing=spacing) + extra
    noise = np.random.default_rng(seed).normal(size=(2 * r + 1, *shape))
    smooth = ndimage.gaussian_filter(noise, 1.0)
    return ((smooth - smooth.min()) / np.ptp(smooth) * 255).astype(np.float32), r


def _sigma_of(name):
    return float(name.rsplit("_s", 1)[1]) if "_s" in name else 0.0


@pytest.mark.parametrize("spacing", SPACINGS, ids=["anisotropic", "near-isotropic"])
def test_equals_the_3d_filter_bank_at_the_centre_section_except_structure_tensor(spacing):
    stack, r = _stack(spacing, extra=2)
    ours = section_filter_bank_3d(stack, sigmas=SIGMAS, spacing=spacing)
    # Reference: filter_bank on the whole 3D stack (scipy.ndimage.gaussian_filter with σ scaled
    # per axis, then central differences), at the centre section, over the whole plane: the
    # in-plane filters and their mirrored edges are the same, so no crop is needed.
    full = filter_bank(stack, sigmas=SIGMAS, spacing=spacing, mirror_edges=False)[r]
    names = feature_names(SIGMAS, ndim=3)
    assert ours.shape == full.shape and ours.dtype == np.float32
    top = float(np.abs(stack).max())
    checked = 0
    for k, name in enumerate(names):
        if name.startswith("structure"):
            continue
        # Float32 rounding only: both sides round the smoothed planes (values <= top) to float32,
        # a relative error of eps/2 each; filter_bank differences rounded planes, we difference
        # before rounding. A second difference combines four rounded values with weights 1/4,
        # the Hessian's eigenvalues move by at most the norm of its perturbation (Weyl), and the
        # σ² normalisation scales it all: 8 eps top σ² bounds it with room to spare.
        tolerance = 8 * EPS32 * top * max(1.0, _sigma_of(name) ** 2)
        np.testing.assert_allclose(ours[..., k], full[..., k], rtol=0, atol=tolerance, err_msg=name)
        checked += 1
    assert checked == len(names) - 3 * len(SIGMAS)


@pytest.mark.parametrize("spacing", SPACINGS, ids=["anisotropic", "near-isotropic"])
def test_structure_tensor_integrates_the_3d_gradient_in_plane(spacing):
    stack, r = _stack(spacing, seed=1)
    ours = section_filter_bank_3d(stack, sigmas=SIGMAS, spacing=spacing)
    names = feature_names(SIGMAS, ndim=3)
    ratios = [min(spacing) / s for s in spacing]
    data = stack.astype(np.float64)
    for s in SIGMAS:
        # Reference, in float64: scipy.ndimage.gaussian_filter over the volume (σ per axis),
        # numpy.gradient (central differences, unit steps) at the centre section, products
        # smoothed by a 2D scipy.ndimage.gaussian_filter in plane, eigenvalues by
        # numpy.linalg.eigvalsh, largest first.
        smoothed = ndimage.gaussian_filter(data, [s * q for q in ratios], mode="reflect")
        grads = [g[r] for g in np.gradient(smoothed)]
        inplane = (s * ratios[1], s * ratios[2])
        tensor = np.empty(grads[0].shape + (3, 3))
        for a in range(3):
            for b in range(3):
                tensor[..., a, b] = ndimage.gaussian_filter(
                    grads[a] * grads[b], inplane, mode="reflect"
                )
        expected = np.linalg.eigvalsh(tensor)[..., ::-1]
        # np.gradient is one-sided at the in-plane border, ours mirrored: compare where the
        # integration kernel (radius int(4 σ + 0.5)) does not reach the outermost pixel
        crop = int(4 * s + 0.5) + 1
        inner = (slice(crop, -crop), slice(crop, -crop))
        got = np.stack([ours[..., names.index(f"structure{k}_s{s:g}")] for k in range(3)], -1)
        scale = np.abs(expected[inner]).max()
        assert scale > 1  # a real signal
        # float32 gradients and products (relative rounding eps/2 = 6e-8 each, a few of them
        # per value) against a float64 reference, and the float32 closed-form eigenvalues'
        # own stated bound, relative to each pixel's largest eigenvalue
        per_pixel = np.abs(expected[inner]).max(axis=-1, keepdims=True)
        bound = 2e-6 * scale + EIGENVALUE_TOLERANCE * per_pixel
        assert np.all(np.abs(got[inner] - expected[inner]) <= bound)


def test_linear_ramp_in_3d_gives_its_slope_and_a_rank_one_tensor():
    # Analytic: Gaussian smoothing leaves f = a z + b y + c x unchanged and central differences
    # are exact on it, so the gradient magnitude is sqrt(a² + b² + c²) (per voxel step), the
    # Hessian and Laplacian vanish, and the structure tensor is the constant outer product of
    # (a, b, c): eigenvalues a² + b² + c², 0, 0.
    a, b, c = 0.6, -0.8, 0.3
    reach = section_bank_z_reach((1.0, 2.0), spacing=(12, 10, 10))
    zz, yy, xx = np.mgrid[-reach : reach + 1, 0:40, 0:40].astype(np.float32)
    f = section_filter_bank_3d(
        a * zz + b * yy + c * xx + 100, sigmas=(1.0, 2.0), spacing=(12, 10, 10)
    )
    names = feature_names((1.0, 2.0), ndim=3)
    inner = (slice(12, -12), slice(12, -12))

    def channel(name):
        return f[..., names.index(name)][inner]

    slope = a * a + b * b + c * c
    np.testing.assert_allclose(channel("gradient_s2"), np.sqrt(slope), rtol=1e-4)
    np.testing.assert_allclose(channel("structure0_s2"), slope, rtol=1e-4)
    for name in ("structure1_s2", "structure2_s2", "hessian0_s2", "hessian2_s2", "log_s2"):
        np.testing.assert_allclose(channel(name), 0, atol=1e-3, err_msg=name)


def test_closed_form_eigenvalues_equal_numpy_eigvalsh_including_degenerate_cases():
    rng = np.random.default_rng(2)
    random = rng.normal(size=(500, 3, 3)) * rng.uniform(0.01, 100, size=(500, 1, 1))
    rotation = np.linalg.qr(rng.normal(size=(3, 3)))[0]
    special = [
        np.zeros((3, 3)),  # all eigenvalues zero
        4.0 * np.eye(3),  # isotropic: p = 0
        -2.5 * np.eye(3),
        np.diag([1.0, 1.0, 2.0]),  # two equal, the pair the smaller
        np.diag([3.0, -1.0, -1.0]),  # two equal, the pair the larger in magnitude
        rotation @ np.diag([1.0, 1.0, 2.0]) @ rotation.T,  # degenerate and rotated
        rotation @ np.diag([5.0, 5.0, -5.0]) @ rotation.T,
        rotation @ np.diag([0.0, 0.0, 7.0]) @ rotation.T,  # rank one
        np.diag([1e-8, 0.0, -1e-8]),  # tiny
        np.array([[0.0, 1.0, 0.0], [1.0, 0.0, 0.0], [0.0, 0.0, 0.0]]),  # off-diagonal only
    ]
    # two eigenvalues nearly equal, where the arccos is most sensitive: the bound's worst case
    rotations = np.linalg.qr(rng.normal(size=(2000, 3, 3)))[0]
    pair = rng.normal(size=2000)
    near = np.stack([pair, pair * (1 + 1e-4 * rng.normal(size=2000)), rng.normal(size=2000)], 1)
    nearly_double = np.einsum("nij,nj,nkj->nik", rotations, near, rotations)
    matrices = np.concatenate(
        [(random + random.transpose(0, 2, 1)) / 2, nearly_double, np.stack(special)]
    )
    m = matrices
    ours = np.stack(
        symmetric_eigenvalues_3x3(
            m[:, 0, 0], m[:, 0, 1], m[:, 0, 2], m[:, 1, 1], m[:, 1, 2], m[:, 2, 2]
        ),
        -1,
    )
    assert ours.dtype == np.float32
    # Reference: numpy.linalg.eigvalsh (LAPACK), ascending, reversed to largest first
    expected = np.linalg.eigvalsh(matrices)[:, ::-1]
    scale = np.abs(expected).max(axis=1, keepdims=True)
    # float32 throughout: the arccos near repeated eigenvalues turns a rounding of its argument
    # (float32 eps = 1.2e-7) into an angle error of about its square root; the stated bound
    error = np.abs(ours - expected)
    assert np.all(error <= EIGENVALUE_TOLERANCE * scale)
    # typical matrices lose only the float32 rounding of a few operations
    assert np.median(error[:500] / scale[:500]) < 20 * EPS32
    assert np.all(np.diff(ours, axis=1) <= 0)  # descending, even where two are equal
    np.testing.assert_array_equal(ours[-9], [4.0, 4.0, 4.0])  # exactly q when p = 0
    np.testing.assert_array_equal(ours[-10], [0.0, 0.0, 0.0])


def test_eigenvalues_of_planes_are_those_of_each_row_and_can_be_written_into_channel_planes():
    # The formula runs over passes of a few rows; a plane wider and taller than one pass must
    # give, bit for bit, what each of its rows gives alone, and match numpy.linalg.eigvalsh
    # (LAPACK) as above. `out` may be the channel planes of a channels-last array (a view).
    rng = np.random.default_rng(5)
    a = rng.normal(size=(6, 37, 1100)).astype(np.float32)
    entries = (a[0], a[1], a[2], a[3], a[4], a[5])
    planes = np.zeros((3, 37, 1100), np.float32)
    channels_last = np.moveaxis(planes, 0, -1)
    out = [channels_last[..., k] for k in range(3)]
    returned = symmetric_eigenvalues_3x3(*entries, out=out)
    assert all(r is o for r, o in zip(returned, out, strict=True))
    for row in (0, 17, 36):
        alone = symmetric_eigenvalues_3x3(*(e[row] for e in entries))
        for k in range(3):
            assert np.array_equal(planes[k, row], alone[k])
    m = np.stack(
        [
            np.stack([a[0], a[1], a[2]], -1),
            np.stack([a[1], a[3], a[4]], -1),
            np.stack([a[2], a[4], a[5]], -1),
        ],
        -2,
    ).astype(np.float64)
    expected = np.moveaxis(np.linalg.eigvalsh(m)[..., ::-1], -1, 0)
    scale = np.abs(expected).max(axis=0)
    assert np.all(np.abs(planes - expected) <= EIGENVALUE_TOLERANCE * scale)
    # an `out` whose rows cannot be viewed as one run would lose the values: refused
    volume = [rng.normal(size=(4, 10, 30)) for _ in range(6)]
    with pytest.raises(ValueError):
        symmetric_eigenvalues_3x3(*volume, out=[np.zeros((30, 10, 4), np.float32).T] * 3)


def test_z_reach_is_exactly_what_the_centre_depends_on():
    spacing = (20.0, 10.0, 10.0)
    reach = section_bank_z_reach(SIGMAS, spacing=spacing)
    # Gaussian kernel radius of scipy.ndimage (int(truncate σ + 0.5), truncate 4; scipy docs)
    # for the largest σ along z (3.0 × 10 / 20 = 1.5 sections), plus two for the second z
    # difference
    assert reach == int(4 * 1.5 + 0.5) + 2
    stack, r = _stack(spacing, extra=1, shape=(24, 24))
    base = section_filter_bank_3d(stack, sigmas=SIGMAS, spacing=spacing)
    for side in (-1, 1):
        beyond = stack.copy()
        beyond[r + side * (reach + 1)] += 50
        np.testing.assert_array_equal(
            section_filter_bank_3d(beyond, sigmas=SIGMAS, spacing=spacing), base
        )
        inside = stack.copy()
        inside[r + side * reach] += 50
        changed = section_filter_bank_3d(inside, sigmas=SIGMAS, spacing=spacing)
        assert np.abs(changed - base).max() > 1e-3


def test_in_plane_halo_of_feature_radius_is_enough():
    # Block-wise use: a caller passes feature_radius(sigmas) pixels of halo in plane and crops
    # it; pixels at least that far from the border must not depend on the border's values. The
    # in-plane σ are σ * min(spacing) / spacing[axis] <= σ, so the 2D bound holds.
    spacing = (9.0, 10.0, 11.0)
    stack, r = _stack(spacing, shape=(16, 2 * feature_radius(SIGMAS) + 4), seed=3)
    base = section_filter_bank_3d(stack, sigmas=SIGMAS, spacing=spacing)
    edited = stack.copy()
    edited[:, :, 0] += 100
    edited[:, :, -1] -= 100
    changed = section_filter_bank_3d(edited, sigmas=SIGMAS, spacing=spacing)
    core = slice(feature_radius(SIGMAS), -feature_radius(SIGMAS))
    np.testing.assert_array_equal(changed[:, core], base[:, core])
    assert np.abs(changed - base).max() > 1  # the border itself did change


def test_bad_input_is_one_line():
    spacing = (10, 10, 10)
    reach = section_bank_z_reach((1.0,), spacing=spacing)
    good = np.zeros((2 * reach + 1, 8, 8), np.uint8)
    assert section_filter_bank_3d(good, sigmas=(1.0,), spacing=spacing).dtype == np.float32
    with pytest.raises(
        TesseraInputError,
        match=r"^stack must be 3D \(sections, rows, columns\), got shape \(13, 8\)$",
    ) as error:
        section_filter_bank_3d(good[:, 0], sigmas=(1.0,), spacing=spacing)
    assert "\n" not in str(error.value)
    with pytest.raises(TesseraInputError, match=r"^stack is empty, got shape \(0, 8, 8\)$"):
        section_filter_bank_3d(good[:0], sigmas=(1.0,), spacing=spacing)
    with pytest.raises(
        TesseraInputError,
        match=r"^stack must hold an odd number of sections \(the centre and r on each side\), "
        f"got {2 * reach}$",
    ):
        section_filter_bank_3d(good[1:], sigmas=(1.0,), spacing=spacing)
    with pytest.raises(
        TesseraInputError,
        match=f"^stack needs at least {reach} sections on each side of its centre for sigmas "
        rf"\(1.0,\) at spacing \(10.0, 10.0, 10.0\), got {reach - 1}$",
    ):
        section_filter_bank_3d(good[1:-1], sigmas=(1.0,), spacing=spacing)
    with pytest.raises(TesseraInputError, match="^stack must hold numbers, got dtype bool$"):
        section_filter_bank_3d(good.astype(bool), sigmas=(1.0,), spacing=spacing)
    # spacing and sigmas are checked by their owners (tessera.spacing, the filter bank)
    with pytest.raises(TesseraInputError, match="spacing values must be positive and finite"):
        section_filter_bank_3d(good, sigmas=(1.0,), spacing=(10, 0, 10))
    with pytest.raises(TesseraInputError, match="spacing must have one value per axis"):
        section_bank_z_reach((1.0,), spacing=(10, 10))
    with pytest.raises(TesseraInputError, match="sigmas must be strictly increasing"):
        section_filter_bank_3d(good, sigmas=(2.0, 1.0), spacing=spacing)


@pytest.mark.parametrize("spacing", SPACINGS, ids=["anisotropic", "near-isotropic"])
def test_a_core_inside_a_halo_has_the_features_of_the_whole_plane_cropped(spacing):
    # Each scale is filtered over only the part of the halo it reaches, and the channels other
    # than the structure tensor over the core only: every channel must be the crop of filtering
    # the whole plane, to the bit (the in-plane Gaussian is exact under translation,
    # tests/test_smoothing.py). A halo of feature_radius, as prediction passes it.
    halo = feature_radius(SIGMAS) + 1
    stack, _ = _stack(spacing, shape=(20 + 2 * halo, 24 + 2 * halo), seed=4)
    whole = section_filter_bank_3d(stack, sigmas=SIGMAS, spacing=spacing)
    core = section_filter_bank_3d(stack, sigmas=SIGMAS, spacing=spacing, halo=halo)
    assert core.shape == (20, 24, len(feature_names(SIGMAS, ndim=3)))
    np.testing.assert_array_equal(core, whole[halo:-halo, halo:-halo])
    with pytest.raises(TesseraInputError, match="leaves no core"):
        section_filter_bank_3d(stack, sigmas=SIGMAS, spacing=spacing, halo=10 + halo + 12)


@pytest.mark.parametrize("spacing", SPACINGS, ids=["anisotropic", "near-isotropic"])
def test_sums_along_z_made_a_few_rows_at_a_time_equal_those_of_the_whole_plane(
    spacing, monkeypatch
):
    # The sums along z of every σ are one matrix product per band of rows (zero weights beyond
    # each σ's reach). Bands of 3 rows, the last one short, must give the features of one band
    # over the whole plane within float32 rounding of the sums: the tolerance of the first test
    # here, and for the structure tensor (products of gradients) 1e-4 of the channel's largest
    # value. A band read from the wrong rows would miss by about the values themselves.
    stack, _ = _stack(spacing, shape=(37, 40), seed=5)
    whole = section_filter_bank_3d(stack, sigmas=SIGMAS, spacing=spacing)
    monkeypatch.setattr(section_features, "_CHUNK_VALUES", 3 * stack.shape[0] * 40 + 1)
    banded = section_filter_bank_3d(stack, sigmas=SIGMAS, spacing=spacing)
    top = float(np.abs(stack).max())
    for k, name in enumerate(feature_names(SIGMAS, ndim=3)):
        if name.startswith("structure"):
            tolerance = 1e-4 * float(np.abs(whole[..., k]).max())
        else:
            tolerance = 8 * EPS32 * top * max(1.0, _sigma_of(name) ** 2)
        np.testing.assert_allclose(
            banded[..., k], whole[..., k], rtol=0, atol=tolerance, err_msg=name
        )
