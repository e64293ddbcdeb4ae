"""Translation between two sections by phase correlation."""

import numpy as np
import scipy.fft

from tessera.errors import TesseraInputError
from tessera.section_qc._checks import as_section, check_finite, check_float, check_int

__all__ = ["field_shift", "phase_shift"]

# Smallest tile side (pixels) that :func:`field_shift` measures on. A Hann-windowed tile keeps
# shared detail mostly within its central half, so a tile measures shifts up to about a quarter
# of its side reliably; below 64 px that is under the tens of pixels a jump of a section is
# judged at, and the whole image is measured once instead.
_MIN_TILE_PX = 64

#: Tiles whose shift lies within this many pixels of the median (both components) agree with
#: it. Sections that share detail put most tiles' peaks within a few pixels of each other (on the
#: open VNC ssTEM stack, 50 nm apart, at least 4 of 9 tiles within 5 px); sections that share
#: none put each tile's peak anywhere in hundreds of pixels.
AGREE_PX = 5.0


def _fast_side(n):
    """The largest side <= `n` whose Fourier transform is fast (a product of small primes): a
    tile of a prime side costs several times more to transform.

    Examples
    --------
    >>> _fast_side(307), _fast_side(256)
    (300, 256)
    """
    while scipy.fft.next_fast_len(n, real=True) != n:
        n -= 1
    return n


def _signed(index, size):
    """Map a circular index in [0, size) to the signed offset in (-size/2, size/2]."""
    return index - size if index > size // 2 else index


def phase_shift(reference, moving, *, upsample=1, window=False):
    """Translation that registers `moving` onto `reference`, by phase correlation.

    Parameters
    ----------
    reference, moving : (M, N) array_like of int or float
        Two images of the same shape, e.g. the same centred crop of neighbouring sections.
    upsample : int, optional
        Sub-pixel resolution: the peak is located to within ``1 / upsample`` pixel (>= 1;
        1 gives whole pixels).
    window : bool, optional
        If True, subtract each image's mean and taper it with a separable Hann window before
        the transform, so that the jump between opposite edges of a crop (which is the same in
        both images and so pulls the peak towards zero shift) is suppressed. Use it for crops
        of a larger field; leave it off for images that really are periodic.

    Returns
    -------
    dy, dx : float
        Shift along rows and columns. Translating `moving` by ``(dy, dx)`` (for example with
        :func:`scipy.ndimage.shift`) aligns it with `reference`; so if `moving` is `reference`
        moved down by 3 rows, ``dy == -3``. Values lie in ``(-M/2, M/2]`` and ``(-N/2, N/2]``.

    Notes
    -----
    The cross-power spectrum ``F_ref * conj(F_mov)`` is divided by its magnitude, which keeps
    only the phase difference; its inverse transform is a sharp peak at the displacement
    (Kuglin & Hines, 1975). Indices past half the image size wrap around to negative shifts.
    With ``upsample > 1`` the correlation is then evaluated on a finer grid within one pixel
    of the peak by a direct (matrix) discrete Fourier transform, which needs memory of order
    ``upsample * (M + N)`` beyond the spectra instead of an upsampled image. Images are
    treated as periodic, so crops of an overlapping field work as long as the shift is a
    small part of the crop.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> ref = rng.random((64, 64))
    >>> phase_shift(ref, np.roll(ref, (3, -5), axis=(0, 1)))
    (-3.0, 5.0)
    """
    ref = as_section(reference, "reference")
    mov = as_section(moving, "moving")
    if ref.shape != mov.shape:
        raise TesseraInputError(
            f"reference and moving must have the same shape, got {ref.shape} and {mov.shape}"
        )
    upsample = check_int(upsample, "upsample", minimum=1)
    ref = np.asarray(ref, dtype=np.float64)
    mov = np.asarray(mov, dtype=np.float64)
    check_finite(ref, "reference")
    check_finite(mov, "moving")
    if not isinstance(window, (bool, np.bool_)):
        raise TesseraInputError(f"window must be True or False, got {window!r}")
    if window:
        taper = np.outer(np.hanning(ref.shape[0]), np.hanning(ref.shape[1]))
        ref = (ref - ref.mean()) * taper
        mov = (mov - mov.mean()) * taper

    # real images: the half spectrum holds everything (Hermitian symmetry), at half the cost;
    # the fine grid below needs the whole one
    half = upsample == 1
    cross = (
        scipy.fft.rfft2(ref) * np.conj(scipy.fft.rfft2(mov))
        if half
        else scipy.fft.fft2(ref) * np.conj(scipy.fft.fft2(mov))
    )
    magnitude = np.abs(cross)
    peak = float(magnitude.max())
    if peak == 0.0:
        return 0.0, 0.0  # an image without any signal: no evidence of a shift
    cross /= np.maximum(magnitude, np.finfo(np.float64).eps * peak)
    corr = scipy.fft.irfft2(cross, s=ref.shape) if half else scipy.fft.ifft2(cross).real
    iy, ix = np.unravel_index(int(np.argmax(corr)), corr.shape)
    dy = float(_signed(int(iy), corr.shape[0]))
    dx = float(_signed(int(ix), corr.shape[1]))
    if upsample == 1:
        return dy, dx

    # evaluate the correlation on a fine grid around the whole-pixel peak
    steps = np.arange(-upsample, upsample + 1) / upsample
    ty, tx = dy + steps, dx + steps
    fy = np.fft.fftfreq(corr.shape[0]) * corr.shape[0]
    fx = np.fft.fftfreq(corr.shape[1]) * corr.shape[1]
    ey = np.exp(2j * np.pi * np.outer(ty, fy) / corr.shape[0])
    ex = np.exp(2j * np.pi * np.outer(fx, tx) / corr.shape[1])
    fine = (ey @ cross @ ex).real
    ky, kx = np.unravel_index(int(np.argmax(fine)), fine.shape)
    return float(ty[ky]), float(tx[kx])


