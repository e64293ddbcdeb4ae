"""Frames: a core with its mirrored halo, the image levels and features over it, and the maps of
the nodes computed so far; the feature matrix a node's classifier sees (image features plus the
stencil samples of its context maps).
"""

import numpy as np

from tessera.block_reduce import block_mean
from tessera.cascade.classifiers import CHUNK_ROWS
from tessera.cascade.features import (
    feature_names,
    filter_bank,
    neighbour_feature_names,
    neighbour_features,
)
from tessera.cascade.geometry import (
    feature_halo,
    level_sigmas,
    margins,
    padded_core_shape,
    read_reach,
    receptive_radius,
)
from tessera.cascade.spec import ancestors, node_inputs
from tessera.errors import TesseraInputError


def mirrored_window(array, z, y0, y1, x0, x1):
    """Section `z` of a (Z, Y, X) array over rows y0:y1 and columns x0:x1, mirrored beyond edges.

    Indices outside the volume are reflected (half-sample symmetric, repeated as often as
    needed), so a window far larger than the volume is still defined. Reads only the needed
    bounding box of the array (zarr or numpy).

    Examples
    --------
    >>> a = np.arange(4).reshape(1, 1, 4)
    >>> mirrored_window(a, 0, 0, 1, -3, 7)
    array([[2, 1, 0, 0, 1, 2, 3, 3, 2, 1]])
    """

    def reflect(start, stop, n):
        idx = np.arange(start, stop) % (2 * n)
        return np.where(idx < n, idx, 2 * n - 1 - idx)

    ny, nx = array.shape[1], array.shape[2]
    iy, ix = reflect(y0, y1, ny), reflect(x0, x1, nx)
    block = np.asarray(array[z, iy.min() : iy.max() + 1, ix.min() : ix.max() + 1])
    return block[np.ix_(iy - iy.min(), ix - ix.min())]


def mirrored_stack(array, z, neighbours, y0, y1, x0, x1):
    """Sections z - neighbours .. z + neighbours of a (Z, Y, X) array, mirrored beyond every edge.

    Returns a (2 neighbours + 1, y1 - y0, x1 - x0) array (see :func:`mirrored_window`).
    """
    nz = array.shape[0]
    zs = np.arange(z - neighbours, z + neighbours + 1) % (2 * nz)
    zs = np.where(zs < nz, zs, 2 * nz - 1 - zs)
    return np.stack([mirrored_window(array, int(k), y0, y1, x0, x1) for k in zs])


