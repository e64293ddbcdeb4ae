"""Gaussian-derivative filter bank for pixel classification.

For every scale σ the bank holds: the smoothed intensity, the gradient magnitude, the Laplacian
of Gaussian, the difference of Gaussians to the next scale, the two Hessian eigenvalues and the
two structure-tensor eigenvalues. Every feature is invariant to mirroring the image, so features
of a mirror-padded image are the mirror of the features: that is what makes block-wise
prediction with a mirrored border exact.

Sections of anisotropic stacks (serial-section TEM, SBEM) are filtered in 2D. Near-isotropic
volumes can be filtered in 3D with σ scaled per axis by the voxel spacing (one σ in nm of the
finest axis). Output is float32, channels last; edges are mirrored, never zero-padded.
"""

import math

import numpy as np

from tessera.cascade.smoothing import gaussian_smooth, kernel_radius
from tessera.errors import TesseraInputError
from tessera.spacing import normalize_spacing

# In 2D the coarser levels' maps carry the wide context, so the finest level stops at σ 7: a σ
# of 10 there cost a fifth of prediction and gave no held-out gain (README, accuracy section).
DEFAULT_SIGMAS = (0.7, 1.6, 3.5, 7.0)
# In 3D the coarser levels stay 2D, so the finest level's bank is the only wide context across
# sections: it keeps σ 10 (without it, a FIB-SEM-like study split more organelles in two).
DEFAULT_SIGMAS_3D = (0.7, 1.6, 3.5, 5.0, 10.0)


def default_sigmas(dims):
    """The finest level's filter-bank scales a cascade of `dims` (2 or 3) uses by default.

    Examples
    --------
    >>> default_sigmas(2), default_sigmas(3)
    ((0.7, 1.6, 3.5, 7.0), (0.7, 1.6, 3.5, 5.0, 10.0))
    """
    return DEFAULT_SIGMAS_3D if dims == 3 else DEFAULT_SIGMAS


def _check_sigmas(sigmas):
    try:
        values = tuple(float(s) for s in sigmas)
    except (TypeError, ValueError):
        raise TesseraInputError(f"sigmas must be numbers, got {sigmas!r}") from None
    if not values or any(not math.isfinite(s) or s <= 0 for s in values):
        raise TesseraInputError(f"sigmas must be positive and finite, got {sigmas!r}")
    if list(values) != sorted(set(values)):
        raise TesseraInputError(f"sigmas must be strictly increasing, got {sigmas!r}")
    return values


def feature_names(sigmas=DEFAULT_SIGMAS, *, ndim=2):
    """Names of the channels `filter_bank` returns, in order.

    Examples
    --------
    >>> feature_names((1.0,))
    ['raw', 'smooth_s1', 'gradient_s1', 'log_s1', 'hessian0_s1', 'hessian1_s1', 'structure0_s1', 'structure1_s1']
    """
    sigmas = _check_sigmas(sigmas)
    names = ["raw"]
    for i, s in enumerate(sigmas):
        tag = f"s{s:g}"
        names += [f"smooth_{tag}", f"gradient_{tag}", f"log_{tag}"]
        if i + 1 < len(sigmas):
            names.append(f"dog_{tag}")
        names += [f"hessian{k}_{tag}" for k in range(ndim)]
        names += [f"structure{k}_{tag}" for k in range(ndim)]
    return names


def feature_radius(sigmas=DEFAULT_SIGMAS):
    """Pixels of context a feature at one pixel depends on (along any axis, finest axis in 3D).

    Gaussian kernels reach ``int(4 σ + 0.5)``; the structure tensor smooths derivatives of the
    σ-smoothed image again at σ, and the finite differences add one pixel per order.

    Examples
    --------
    >>> feature_radius((1.0, 2.0))
    20
    """
    return _scale_reach(max(_check_sigmas(sigmas)), [1.0])[0]


class _ChannelWriter:
    """Writes channels one by one into the last axis of a preallocated array."""

    def __init__(self, out):
        self.out, self.count = out, 0

    def append(self, channel):
        self.out[..., self.count] = channel
        self.count += 1

    def extend(self, channels):
        for channel in channels:
            self.append(channel)

    def take(self):
        """The next channel's array, to be written in place (``out=``)."""
        self.count += 1
        return self.out[..., self.count - 1]