def field_shift(reference, moving, *, tiles=3, tile_fraction=0.6, return_agreement=False):
    """Translation of the whole field between two sections: the median over overlapping tiles.

    Parameters
    ----------
    reference, moving : (M, N) array_like of int or float
        Two images of the same shape, e.g. the same centred crop of neighbouring sections.
    tiles : int, optional
        Tiles per side (>= 1); ``tiles ** 2`` tiles in all, spread evenly from edge to edge.
        1 measures the whole image once.
    tile_fraction : float, optional
        Side of a tile as a fraction of the image's side, in (0, 1], rounded down to a side
        whose Fourier transform is fast. Tiles overlap when ``tiles * tile_fraction > 1``.
    return_agreement : bool, optional
        Also return the agreement of the tiles.

    Returns
    -------
    dy, dx : float
        Medians, component by component, of :func:`phase_shift` (with `window`) over the tiles;
        same sign convention as :func:`phase_shift`.
    agreement : float
        With `return_agreement`: the fraction of tiles whose shift lies within
        :data:`AGREE_PX` pixels of the median in both components (1.0 when the image is
        measured once). Near 1 when the sections share detail; low when they share none
        (nearly featureless or unrelated sections), where the median is no measurement.

    Notes
    -----
    A section displaced as a whole moves every part of the field by the same vector, so every
    tile reports it. A single strong structure that changes from one section to the next
    (a membrane cut at a shallow angle, which sweeps sideways through the stack) dominates the
    phase correlation of the whole image, whose normalisation weighs a long straight edge
    heavily; it moves only the tiles it lies in, and the median over the tiles ignores it
    while fewer than half of them are affected. Larger tiles keep more shared detail (and so
    measure larger shifts reliably), more tiles outvote more local changes; 3 x 3 tiles of
    0.6 of the side (each twice the linear size of a tile of a plain 3 x 3 split) balance the
    two. Tiles shorter than 64 pixels on a side would miss shifts of the size that matter (a
    windowed tile measures about a quarter of its side reliably): then the whole image is
    measured once instead.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> ref = rng.random((128, 128))
    >>> field_shift(ref, np.roll(ref, (3, -5), axis=(0, 1)))
    (-3.0, 5.0)
    >>> field_shift(ref, np.roll(ref, (3, -5), axis=(0, 1)), return_agreement=True)[2]
    1.0
    """
    ref = as_section(reference, "reference")
    mov = as_section(moving, "moving")
    if ref.shape != mov.shape:
        raise TesseraInputError(
            f"reference and moving must have the same shape, got {ref.shape} and {mov.shape}"
        )
    tiles = check_int(tiles, "tiles", minimum=1)
    tile_fraction = check_float(tile_fraction, "tile_fraction", low=0.0, high=1.0, low_open=True)
    sides = [_fast_side(max(1, int(round(n * tile_fraction)))) for n in ref.shape]
    if tiles == 1 or min(sides) < _MIN_TILE_PX:
        dy, dx = phase_shift(ref, mov, window=True)
        return (dy, dx, 1.0) if return_agreement else (dy, dx)
    starts = [
        np.linspace(0, n - s, tiles).round().astype(int)
        for n, s in zip(ref.shape, sides, strict=True)
    ]
    found = np.array(
        [
            phase_shift(
                ref[y : y + sides[0], x : x + sides[1]],
                mov[y : y + sides[0], x : x + sides[1]],
                window=True,
            )
            for y in starts[0]
            for x in starts[1]
        ]
    )
    dy, dx = float(np.median(found[:, 0])), float(np.median(found[:, 1]))
    if not return_agreement:
        return dy, dx
    close = np.abs(found - [dy, dx]).max(axis=1) <= AGREE_PX
    return dy, dx, float(np.mean(close))
