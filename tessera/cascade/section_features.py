"""3D image features of one section, computed from the stack of sections around it.

For near-isotropic volumes (FIB-SEM) the features of a section should come from the volume, not
from the section alone. Filtering the whole stack in 3D only to keep its centre section wastes
almost all of the work, so :func:`section_filter_bank_3d` computes the centre section's 3D bank
directly. Gaussian smoothing is separable: for each σ, a few weighted sums of sections along z
(the z-smoothed centre plane, its central z difference and its second z difference, each one
combined weight vector) are filtered in plane, and every derivative the bank needs comes from
those three planes. Smoothed intensity, gradient magnitude, Laplacian, difference of Gaussians
and Hessian eigenvalues equal :func:`tessera.cascade.features.filter_bank` on the same stack at
its centre section, up to float32 rounding. The structure tensor is the one difference: its
gradient products are integrated in plane only (see :func:`section_filter_bank_3d`).

:func:`section_bank_z_reach` is the one place the z extent these features read is derived.
"""

import math

import numpy as np

from tessera.cascade.features import (
    DEFAULT_SIGMAS_3D,
    _ChannelWriter,
    _check_sigmas,
    _context_slices,
    _derivatives,
    _following,
    _scale_regions,
    feature_names,
)
from tessera.cascade.smoothing import gaussian_smooth, gaussian_weights, kernel_radius
from tessera.errors import TesseraInputError
from tessera.spacing import normalize_spacing

# The second z difference is a central difference of central differences: two sections beyond
# the Gaussian kernel's own radius.
_Z_DIFFERENCE_REACH = 2
# Sections × rows × columns converted to float32 at a time for the weighted sums along z: 4 MB
# that stay in cache while every σ's sums read them (fastest measured, against 0.3 M and 4 M)
_CHUNK_VALUES = 1_000_000
_UNIT_STEPS = (1.0, 1.0)
# Values per pass of the eigenvalue formula: large enough that numpy's per-call cost is small
# beside the work, small enough that its temporaries stay in cache (fastest measured)
_EIGEN_CHUNK = 131_072
#: Largest error of :func:`symmetric_eigenvalues_3x3`, relative to the largest eigenvalue
#: magnitude of each matrix (its Notes).
EIGENVALUE_TOLERANCE = 5e-4
_TINY = np.finfo(np.float32).tiny


def _axis_ratios(spacing):
    """σ per axis is ``σ * ratio[axis]`` (round filters in physical space, σ in finest-axis px)."""
    spacing = normalize_spacing(spacing, 3)
    finest = min(spacing)
    return tuple(finest / s for s in spacing)


def _reach(sigmas, ratios):
    return kernel_radius(max(sigmas) * ratios[0]) + _Z_DIFFERENCE_REACH


def section_bank_z_reach(sigmas=DEFAULT_SIGMAS_3D, *, spacing):
    """Sections on each side of the centre that :func:`section_filter_bank_3d` reads.

    The Gaussian kernel of the largest σ reaches ``int(4 σ_z + 0.5)`` sections along z, with
    ``σ_z = σ * min(spacing) / spacing[0]``; the second z difference reads two sections more.
    Sections beyond this reach do not change the features; every section within it does.

    Parameters
    ----------
    sigmas : sequence of float, optional
        Increasing scales in pixels of the finest axis.
    spacing : sequence of float
        Voxel size (z, y, x).

    Returns
    -------
    int

    Examples
    --------
    >>> section_bank_z_reach((1.0, 2.0), spacing=(10, 10, 10))
    10
    >>> section_bank_z_reach((1.0, 2.0), spacing=(20, 10, 10))
    6
    """
    return _reach(_check_sigmas(sigmas), _axis_ratios(spacing))