def _eigvals_sym2(a, b, c, *, scale=None, out=None):
    """Eigenvalues (descending) of [[a, b], [b, c]] per pixel, times `scale` when given, written
    into `out` (two arrays) when given."""
    mean = np.add(a, c)
    mean *= np.float32(0.5)
    root = np.subtract(a, c)
    root *= root
    root *= np.float32(0.25)
    root += b * b
    np.sqrt(root, out=root)
    first, second = out if out is not None else (np.empty_like(mean), np.empty_like(mean))
    np.add(mean, root, out=first)
    np.subtract(mean, root, out=second)
    if scale is not None:
        first *= scale
        second *= scale
    return first, second


def _eigvals_sym3(m):
    """Eigenvalues (descending) of symmetric 3 × 3 matrices given as 6 arrays (xx, xy, xz, yy, yz, zz)."""
    xx, xy, xz, yy, yz, zz = m
    full = np.stack(
        [np.stack([xx, xy, xz], -1), np.stack([xy, yy, yz], -1), np.stack([xz, yz, zz], -1)], -2
    )
    vals = np.linalg.eigvalsh(full.astype(np.float64))
    return [vals[..., k].astype(np.float32) for k in (2, 1, 0)]


def _derivatives(smoothed, steps, axes=None):
    """Central differences along `axes` (default: every axis) with mirrored edges: d/dx at the
    edge of a mirrored image is the mirror of the inside, which keeps every derived invariant
    exactly mirror-symmetric. Half-sample mirroring repeats the edge pixel, so the edge's
    difference is its neighbour minus itself."""
    grads = []
    for axis in range(smoothed.ndim) if axes is None else axes:
        n = smoothed.shape[axis]

        def part(start, stop, axis=axis):
            return tuple(
                slice(start, stop) if a == axis else slice(None) for a in range(smoothed.ndim)
            )

        d = np.empty_like(smoothed)
        if n == 1:
            d.fill(0)
        else:
            np.subtract(smoothed[part(2, None)], smoothed[part(None, -2)], out=d[part(1, -1)])
            np.subtract(smoothed[part(1, 2)], smoothed[part(0, 1)], out=d[part(0, 1)])
            np.subtract(
                smoothed[part(n - 1, n)], smoothed[part(n - 2, n - 1)], out=d[part(n - 1, n)]
            )
        d *= np.float32(0.5 / steps[axis])
        grads.append(d)
    return grads


def _check_image(image):
    image = np.asarray(image)
    if image.ndim not in (2, 3):
        raise TesseraInputError(f"image must be 2D or 3D, got shape {image.shape}")
    if image.size == 0:
        raise TesseraInputError("image is empty")
    if not (np.issubdtype(image.dtype, np.integer) or np.issubdtype(image.dtype, np.floating)):
        raise TesseraInputError(f"image must hold numbers, got dtype {image.dtype}")
    return image


def _mirror_padded(data, radius):
    """`data` mirrored by `radius` on every axis longer than 1, and the slices of its core."""
    # np.pad "symmetric" mirrors once; pad in rounds when the image is smaller than the radius.
    padded = data
    total = [0] * data.ndim
    while any(t < radius and n > 1 for t, n in zip(total, data.shape)):
        step = [
            min(radius - t, m) if n > 1 else 0 for t, m, n in zip(total, padded.shape, data.shape)
        ]
        padded = np.pad(padded, [(k, k) for k in step], mode="symmetric")
        total = [t + k for t, k in zip(total, step)]
    return padded, tuple(slice(t, t + n) for t, n in zip(total, data.shape))


def _scale_reach(sigma, ratio):
    """Pixels per axis that the channels of one scale depend on: Gaussian kernels reach
    ``int(4 σ + 0.5)``, the structure tensor smooths derivatives of the σ-smoothed image again
    at σ, and the finite differences add one pixel per order."""
    return [2 * kernel_radius(sigma * r) + 4 for r in ratio]


def _scale_regions(sigmas, ratio, halo, core_shape):
    """Per scale, the pixels of a `halo` around a core of `core_shape` it reaches on each axis
    (at most `halo`), and the slices of the image (core plus that halo) it is filtered over."""
    reaches = [[min(halo, k) for k in _scale_reach(s, ratio)] for s in sigmas]
    regions = [
        tuple(slice(halo - k, halo + n + k) for k, n in zip(r, core_shape, strict=True))
        for r in reaches
    ]
    return reaches, regions


def _following(smoothed, reaches, i):
    """Scale i + 1's smoothed image cropped to scale i's region (it reaches as far or further);
    None for the last scale."""
    if i + 1 >= len(smoothed):
        return None
    step = [b - a for a, b in zip(reaches[i], reaches[i + 1], strict=True)]
    return smoothed[i + 1][
        tuple(slice(d, d + n) for d, n in zip(step, smoothed[i].shape, strict=True))
    ]


