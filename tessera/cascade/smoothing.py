"""Gaussian smoothing with mirrored edges: the one Gaussian of the cascade's filter banks.

The filter banks spend most of their time here, so the in-plane passes run on OpenCV's SIMD
separable filter, about 3x faster than ``scipy.ndimage.gaussian_filter`` on these scales, and
equal to it within float32 rounding (about 1e-4 grey levels on a 0-255 image: OpenCV sums in
float32, scipy in float64). The z pass of a volume stays with scipy.

Block-wise prediction relies on two exact properties of the smoothing: a pixel's value does not
depend on where the image starts (translation), and smoothing a mirrored image gives the mirror
of the smoothed image. OpenCV's column filter adds the two pixels a symmetric kernel weighs
equally before multiplying, so it is exact under mirroring along its axis; but the columns of
a row's tail, past the last full SIMD step, take a scalar path that rounds differently. So both
axes are smoothed as columns (the second pass on the transposed image) in arrays padded to a
width of whole SIMD steps (:data:`_LANES`); the padding is cut off after each pass.
"""

import math

import cv2
import numpy as np
from scipy import ndimage

from tessera.errors import TesseraInputError

TRUNCATE = 4.0  # kernel radius int(TRUNCATE σ + 0.5), as scipy.ndimage.gaussian_filter
# A multiple of every SIMD step of OpenCV's column filter (4 to 64 float32 lanes per loop).
_LANES = 64
_IDENTITY = np.ones(1, np.float32)

# Jobs and benchmarks are parallel by processes: OpenCV's own thread pool would only compete
# for the cores a job was given.
cv2.setNumThreads(1)


def kernel_radius(sigma):
    """Radius in pixels of the Gaussian kernel of `sigma` (0 for σ = 0).

    Examples
    --------
    >>> kernel_radius(1.6), kernel_radius(0.0)
    (6, 0)
    """
    return int(TRUNCATE * float(sigma) + 0.5)


def gaussian_weights(sigma):
    """The normalised 1D kernel of `sigma` (float64, length 2 r + 1 with r = kernel_radius).

    The same weights as ``scipy.ndimage.gaussian_filter`` uses for ``truncate=4``.

    Examples
    --------
    >>> w = gaussian_weights(0.7)
    >>> w.size, round(float(w.sum()), 12), int(w.argmax())
    (7, 1.0, 3)
    """
    radius = kernel_radius(sigma)
    if sigma <= 0:
        return np.ones(1)
    x = np.arange(-radius, radius + 1, dtype=np.float64)
    w = np.exp(-0.5 * (x / sigma) ** 2)
    return w / w.sum()


def _padded(side):
    return -(-side // _LANES) * _LANES


def _smooth_columns(rows, sigma):
    """Smooth the C-contiguous 2D float32 array `rows` along axis 0, in place."""
    if sigma > 0:
        kernel = gaussian_weights(sigma).astype(np.float32)
        cv2.sepFilter2D(rows, -1, _IDENTITY, kernel, dst=rows, borderType=cv2.BORDER_REFLECT)


def _smooth_plane(plane, sigma_y, sigma_x, times=None):
    """`plane` (times `times`, when given) smoothed along y, then along x as the columns of its
    transpose (module notes).

    Both sides are padded to whole SIMD steps once, so after the transpose the x pass also
    runs on whole steps; the padding's rows are never inside a pass (only its columns are,
    which a column filter keeps apart)."""
    h, w = plane.shape
    buffer = np.empty((_padded(h), _padded(w)), np.float32)
    # only the padding is zeroed: the plane's own part is written over at once
    buffer[h:] = 0
    buffer[:h, w:] = 0
    if times is None:
        buffer[:h, :w] = plane
    else:  # the product made where it is smoothed, not in an array of its own first
        np.multiply(plane, times, out=buffer[:h, :w])
    _smooth_columns(buffer[:h], sigma_y)
    if sigma_x <= 0:
        return buffer[:h, :w].copy()
    turned = cv2.transpose(buffer)
    del buffer
    _smooth_columns(turned[:w], sigma_x)
    return cv2.transpose(turned[:w])[:h]


def gaussian_smooth(image, sigma, *, times=None):
    """`image` smoothed by a Gaussian of `sigma` pixels per axis, edges mirrored.

    Parameters
    ----------
    image : (M, N) or (P, M, N) ndarray
        Any real dtype; smoothed in float32.
    sigma : float or sequence of float
        σ per axis (z y x), or one σ for all; 0 leaves an axis alone.
    times : ndarray, optional
        Smooth the product ``image * times`` (float32, same shape), as the structure tensor
        does with gradients; a 2D product is made in the smoothing's own buffer.

    Returns
    -------
    ndarray of float32
        The shape of `image`. Equal to ``scipy.ndimage.gaussian_filter(image, sigma,
        mode="reflect", truncate=4)`` within float32 rounding.

    Examples
    --------
    >>> from scipy import ndimage
    >>> image = np.random.default_rng(0).random((40, 50)).astype(np.float32) * 255
    >>> ours = gaussian_smooth(image, 2.5)
    >>> reference = ndimage.gaussian_filter(image, 2.5, mode="reflect", truncate=4.0)
    >>> bool(np.abs(ours - reference).max() < 1e-3)
    True
    """
    data = np.asarray(image, dtype=np.float32)
    if times is not None:
        times = np.asarray(times, dtype=np.float32)
        if times.shape != data.shape:
            raise TesseraInputError(f"times must have the shape {data.shape}, got {times.shape}")
    if data.ndim not in (2, 3) or data.size == 0:
        raise TesseraInputError(f"can only smooth a non-empty 2D or 3D image, got {data.shape}")
    sigmas = [float(sigma)] * data.ndim if np.isscalar(sigma) else [float(s) for s in sigma]
    if len(sigmas) != data.ndim or any(not math.isfinite(s) or s < 0 for s in sigmas):
        raise TesseraInputError(f"sigma must be {data.ndim} numbers >= 0, got {sigma!r}")
    if data.ndim == 2:
        return _smooth_plane(data, *sigmas, times=times)
    if times is not None:
        data = data * times
    if sigmas[0] > 0:
        data = ndimage.gaussian_filter1d(data, sigmas[0], axis=0, mode="reflect", truncate=TRUNCATE)
    return np.stack([_smooth_plane(plane, *sigmas[1:]) for plane in data])
