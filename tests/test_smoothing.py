"""The cascade's Gaussian against scipy's, and the exact symmetries block-wise prediction needs."""

import numpy as np
import pytest
from scipy import ndimage

from tessera.cascade.smoothing import gaussian_smooth, gaussian_weights, kernel_radius
from tessera.errors import TesseraInputError

SIGMAS = (0.7, 1.6, 3.5, 5.0, 7.0, 10.0)  # the default filter-bank scales and others


def _image(shape, seed=0):
    rng = np.random.default_rng(seed)
    # smooth structure plus noise on a 0-255 scale, as an EM section
    base = ndimage.gaussian_filter(rng.random(shape), 3) * 255
    return (base + rng.normal(0, 10, shape)).astype(np.float32)


def _reference(image, sigma):
    # scipy.ndimage.gaussian_filter in float64 with the half-sample mirror ("reflect")
    return ndimage.gaussian_filter(image.astype(np.float64), sigma, mode="reflect", truncate=4.0)


@pytest.mark.parametrize("sigma", SIGMAS)
@pytest.mark.parametrize("shape", [(97, 130), (64, 64), (1, 40), (40, 1), (3, 2)])
def test_equals_scipy_within_float32_rounding(shape, sigma):
    image = _image(shape)
    ours = gaussian_smooth(image, sigma)
    assert ours.dtype == np.float32 and ours.shape == shape
    # float32 sums of a 0-255 image: a few ulps of 255 (ulp = 1.5e-5)
    np.testing.assert_allclose(ours, _reference(image, sigma), rtol=0, atol=3e-4)


@pytest.mark.parametrize("shape", [(97, 130), (6, 40, 50)])
def test_a_product_smoothed_in_place_equals_smoothing_the_product(shape):
    # The structure tensor smooths products of gradients; making the product in the smoothing's
    # own buffer must give the numbers of smoothing the float32 product, to the bit, and those
    # of scipy (float64) within float32 rounding.
    a, b = _image(shape, seed=2) / 16, _image(shape, seed=3) / 16
    product = a * b
    ours = gaussian_smooth(a, 2.5, times=b)
    np.testing.assert_array_equal(ours, gaussian_smooth(product, 2.5))
    np.testing.assert_allclose(ours, _reference(product, 2.5), rtol=0, atol=3e-4)
    with pytest.raises(TesseraInputError, match="times must have the shape"):
        gaussian_smooth(a, 2.5, times=b[1:])


def test_per_axis_sigma_and_volumes_equal_scipy():
    volume = _image((9, 40, 50), seed=1)
    for sigma in [(0.0, 2.0, 1.0), (1.5, 0.7, 3.5), (2.0, 0.0, 0.0)]:
        np.testing.assert_allclose(
            gaussian_smooth(volume, sigma), _reference(volume, sigma), rtol=0, atol=3e-4
        )
    plane = volume[0]
    np.testing.assert_allclose(
        gaussian_smooth(plane, (3.5, 0.7)), _reference(plane, (3.5, 0.7)), rtol=0, atol=3e-4
    )


def test_weights_are_scipys_kernel():
    # scipy.ndimage.gaussian_filter1d applied to a unit impulse returns its kernel
    for sigma in SIGMAS:
        radius = kernel_radius(sigma)
        impulse = np.zeros(2 * radius + 1)
        impulse[radius] = 1.0
        kernel = ndimage.gaussian_filter1d(impulse, sigma, mode="constant", truncate=4.0)
        np.testing.assert_allclose(gaussian_weights(sigma), kernel, rtol=1e-12, atol=1e-15)


@pytest.mark.parametrize("sigma", SIGMAS)
def test_smoothing_a_mirrored_image_is_the_mirror_bit_for_bit(sigma):
    # Block-wise prediction pads blocks at the volume's edge by mirroring; the features there
    # must be exactly the mirror of the features inside, along both axes.
    image = _image((70, 133), seed=2)
    smoothed = gaussian_smooth(image, sigma)
    for axis in (0, 1):
        flipped = gaussian_smooth(np.flip(image, axis), sigma)
        assert np.array_equal(np.flip(flipped, axis), smoothed)


@pytest.mark.parametrize("sigma", SIGMAS)
def test_a_pixel_does_not_depend_on_where_the_image_starts(sigma):
    # Translation: a window cut anywhere and smoothed gives, a kernel radius inside its edges,
    # the very bits of the whole image smoothed (what makes stitched blocks equal the whole).
    image = _image((120, 150), seed=3)
    whole = gaussian_smooth(image, sigma)
    r = kernel_radius(sigma)
    for y0, x0, h, w in [(1, 3, 90, 101), (5, 17, 70, 64), (13, 29, 77, 93)]:
        window = gaussian_smooth(image[y0 : y0 + h, x0 : x0 + w], sigma)
        inner = window[r : h - r, r : w - r]
        assert np.array_equal(inner, whole[y0 + r : y0 + h - r, x0 + r : x0 + w - r])


def test_bad_sigma_and_images_are_refused():
    with pytest.raises(TesseraInputError, match=r"sigma must be 2 numbers >= 0, got \(1.0,\)"):
        gaussian_smooth(np.zeros((4, 4)), (1.0,))
    with pytest.raises(TesseraInputError, match="sigma must be 2 numbers >= 0"):
        gaussian_smooth(np.zeros((4, 4)), -1.0)
    with pytest.raises(TesseraInputError, match="non-empty 2D or 3D image"):
        gaussian_smooth(np.zeros(4), 1.0)