def _context_slices(context, shape):
    """Slices of an array of `shape` that holds a core and `context` pixels per axis around it:
    the core; the core with one pixel around it (where second derivatives are taken); and the
    core within that."""
    near = [max(k - 1, 0) for k in context]
    core = tuple(slice(k, n - k) for k, n in zip(context, shape, strict=True))
    around = tuple(slice(m, n - m) for m, n in zip(near, shape, strict=True))
    cut = tuple(slice(k - m, n - k - m) for k, m, n in zip(context, near, shape, strict=True))
    return core, around, cut


def _scale_channels(channels, g, following, s, ratio, steps, context=None):
    """Append the channels of one scale: `g` is the image smoothed at σ = `s`, `following` at
    the next σ (None for the last scale), both over the core and `context` pixels per axis
    around it (none by default). The channels are those of the core; only the structure tensor,
    which smooths the gradients again, is computed over the context too."""
    ndim = g.ndim
    # second derivatives are taken one pixel around the core, then that pixel is cut off
    core, around, cut = _context_slices(context or [0] * ndim, g.shape)
    grads = _derivatives(g, steps)
    channels.append(g[core])
    magnitude = np.multiply(grads[0][core], grads[0][core], out=channels.take())
    for d in grads[1:]:
        magnitude += d[core] * d[core]
    np.sqrt(magnitude, out=magnitude)
    second = [[None] * ndim for _ in range(ndim)]
    for a in range(ndim):
        for b, d in zip(range(a, ndim), _derivatives(grads[a][around], steps, range(a, ndim))):
            second[a][b] = d[cut]
    # Scale-normalised (σ²) so responses are comparable across scales.
    norm = np.float32(s * s)
    laplacian = np.add(second[0][0], second[1][1], out=channels.take())
    for a in range(2, ndim):
        laplacian += second[a][a]
    laplacian *= norm
    if following is not None:
        np.subtract(g[core], following[core], out=channels.take())
    integ = [s * r for r in ratio]
    if ndim == 2:
        hessian = (channels.take(), channels.take())
        _eigvals_sym2(second[0][0], second[0][1], second[1][1], scale=norm, out=hessian)
        j = [
            gaussian_smooth(grads[a], integ, times=grads[b])[core]
            for a, b in ((0, 0), (0, 1), (1, 1))
        ]
        _eigvals_sym2(*j, out=(channels.take(), channels.take()))
    else:
        h = [second[0][0], second[0][1], second[0][2], second[1][1], second[1][2], second[2][2]]
        channels.extend(norm * e for e in _eigvals_sym3(h))
        pairs = [(0, 0), (0, 1), (0, 2), (1, 1), (1, 2), (2, 2)]
        j = [gaussian_smooth(grads[a], integ, times=grads[b])[core] for a, b in pairs]
        channels.extend(_eigvals_sym3(j))