def symmetric_eigenvalues_3x3(a00, a01, a02, a11, a12, a22, *, out=None):
    """Eigenvalues, largest first, of symmetric 3 × 3 matrices given by their six entries.

    Closed form: the trigonometric solution of the characteristic cubic of the traceless,
    normalised matrix ``B = (A - q I) / p`` (``q`` the mean eigenvalue, ``p`` the root mean
    square deviation of the eigenvalues from ``q`` over 2): its eigenvalues are
    ``2 cos(φ + 2πk/3)`` with ``φ = arccos(det(B) / 2) / 3``. Computed and returned in float32;
    a matrix with three equal eigenvalues (``p = 0``) gives ``q`` three times.

    Parameters
    ----------
    a00, a01, a02, a11, a12, a22 : array_like
        The upper triangle, all of one shape (broadcast).
    out : sequence of 3 ndarray of float32, optional
        Arrays of the broadcast shape to write the eigenvalues into (channel planes, say).

    Returns
    -------
    list of 3 ndarray of float32
        Eigenvalues in descending order, each of the broadcast shape (`out` when given).

    Notes
    -----
    Accuracy: every eigenvalue lies within ``EIGENVALUE_TOLERANCE`` (5e-4) times the largest
    eigenvalue magnitude of its matrix from the exact one. The arccos is sensitive where two
    eigenvalues nearly coincide (``|det(B) / 2|`` near 1): a float32 rounding of its argument
    moves the angle by about its square root there, which bounds the error. Float64 would
    bring it to about 1e-8, at 2.6 times the cost of float32 for these features' largest
    share of work; a feature's relative error of 5e-4 is far below the noise of EM images.

    The formula runs over rows of about a hundred thousand values at a time in buffers that
    are reused, rather than over whole planes: its temporaries then stay in the processor's
    cache. Every operation and its order is the same either way, so the result is too.

    Examples
    --------
    >>> [float(e) for e in symmetric_eigenvalues_3x3(2.0, 1.0, 0.0, 2.0, 0.0, 3.0)]
    [3.0, 3.0, 1.0]
    """
    entries = np.broadcast_arrays(*(np.asarray(v) for v in (a00, a01, a02, a11, a12, a22)))
    shape = entries[0].shape
    if out is None:
        out = [np.empty(shape, dtype=np.float32) for _ in range(3)]
    if entries[0].size == 0:
        return list(out)
    width = shape[-1] if shape else 1
    rows_in = [e.reshape(-1, width) for e in entries]
    # views of `out` (a copy would take the values away with it: refused)
    rows_out = [np.reshape(o, (-1, width), copy=False) for o in out]
    step = min(max(1, _EIGEN_CHUNK // width), rows_in[0].shape[0])
    buffers = np.empty((11, step * width), dtype=np.float32)
    for start in range(0, rows_in[0].shape[0], step):
        stop = min(start + step, rows_in[0].shape[0])
        _eigenvalue_rows(
            [r[start:stop] for r in rows_in],
            [r[start:stop] for r in rows_out],
            buffers[:, : (stop - start) * width],
        )
    return list(out)


def _float32_rows(entry, buffer):
    """`entry` itself if it is float32, else its values converted into `buffer`."""
    if entry.dtype == np.float32:
        return entry
    buffer[...] = entry
    return buffer


def _eigenvalue_rows(entries, out, buffers):
    """The closed form of :func:`symmetric_eigenvalues_3x3` on a few rows, in `buffers`.

    Float32 entries are read where they lie and the eigenvalues are made in `out`; entries of
    another dtype are converted into the buffers first (the numbers are the same either way)."""
    n = entries[0].shape
    a00, a01, a02, a11, a12, a22, q, p, t, u, v = (b.reshape(n) for b in buffers)
    x00, x01, x02, x11, x12, x22 = (
        _float32_rows(entry, buffer)
        for buffer, entry in zip((a00, a01, a02, a11, a12, a22), entries, strict=True)
    )
    np.add(x00, x11, out=q)
    q += x22
    np.divide(q, 3.0, out=q)
    # the diagonal of A - qI
    b00 = np.subtract(x00, q, out=a00)
    b11 = np.subtract(x11, q, out=a11)
    b22 = np.subtract(x22, q, out=a22)
    # p = sqrt((b00² + b11² + b22² + 2 (a01² + a02² + a12²)) / 6)
    np.multiply(b00, b00, out=p)
    p += np.multiply(b11, b11, out=t)
    p += np.multiply(b22, b22, out=t)
    np.multiply(x01, x01, out=u)
    u += np.multiply(x02, x02, out=t)
    u += np.multiply(x12, x12, out=t)
    u *= 2.0
    p += u
    np.divide(p, 6.0, out=p)
    np.sqrt(p, out=p)
    # B = (A - qI) / p, its entries at most sqrt(6) in size, so nothing overflows; where p = 0
    # every entry of A - qI is 0 and stays 0 (the smallest normal float stands in for p)
    np.maximum(p, _TINY, out=t)
    np.divide(1.0, t, out=t)
    for entry in (b00, b11, b22):
        entry *= t
    np.multiply(x01, t, out=a01)
    np.multiply(x02, t, out=a02)
    np.multiply(x12, t, out=a12)
    # det(B) = b00 (b11 b22 - a12²) - a01 (a01 b22 - a12 a02) + a02 (a01 a12 - b11 a02)
    np.multiply(b11, b22, out=t)
    t -= np.multiply(a12, a12, out=u)
    t *= b00
    np.multiply(a01, b22, out=u)
    u -= np.multiply(a12, a02, out=v)
    u *= a01
    t -= u
    np.multiply(a01, a12, out=u)
    u -= np.multiply(b11, a02, out=v)
    u *= a02
    t += u
    # det(B) / 2 lies in [-1, 1]; rounding can step just outside it
    t *= 0.5
    np.clip(t, -1.0, 1.0, out=t)
    phi = np.arccos(t, out=t)
    np.divide(phi, 3.0, out=phi)
    largest, middle, smallest = out
    np.multiply(p, 2.0, out=largest)
    largest *= np.cos(phi, out=u)
    largest += q
    phi += 2.0 * math.pi / 3.0
    np.multiply(p, 2.0, out=smallest)
    smallest *= np.cos(phi, out=u)
    smallest += q
    # the trace fixes the middle one; clipped so that rounding never breaks the order (numpy's
    # clip as its definition, maximum then minimum: clip with array bounds is 3x slower)
    np.multiply(q, 3.0, out=middle)
    middle -= largest
    middle -= smallest
    np.maximum(middle, smallest, out=middle)
    np.minimum(middle, largest, out=middle)


def _z_weights(sigma_z):
    """(3, 2 k + 1) weights over sections -k..k (k = this σ's own z reach) giving the centre's
    z-smoothed plane, its central z difference and the central difference of that (the second
    z difference)."""
    w = gaussian_weights(sigma_z)
    radius = (w.size - 1) // 2
    reach = radius + _Z_DIFFERENCE_REACH

    def centred_at(offset):
        row = np.zeros(2 * reach + 1)
        start = reach + offset - radius
        row[start : start + w.size] = w
        return row

    smooth = centred_at(0)
    first = 0.5 * (centred_at(1) - centred_at(-1))
    second = 0.25 * (centred_at(2) - 2.0 * smooth + centred_at(-2))
    return np.stack([smooth, first, second])


def _weighted_sections(window, weights):
    """(len(weights), 3, H, W) float32: each (3, 2 k + 1) array of `weights` applied along the
    2 k + 1 sections around the centre of `window`, a few rows at a time.

    Every σ's weights are laid in one matrix over all sections of `window` (zero beyond its
    own reach) and applied by one float32 matrix product per band of rows: the band, converted
    to float32 once, is then read once for all scales while it is still in cache. A zero weight
    adds exactly nothing, so each σ's sums are those of its own reach. They differ from float64
    sums by a few float32 roundings of the grey values (about 1e-4 on a 0-255 scale, as the
    in-plane Gaussians do)."""
    n, h, w = window.shape
    centre = n // 2
    matrix = np.zeros((len(weights), 3, n), dtype=np.float32)
    for i, rows_of_sigma in enumerate(weights):
        k = rows_of_sigma.shape[1] // 2
        matrix[i, :, centre - k : centre + k + 1] = rows_of_sigma
    matrix = matrix.reshape(-1, n)
    out = np.empty((len(weights), 3, h, w), dtype=np.float32)
    sums = out.reshape(-1, h, w)
    rows = max(1, _CHUNK_VALUES // (n * w))
    band = np.empty((n, min(rows, h), w), dtype=np.float32)
    for start in range(0, h, rows):
        stop = min(start + rows, h)
        chunk = band[:, : stop - start]
        chunk[...] = window[:, start:stop]
        sums[:, start:stop] = np.tensordot(matrix, chunk, axes=1)
    return out


def _check_stack(stack):
    stack = np.asarray(stack)
    if stack.ndim != 3:
        raise TesseraInputError(
            f"stack must be 3D (sections, rows, columns), got shape {stack.shape}"
        )
    if stack.size == 0:
        raise TesseraInputError(f"stack is empty, got shape {stack.shape}")
    if not (np.issubdtype(stack.dtype, np.integer) or np.issubdtype(stack.dtype, np.floating)):
        raise TesseraInputError(f"stack must hold numbers, got dtype {stack.dtype}")
    if stack.shape[0] % 2 == 0:
        raise TesseraInputError(
            f"stack must hold an odd number of sections (the centre and r on each side), "
            f"got {stack.shape[0]}"
        )
    return stack


def _scale_channels_3d(channels, planes, following, s, inplane, context=(0, 0)):
    """Append the channels of scale `s`. `planes` holds the centre plane smoothed in 3D (g) and
    the z-smoothed first and second z differences, not yet smoothed in plane; `following` is
    the centre plane smoothed at the next σ (None for the last scale). All cover the core and
    `context` pixels (y, x) around it; the channels are those of the core, and only the
    structure tensor, which smooths the gradient again, is computed over the context too."""
    g, dz, dzz = planes
    # second derivatives are taken one pixel around the core, then that pixel is cut off
    core, around, cut = _context_slices(context, g.shape)
    gz = gaussian_smooth(dz, inplane)
    zz = gaussian_smooth(dzz, inplane)[core]
    gy, gx = _derivatives(g, _UNIT_STEPS)
    zy, zx = (d[cut] for d in _derivatives(gz[around], _UNIT_STEPS))
    yy, yx = (d[cut] for d in _derivatives(gy[around], _UNIT_STEPS))
    xx = _derivatives(gx[around], _UNIT_STEPS, (1,))[0][cut]
    channels.append(g[core])
    # each channel is made in its own plane (the order of operations is that of the formula)
    cz, cy, cx = gz[core], gy[core], gx[core]
    square = np.empty(cz.shape, dtype=np.float32)
    magnitude = np.multiply(cz, cz, out=channels.take())
    magnitude += np.multiply(cy, cy, out=square)
    magnitude += np.multiply(cx, cx, out=square)
    np.sqrt(magnitude, out=magnitude)
    # Scale-normalised (σ²) as in filter_bank
    norm = np.float32(s * s)
    laplacian = np.add(zz, yy, out=channels.take())
    laplacian += xx
    laplacian *= norm
    if following is not None:
        np.subtract(g[core], following[core], out=channels.take())
    hessian = [channels.take() for _ in range(3)]  # written in place, then scaled
    symmetric_eigenvalues_3x3(zz, zy, zx, yy, yx, xx, out=hessian)
    for values in hessian:
        values *= norm
    grads = (gz, gy, gx)
    pairs = ((0, 0), (0, 1), (0, 2), (1, 1), (1, 2), (2, 2))
    tensor = [gaussian_smooth(grads[a], inplane, times=grads[b])[core] for a, b in pairs]
    symmetric_eigenvalues_3x3(*tensor, out=[channels.take() for _ in range(3)])


def section_filter_bank_3d(stack, *, sigmas=DEFAULT_SIGMAS_3D, spacing, halo=0):
    """3D Gaussian-derivative features of the centre section of a stack.

    Parameters
    ----------
    stack : (2 r + 1, M, N) ndarray
        Grey values (any real dtype; computed in float32) of the section at index ``r`` and
        ``r`` sections on each side, with ``r >= section_bank_z_reach(sigmas, spacing=spacing)``
        (sections beyond that reach are ignored). Nothing is mirrored here: beyond the first or
        last section of a volume, the caller passes mirrored sections.
    sigmas : sequence of float, optional
        Increasing scales in pixels of the finest axis.
    spacing : sequence of float
        Voxel size (z, y, x): σ along each axis is ``σ * min(spacing) / spacing[axis]``.
    halo : int, optional
        Pixels on each side in plane that are context only: the features of the core inside
        them are returned, each scale filtered over the part of the halo it reaches (the same
        numbers as the crop of the whole plane's features).

    Returns
    -------
    (M - 2 halo, N - 2 halo, C) ndarray of float32
        Channels as named by ``feature_names(sigmas, ndim=3)``.

    Notes
    -----
    Smoothed intensity, gradient magnitude, Laplacian, difference of Gaussians and the three
    Hessian eigenvalues equal those of ``filter_bank(stack, sigmas=sigmas, spacing=spacing,
    mirror_edges=False)`` at section ``r``, up to float32 rounding, everywhere in the plane
    (the in-plane filters and differences are the same, with the same mirrored edges). As there,
    derivatives are central differences per voxel step (per section along z), and values within
    ``feature_radius(sigmas)`` pixels of the in-plane border depend on the border: pass that much
    halo and crop it.

    The structure tensor differs: its products of the 3D gradient (z, y, x) of the centre
    section are integrated with a 2D Gaussian in plane only (σ per in-plane axis as above), not
    over z as well as in the full 3D bank, which would need the gradient on every section within
    the integration reach. Its eigenvalues therefore describe the gradient directions gathered
    over a disc in the section's own plane, not over a ball; each gradient keeps its z component,
    so a surface crossing the section obliquely still shows as such. These channels are not
    comparable with those of the full 3D bank.

    Eigenvalues are sorted in descending order (:func:`symmetric_eigenvalues_3x3`).

    Examples
    --------
    >>> from tessera.cascade.features import filter_bank
    >>> stack = np.random.default_rng(0).random((13, 24, 24)).astype(np.float32)
    >>> f = section_filter_bank_3d(stack, sigmas=(1.0, 2.0), spacing=(20, 10, 10))
    >>> f.shape, f.dtype
    ((24, 24, 20), dtype('float32'))
    >>> full = filter_bank(stack, sigmas=(1.0, 2.0), spacing=(20, 10, 10), mirror_edges=False)
    >>> names = feature_names((1.0, 2.0), ndim=3)
    >>> same = [k for k, name in enumerate(names) if not name.startswith("structure")]
    >>> bool(np.allclose(f[..., same], full[6][..., same], atol=1e-5))
    True
    >>> core = section_filter_bank_3d(stack, sigmas=(1.0, 2.0), spacing=(20, 10, 10), halo=6)
    >>> bool(np.array_equal(core, f[6:-6, 6:-6]))
    True
    """
    stack = _check_stack(stack)
    sigmas = _check_sigmas(sigmas)
    ratios = _axis_ratios(spacing)
    reach = _reach(sigmas, ratios)
    r = stack.shape[0] // 2
    if r < reach:
        raise TesseraInputError(
            f"stack needs at least {reach} sections on each side of its centre for sigmas "
            f"{sigmas} at spacing {normalize_spacing(spacing, 3)}, got {r}"
        )
    window = stack[r - reach : r + reach + 1]
    halo = int(halo)
    if halo < 0 or any(n <= 2 * halo for n in window.shape[1:]):
        raise TesseraInputError(
            f"a halo of {halo} px leaves no core of sections {window.shape[1:]}"
        )
    shape = tuple(n - 2 * halo for n in window.shape[1:])
    planes = _weighted_sections(window, [_z_weights(s * ratios[0]) for s in sigmas])
    inplane = [(s * ratios[1], s * ratios[2]) for s in sigmas]
    # the part of the halo each scale reaches in plane, and its region
    reaches, regions = _scale_regions(sigmas, ratios[1:], halo, shape)
    smoothed = [gaussian_smooth(planes[i, 0][regions[i]], inplane[i]) for i in range(len(sigmas))]
    # channel planes written in place, the result a channels-last view (as in filter_bank)
    out_planes = np.empty((len(feature_names(sigmas, ndim=3)),) + shape, dtype=np.float32)
    out = np.moveaxis(out_planes, 0, -1)
    channels = _ChannelWriter(out)
    channels.append(window[reach][tuple(slice(halo, halo + n) for n in shape)].astype(np.float32))
    for i, s in enumerate(sigmas):
        z_planes = (smoothed[i], planes[i, 1][regions[i]], planes[i, 2][regions[i]])
        following = _following(smoothed, reaches, i)
        _scale_channels_3d(channels, z_planes, following, s, inplane[i], reaches[i])
    return out
