"""Filter bank: values against scipy / scikit-image and the analytic Gaussian blob."""

import numpy as np
import pytest
from scipy import ndimage
from skimage.feature import (
    hessian_matrix,
    hessian_matrix_eigvals,
    structure_tensor,
    structure_tensor_eigenvalues,
)

from tessera.cascade.features import DEFAULT_SIGMAS, feature_names, feature_radius, filter_bank
from tessera.errors import TesseraInputError


def _channel(features, name, sigmas):
    return features[..., feature_names(sigmas).index(name)]


def test_smoothed_intensity_equals_scipy_gaussian():
    image = np.random.default_rng(0).integers(0, 256, (64, 80)).astype(np.uint8)
    f = filter_bank(image, sigmas=(1.0, 3.0))
    # Reference: scipy.ndimage.gaussian_filter with mirrored ('reflect') edges.
    expected = ndimage.gaussian_filter(image.astype(np.float32), 3.0, mode="reflect")
    np.testing.assert_allclose(_channel(f, "smooth_s3", (1.0, 3.0)), expected, atol=1e-3)
    np.testing.assert_array_equal(_channel(f, "raw", (1.0, 3.0)), image.astype(np.float32))


def test_hessian_eigenvalues_of_gaussian_blob_match_analytic_values():
    # A Gaussian blob of width s smoothed at sigma is a Gaussian of width sqrt(s^2 + sigma^2) and
    # amplitude s^2 / (s^2 + sigma^2) (2D convolution of Gaussians). At its centre both Hessian
    # eigenvalues are -s^2 / (s^2 + sigma^2)^2; scale-normalised by sigma^2 here.
    s, sigma = 6.0, 2.0
    yy, xx = np.mgrid[-40:41, -40:41]
    blob = np.exp(-(yy**2 + xx**2) / (2 * s**2)).astype(np.float32)
    f = filter_bank(blob, sigmas=(sigma,))
    analytic = -(sigma**2) * s**2 / (s**2 + sigma**2) ** 2
    # Second derivatives are differences at a 2-px step: relative error about 4 / (4 (s^2 + sigma^2)),
    # 2.5 % here, so allow 4 %.
    for name in ("hessian0_s2", "hessian1_s2"):
        assert _channel(f, name, (sigma,))[40, 40] == pytest.approx(analytic, rel=0.04)
    # Laplacian of Gaussian = trace of the Hessian.
    assert _channel(f, "log_s2", (sigma,))[40, 40] == pytest.approx(2 * analytic, rel=0.04)


def test_hessian_and_structure_tensor_agree_with_skimage():
    rng = np.random.default_rng(1)
    image = ndimage.gaussian_filter(rng.normal(size=(96, 96)), 2.0).astype(np.float32) * 50
    sigma = 2.0
    f = filter_bank(image, sigmas=(sigma,))
    inner = (slice(10, -10), slice(10, -10))
    # Reference: skimage.feature.hessian_matrix (Gaussian smoothing then finite differences).
    ref = hessian_matrix_eigvals(
        hessian_matrix(
            image, sigma=sigma, order="rc", mode="reflect", use_gaussian_derivatives=False
        )
    )
    ours = np.stack([_channel(f, f"hessian{k}_s2", (sigma,)) for k in range(2)]) / sigma**2
    np.testing.assert_allclose(ours[(slice(None),) + inner], ref[(slice(None),) + inner], atol=1e-4)
    # Structure tensor: numpy's central-difference gradient of the sigma-smoothed image, products
    # smoothed at sigma by scipy, eigenvalues by skimage.feature.structure_tensor_eigenvalues.
    smoothed = ndimage.gaussian_filter(image, sigma, mode="reflect")
    gy, gx = np.gradient(smoothed)
    tensor = [
        ndimage.gaussian_filter(p, sigma, mode="reflect") for p in (gy * gy, gy * gx, gx * gx)
    ]
    st = structure_tensor_eigenvalues(tensor)
    ours_st = np.stack([_channel(f, f"structure{k}_s2", (sigma,)) for k in range(2)])
    scale = np.abs(st[(slice(None),) + inner]).max()
    assert np.abs(ours_st[(slice(None),) + inner] - st[(slice(None),) + inner]).max() < 1e-3 * scale
    # skimage's own structure_tensor differentiates with scipy.ndimage.sobel: [-1, 0, 1] along
    # the axis (twice a central difference) times [1, 2, 1] across it (sum 4), so its gradient is
    # 8 x ours and its tensor 64 x ours, up to the slight [1, 2, 1] / 4 smoothing across the axis
    # (scipy's documented Sobel kernel). Compared in value: within 5 % of the largest eigenvalue,
    # where a factor 2 or a sigma^2 scale-normalisation would be off by 100 % or more.
    sk = structure_tensor_eigenvalues(
        structure_tensor(smoothed, sigma=sigma, order="rc", mode="reflect")
    )
    sk_inner = sk[(slice(None),) + inner] / 64
    assert np.abs(ours_st[(slice(None),) + inner] - sk_inner).max() < 0.05 * sk_inner.max()