def filter_bank(image, *, sigmas=DEFAULT_SIGMAS, spacing=None, mirror_edges=True, halo=0):
    """Stack of Gaussian-derivative features of a 2D section or a 3D volume.

    Parameters
    ----------
    image : (M, N) or (P, M, N) ndarray
        Grey values (any real dtype; computed in float32).
    sigmas : sequence of float, optional
        Increasing scales in pixels of the finest axis.
    spacing : sequence of float, optional
        Voxel size per axis (3D only): σ along each axis is ``σ * min(spacing) / spacing[axis]``,
        so the filters are round in physical space. Ignored for 2D.
    mirror_edges : bool, optional
        Pad the image by mirroring (half-sample symmetric) by :func:`feature_radius` before
        filtering and crop afterwards, so that features at the edges equal those of the
        infinitely mirrored image. Callers that pass an image with a halo of at least that
        radius and keep only its core may switch it off to save time.
    halo : int, optional
        With ``mirror_edges=False``: pixels on each side of every axis that are context only;
        the features of the core inside them are returned. Each scale is filtered over the
        part of the halo it reaches, so a halo of :func:`feature_radius` costs the small
        scales only what they need. The core's features are the same numbers as those of the
        whole image, cropped.

    Returns
    -------
    (M, N, C) or (P, M, N, C) ndarray of float32
        Channels as named by :func:`feature_names` (axes shortened by 2 `halo`).

    Notes
    -----
    Derivatives are central differences of the Gaussian-smoothed image, a close and much cheaper
    stand-in for convolution with Gaussian derivative kernels at these scales. The structure
    tensor uses an integration scale equal to σ. Eigenvalues are sorted in descending order.

    Examples
    --------
    >>> f = filter_bank(np.zeros((16, 16), np.uint8), sigmas=(1.0, 2.0))
    >>> f.shape, f.dtype
    ((16, 16, 16), dtype('float32'))
    >>> image = np.random.default_rng(0).random((60, 60))
    >>> whole = filter_bank(image, sigmas=(1.0, 2.0), mirror_edges=False)
    >>> core = filter_bank(image, sigmas=(1.0, 2.0), mirror_edges=False, halo=20)
    >>> bool(np.array_equal(core, whole[20:40, 20:40]))
    True
    """
    image = _check_image(image)
    sigmas = _check_sigmas(sigmas)
    ndim = image.ndim
    if ndim == 3 and spacing is not None:
        spacing = normalize_spacing(spacing, 3)
        ratio = [min(spacing) / s for s in spacing]
    else:
        ratio = [1.0] * ndim
    steps = [1.0] * ndim
    data = image.astype(np.float32)
    if mirror_edges:
        padded, core = _mirror_padded(data, feature_radius(sigmas))
        features = filter_bank(padded, sigmas=sigmas, spacing=spacing, mirror_edges=False)
        return np.ascontiguousarray(features[core])
    halo = int(halo)
    if halo < 0 or any(n <= 2 * halo for n in data.shape):
        raise TesseraInputError(f"a halo of {halo} px leaves no core of an image {data.shape}")
    # each channel goes straight into the output as it is made (no list of arrays, no stacking
    # copy), into a plane of its own: the channels-last result is a view of channel planes, so
    # writing a channel is one contiguous copy
    names = feature_names(sigmas, ndim=ndim)
    shape = tuple(n - 2 * halo for n in data.shape)
    planes = np.empty((len(names),) + shape, dtype=np.float32)
    out = np.moveaxis(planes, 0, -1)
    channels = _ChannelWriter(out)
    channels.append(data[tuple(slice(halo, halo + n) for n in shape)])
    # the part of the halo each scale reaches: its image, and how far in its core starts
    reaches, regions = _scale_regions(sigmas, ratio, halo, shape)
    smoothed_all = [
        gaussian_smooth(data[region], [s * q for q in ratio])
        for s, region in zip(sigmas, regions, strict=True)
    ]
    for i, s in enumerate(sigmas):
        following = _following(smoothed_all, reaches, i)
        _scale_channels(channels, smoothed_all[i], following, s, ratio, steps, context=reaches[i])
    return out


def neighbour_feature_names(sigmas=DEFAULT_SIGMAS, *, offset):
    """Names of the channels :func:`neighbour_features` returns for the section at `offset`."""
    sigmas = _check_sigmas(sigmas)
    names = [f"z{offset:+d}_raw"]
    for s in sigmas:
        names += [f"z{offset:+d}_smooth_s{s:g}", f"z{offset:+d}_log_s{s:g}"]
    return names


def neighbour_features(section, *, sigmas=DEFAULT_SIGMAS):
    """A lighter bank for neighbouring sections: raw, smoothed intensity and LoG per σ.

    In anisotropic stacks an organelle seen in one section usually continues in the next
    (sections are 25-70 nm apart, organelles hundreds of nm), so the neighbours' intensity
    around a pixel is strong evidence; edges are left to the centre section's full bank.
    No mirroring is done here: pass a section with a halo of :func:`feature_radius`.

    Returns
    -------
    (M, N, 1 + 2 len(sigmas)) ndarray of float32
        A view of channel planes (each channel contiguous), as :func:`filter_bank` returns.
    """
    section = np.asarray(section, dtype=np.float32)
    if section.ndim != 2:
        raise TesseraInputError(f"section must be 2D, got shape {section.shape}")
    sigmas = _check_sigmas(sigmas)
    channels = [section]
    for s in sigmas:
        g = gaussian_smooth(section, s)
        gy, gx = _derivatives(g, (1.0, 1.0))
        lap = _derivatives(gy, (1.0, 1.0))[0] + _derivatives(gx, (1.0, 1.0))[1]
        channels += [g, np.float32(s * s) * lap]
    # channel planes, as filter_bank stores them: a node multiplies them where they lie
    return np.moveaxis(np.stack(channels), 0, -1)