def _pool(prob, factor, how):
    if factor == 1:
        return prob
    if how == "mean":
        return block_mean(prob, (factor, factor))
    h, w = prob.shape
    ph, pw = -(-h // factor) * factor, -(-w // factor) * factor
    padded = np.pad(prob, ((0, ph - h), (0, pw - w)), mode="edge")
    return padded.reshape(ph // factor, factor, pw // factor, factor).max(axis=(1, 3))


class _Frame:
    """One core region with its mirrored halo; caches image levels and per-node maps.

    Coordinates: a map of node n at level l covers level-0 offsets [-margin(n), core + margin(n))
    around the core, at level-l resolution (all offsets are multiples of 2^L).
    """

    def __init__(self, spec, image, core_shape, halo, margin_table, *, extended=False):
        self.spec, self.halo = spec, halo
        self.extended = extended  # the core was extended (mirrored) to multiples of 2^L
        self.core_shape = core_shape  # multiples of 2^L
        self.margins = margin_table
        image = np.asarray(image, dtype=np.float32)
        # (2k + 1, H, W): the section and k neighbours on each side; the centre is index k
        self._levels = {0: image if image.ndim == 3 else image[np.newaxis]}
        self._features = {}
        self.maps = {}

    def image(self, level):
        if level not in self._levels:
            self._levels[level] = block_mean(self._levels[0], (1, 2**level, 2**level))
        return self._levels[level]

    def region(self, level, margin):
        """Slice of a level-l array covering the core plus `margin` (level-0 px) of a frame-sized map."""
        f = 2**level
        start = (self.halo - margin) // f
        h, w = self.core_shape
        return (
            slice(start, start + (h + 2 * margin) // f),
            slice(start, start + (w + 2 * margin) // f),
        )

    def widest(self, level):
        """The widest margin (level-0 px) any node of this frame reads at `level`."""
        return max([0] + [m for (_, lv), m in self.margins.items() if lv == level])

    def features(self, level, margin):
        """Image features of `level` over the core + `margin`; computed once per level.

        The first call computes them over the widest region any node of this frame reads at
        that level, later calls crop; stages reuse the image features of the first.
        """
        if level not in self._features:
            widest = self.widest(level)
            extra = feature_halo(self.spec, level)
            rows, cols = self.region(level, widest)
            # receptive_radius guarantees rows.start - extra >= 0: the window lies inside the frame
            stack = self.image(level)[
                :, rows.start - extra : rows.stop + extra, cols.start - extra : cols.stop + extra
            ]
            centre = stack.shape[0] // 2
            sigmas = level_sigmas(self.spec, level)
            parts = [filter_bank(stack[centre], sigmas=sigmas, mirror_edges=False)]
            parts += [
                neighbour_features(stack[k], sigmas=sigmas)
                for k in range(stack.shape[0])
                if k != centre
            ]
            feats = np.concatenate(parts, axis=-1) if len(parts) > 1 else parts[0]
            self._features[level] = (feats[extra:-extra, extra:-extra], widest)
        feats, widest = self._features[level]
        trim = (widest - margin) // (2**level)
        return feats[trim : feats.shape[0] - trim, trim : feats.shape[1] - trim] if trim else feats

    def context_maps(self, consumer, margin):
        """Every input map of `consumer` at the consumer's level, with its stencil's offset scale.

        Each map covers the consumer's core + margin plus the stencil's reach (level-l pixels
        `cut` on each side). A finer map is pooled down; a coarser one is repeated up (nearest)
        and its stencil offsets are scaled by the factor, which equals reading the stencil at the
        coarse level and upsampling the samples.
        """
        spec = self.spec
        level = consumer[1]
        out = []
        for producer in node_inputs(spec, *consumer):
            prob, p_margin = self.maps[producer]
            p_level = producer[1]
            reach = read_reach(spec, level, p_level)
            trim = (p_margin - (margin + reach)) // (2**p_level)
            src = prob[trim : prob.shape[0] - trim, trim : prob.shape[1] - trim] if trim else prob
            if p_level <= level:
                out.append(
                    (_pool(src, 2 ** (level - p_level), spec.pooling), 1, reach // (2**level))
                )
            else:
                factor = 2 ** (p_level - level)
                out.append(
                    (
                        np.repeat(np.repeat(src, factor, axis=0), factor, axis=1),
                        factor,
                        reach // (2**level),
                    )
                )
        return out


def _stencil_offsets(radii):
    offsets = [(0, 0)]
    for k in radii:
        offsets += [(-k, 0), (k, 0), (0, -k), (0, k), (-k, -k), (-k, k), (k, -k), (k, k)]
    return offsets


def _row_sources(frame, node, margin):
    """The (H, W, k) arrays whose channels, side by side, are the columns of `node`'s features
    over the core + margin: the image features, then one view per stencil sample of every
    context map (no copies)."""
    feats = frame.features(node[1], margin)
    h, w, _ = feats.shape
    sources = [feats]
    offsets = _stencil_offsets(frame.spec.stencil_radii)
    for prob, scale, cut in frame.context_maps(node, margin):
        # `cut` >= the widest offset, so every sample lies inside the map: no padding needed
        for dy, dx in offsets:
            y0, x0 = cut + dy * scale, cut + dx * scale
            sources.append(prob[y0 : y0 + h, x0 : x0 + w, np.newaxis])
    return sources


def node_matrix(frame, node, margin):
    """(H, W, C) float32 features of `node` over the core + margin: image features, then the
    stencil samples of every context map, written straight into one array."""
    sources = _row_sources(frame, node, margin)
    h, w, _ = sources[0].shape
    out = np.empty((h, w, sum(s.shape[2] for s in sources)), dtype=np.float32)
    channel = 0
    for source in sources:
        out[..., channel : channel + source.shape[2]] = source
        channel += source.shape[2]
    return out


def node_rows(frame, node, margin, pick):
    """Rows `pick` (indices into the flattened (H, W) grid) of :func:`node_matrix`, and only them.

    Training samples a few thousand pixels of each tile; gathering just those rows from the
    feature and context arrays gives the same numbers (plain copies) without building the whole
    (H, W, C) matrix.

    Examples
    --------
    >>> from tessera.cascade.spec import CascadeSpec
    >>> spec = CascadeSpec(stages=1, levels=0, sigmas=(1.0,))
    >>> halo = receptive_radius(spec)
    >>> image = np.random.default_rng(0).random((16 + 2 * halo,) * 2)
    >>> frame = make_frame(spec, image, (16, 16))
    >>> full = node_matrix(frame, (1, 0), 0)
    >>> rows = node_rows(frame, (1, 0), 0, [0, 17, 255])
    >>> np.array_equal(rows, full.reshape(256, -1)[[0, 17, 255]])
    True
    """
    sources = _row_sources(frame, node, margin)
    w = sources[0].shape[1]
    iy, ix = np.divmod(np.asarray(pick, dtype=np.intp), w)
    out = np.empty((iy.size, sum(s.shape[2] for s in sources)), dtype=np.float32)
    channel = 0
    for source in sources:
        out[:, channel : channel + source.shape[2]] = source[iy, ix]
        channel += source.shape[2]
    return out


# Pixels classified at once by :func:`node_map`. A multiple of 192 (a multiple of the row
# blocking of the BLAS matrix-product kernels, 16 to 64 rows): see :func:`_bands`.
BAND_ROWS = 192 * 48


def _bands(n, band=BAND_ROWS):
    """Row ranges [s, t) covering 0..n, each inside one classifier chunk of ``CHUNK_ROWS``.

    A classifier's BLAS product can round a row differently with the row's place in the call
    (its place in the kernel's row blocking, and whether it falls in the short last block). The
    classifier predicts a whole matrix in chunks of ``CHUNK_ROWS`` rows; cutting each chunk from
    its start into bands of a multiple of the blocking, the last band ending where the chunk
    ends, gives every row the same place as there, so the map is bit for bit the one of the
    whole matrix. A short remainder joins the band before it (a call of a few rows may take
    another kernel).

    Examples
    --------
    >>> list(_bands(9, band=4))
    [(0, 4), (4, 9)]
    """
    for chunk in range(0, n, CHUNK_ROWS):
        end, start = min(chunk + CHUNK_ROWS, n), chunk
        while start < end:
            stop = start + band
            if end - stop < band // 2:
                stop = end
            yield start, stop
            start = stop


def _fill_rows(x, sources, start, stop):
    """Pixels start..stop of the flattened (H, W) grid as rows of `x`: every source's channels
    into its columns, in order (a head of one image row, whole rows, a tail)."""
    w = sources[0].shape[1]
    r0, a = divmod(start, w)
    r1, b = divmod(stop, w)
    width = x.shape[1]
    column = 0
    for source in sources:
        cols = slice(column, column + source.shape[2])
        if r0 == r1:
            x[:, cols] = source[r0, a:b]
        else:
            head = w - a
            x[:head, cols] = source[r0, a:]
            body = (r1 - r0 - 1) * w
            # a run of rows of the C-contiguous band: the reshape is a view
            x[head : head + body].reshape(r1 - r0 - 1, w, width)[..., cols] = source[r0 + 1 : r1]
            if b:
                x[head + body :, cols] = source[r1, :b]
        column += source.shape[2]


def node_map(frame, node, margin, classifier):
    """(H, W) float32 output of `classifier` on `node`'s features over the core + margin.

    The same numbers as ``classifier.predict`` on the whole :func:`node_matrix`, computed band
    by band (:func:`_bands`) in one reused buffer: the full matrix (tens of bytes per feature
    and pixel) is never made.
    """
    sources = _row_sources(frame, node, margin)
    h, w, _ = sources[0].shape
    n = h * w
    width = sum(s.shape[2] for s in sources)
    out = np.empty(n, dtype=np.float32)
    buffer = np.empty((min(n, BAND_ROWS + BAND_ROWS // 2), width), dtype=np.float32)
    for start, stop in _bands(n):
        x = buffer[: stop - start]
        _fill_rows(x, sources, start, stop)
        out[start:stop] = classifier.predict(x)
    return out.reshape(h, w)


def node_feature_names(spec, stage, level):
    """Names of the columns a node's classifier sees, in order."""
    sigmas = level_sigmas(spec, level)
    image_names = feature_names(sigmas)
    for offset in [o for o in range(-spec.neighbours, spec.neighbours + 1) if o]:
        image_names += neighbour_feature_names(sigmas, offset=offset)
    names = [f"L{level}:{n}" for n in image_names]
    offsets = ["c"] + [
        f"r{k}{d}" for k in spec.stencil_radii for d in ("n", "s", "w", "e", "nw", "ne", "sw", "se")
    ]
    for producer in node_inputs(spec, stage, level):
        names += [f"ctx(s{producer[0]},l{producer[1]}):{o}" for o in offsets]
    return names


def make_frame(spec, image, core_shape, *, final=None, output_sigma=0.0):
    """A frame for a core of `core_shape` whose `image` carries the halo of ``receptive_radius``.

    The core is extended by mirroring to multiples of 2^L (labels there are ignored).
    """
    halo = receptive_radius(spec, final, output_sigma=output_sigma)
    image = np.asarray(image, dtype=np.float32)
    if image.ndim == 2:
        image = image[np.newaxis]
    expected = (2 * spec.neighbours + 1, *(c + 2 * halo for c in core_shape))
    if image.shape != expected:
        raise TesseraInputError(
            f"image must have shape {expected} (sections z-{spec.neighbours}..z+{spec.neighbours}, "
            f"core {core_shape} + halo {halo}), got {image.shape}"
        )
    padded_core = padded_core_shape(spec, core_shape)
    extra = [p - c for p, c in zip(padded_core, core_shape, strict=True)]
    if any(extra):
        image = np.pad(image, [(0, 0)] + [(0, e) for e in extra], mode="symmetric")
    return _Frame(
        spec,
        image,
        padded_core,
        halo,
        margins(spec, final, output_sigma=output_sigma),
        extended=any(extra),
    )


def share_features(source, target):
    """Give `target` the image features of `source` (a frame of the same core and image with a
    wider halo) at every level both use, cropped: nothing is filtered again.

    The features of a pixel are the same numbers over any region that holds their halo (fixed
    order filters, then per-pixel arithmetic), so the crop equals computing them afresh. That
    holds when `target`'s image is the crop of `source`'s; a core extended to multiples of
    2^L mirrors each frame's own halo end, so frames whose core was extended are left alone.
    Returns the levels shared.
    """
    shared = []
    if source.core_shape != target.core_shape or source.extended or target.extended:
        return shared
    for level in sorted({lv for _, lv in target.margins}):
        widest = max(m for (_, lv), m in target.margins.items() if lv == level)
        if level in target._features or widest > source.widest(level):
            continue
        target._features[level] = (source.features(level, widest), widest)
        shared.append(level)
    return shared


def ensure_maps(frame, node, models, fold):
    """Compute (and cache in the frame) the maps of every ancestor of `node`, not `node` itself."""
    for a in ancestors(frame.spec, node)[:-1]:
        if a not in frame.maps:
            margin = frame.margins[a]
            frame.maps[a] = (node_map(frame, a, margin, models[a].for_tile(fold)), margin)