@pytest.mark.parametrize("axis", [0, 1])
def test_structure_tensor_equals_skimage_on_a_field_varying_along_one_axis(axis):
    # On an image that varies along one axis only, the [1, 2, 1] smoothing across the axis in
    # skimage.feature.structure_tensor (scipy.ndimage.sobel) changes nothing, so its tensor is
    # exactly 64 x ours (Sobel = 8 x the central difference, see above): checked here to float32
    # precision. The image given to skimage is the sigma-smoothed image (scipy.ndimage), since
    # skimage's function smooths only the products (integration scale sigma), as ours does.
    sigma = 2.0
    profile = ndimage.gaussian_filter1d(np.random.default_rng(5).normal(size=96), 2.0) * 50
    image = np.broadcast_to(np.expand_dims(profile, 1 - axis), (96, 96)).astype(np.float32)
    f = filter_bank(image, sigmas=(sigma,))
    smoothed = ndimage.gaussian_filter(image, sigma, mode="reflect")
    sk = structure_tensor_eigenvalues(
        structure_tensor(smoothed, sigma=sigma, order="rc", mode="reflect")
    )
    ours = np.stack([_channel(f, f"structure{k}_s2", (sigma,)) for k in range(2)])
    inner = (slice(None), slice(20, -20), slice(20, -20))
    assert sk[inner].max() > 10  # a real signal
    np.testing.assert_allclose(ours[inner], sk[inner] / 64, rtol=1e-4, atol=1e-4 * sk.max())


def test_linear_ramp_gradient_equals_its_slope():
    # Analytic: a Gaussian leaves a linear ramp f = a y + b x unchanged, so away from the edges
    # the gradient magnitude is sqrt(a^2 + b^2) and the structure tensor is the constant
    # [[a^2, ab], [ab, b^2]] with eigenvalues a^2 + b^2 and 0; Hessian and LoG vanish.
    a, b, sigma = 0.8, 0.3, 2.0
    yy, xx = np.mgrid[0:80, 0:90].astype(np.float32)
    f = filter_bank(a * yy + b * xx, sigmas=(sigma,))
    inner = (slice(20, -20), slice(20, -20))
    names = (sigma,)
    np.testing.assert_allclose(_channel(f, "gradient_s2", names)[inner], np.hypot(a, b), rtol=1e-4)
    np.testing.assert_allclose(_channel(f, "structure0_s2", names)[inner], a * a + b * b, rtol=1e-4)
    np.testing.assert_allclose(_channel(f, "structure1_s2", names)[inner], 0, atol=1e-4)
    np.testing.assert_allclose(_channel(f, "log_s2", names)[inner], 0, atol=1e-3)


def test_features_are_mirror_symmetric_at_edges():
    # Every channel is invariant to mirroring, so features of a mirror-padded image, cropped,
    # equal features of the image: the property block-wise prediction relies on.
    image = np.random.default_rng(2).integers(0, 256, (50, 70)).astype(np.uint8)
    radius = feature_radius()
    padded = np.pad(image, radius, mode="symmetric")
    np.testing.assert_allclose(
        filter_bank(padded)[radius:-radius, radius:-radius], filter_bank(image), atol=1e-3
    )


def test_block_interior_equals_whole_image():
    image = np.random.default_rng(3).integers(0, 256, (200, 220)).astype(np.uint8)
    r = feature_radius()
    whole = filter_bank(image)
    block = filter_bank(image[20:190, 30:200], mirror_edges=False)
    np.testing.assert_allclose(
        block[r:-r, r:-r], whole[20 + r : 190 - r, 30 + r : 200 - r], atol=1e-4
    )


def test_3d_spacing_scales_sigma_per_axis():
    # A volume that varies only along z: with spacing (40, 8, 8) sigma along z is 5x smaller in
    # voxels, so the z-smoothing equals scipy's gaussian_filter1d at sigma / 5.
    rng = np.random.default_rng(4)
    column = rng.normal(size=30).astype(np.float32)
    volume = np.broadcast_to(column[:, None, None], (30, 12, 12)).copy()
    f = filter_bank(volume, sigmas=(5.0,), spacing=(40, 8, 8))
    expected = ndimage.gaussian_filter1d(column, 1.0, mode="reflect")
    np.testing.assert_allclose(_channel(f, "smooth_s5", (5.0,))[:, 6, 6], expected, atol=1e-4)
    assert f.shape == (30, 12, 12, len(feature_names((5.0,), ndim=3)))


def test_output_dtype_and_bad_input():
    assert filter_bank(np.zeros((8, 8), np.uint16), sigmas=(1.0,)).dtype == np.float32
    with pytest.raises(TesseraInputError, match="strictly increasing"):
        filter_bank(np.zeros((8, 8)), sigmas=(2.0, 1.0))
    with pytest.raises(TesseraInputError, match="2D or 3D"):
        filter_bank(np.zeros(8))
    with pytest.raises(TesseraInputError, match="positive"):
        filter_bank(np.zeros((8, 8)), sigmas=(0.0,))


def test_a_core_inside_a_halo_has_the_features_of_the_whole_image_cropped():
    # filter_bank(halo=) filters each scale over only the part of the halo it reaches and the
    # per-pixel channels over the core only; every channel must be the crop of filtering the
    # whole image, to the bit (the Gaussian is exact under translation, tests/test_smoothing.py).
    # Default scales, with the halo prediction passes (feature_radius + 1).
    halo = feature_radius(DEFAULT_SIGMAS) + 1
    image = np.random.default_rng(7).random((30 + 2 * halo, 41 + 2 * halo)).astype(np.float32)
    whole = filter_bank(image, mirror_edges=False)
    core = filter_bank(image, mirror_edges=False, halo=halo)
    assert core.shape == (30, 41, len(feature_names()))
    np.testing.assert_array_equal(core, whole[halo:-halo, halo:-halo])
    with pytest.raises(TesseraInputError, match="leaves no core"):
        filter_bank(image, mirror_edges=False, halo=halo + 15)
