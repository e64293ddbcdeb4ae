"""Frames: a core with its mirrored halo, the image levels and features over it, and the maps of
the nodes computed so far; the feature matrix a node's classifier sees (image features plus the
stencil samples of its context maps).

A frame holds the sections its final node needs (``z_halo`` on each side of its own, section
offset 0); each section keeps its own image features and node maps, so a node from stage 2 on can
read the previous stage's map of the sections around its own (``context_sections``). A section's
image is a view of the frame's stack (``image_z_reach`` sections on each side: ``neighbours`` in
2D, the 3D filter bank's z reach with ``dims`` = 3), never a copy.
"""

import numpy as np

from tessera.block_reduce import block_mean
from tessera.cascade.classifiers import CHUNK_ROWS
from tessera.cascade.classifiers.row_ops import add_row
from tessera.cascade.features import (
    feature_names,
    filter_bank,
    neighbour_feature_names,
    neighbour_features,
)
from tessera.cascade.geometry import (
    feature_halo,
    image_z_reach,
    level_sigmas,
    margins,
    padded_core_shape,
    read_reach,
    receptive_radius,
    section_reach,
    volume_room,  # noqa: F401 - frames' callers import it from here too
    z_halo,
)
from tessera.cascade.mirror import (  # noqa: F401 - readers of frames import them from here too
    mirror_beyond_volume,
    mirrored_stack,
    mirrored_window,
)
from tessera.cascade.section_features import section_filter_bank_3d
from tessera.cascade.spec import ancestors, context_offsets, node_inputs
from tessera.errors import TesseraInputError


def _pool(prob, factor, how):
    if factor == 1:
        return prob
    if how == "mean":
        return block_mean(prob, (factor, factor))
    h, w = prob.shape
    ph, pw = -(-h // factor) * factor, -(-w // factor) * factor
    padded = np.pad(prob, ((0, ph - h), (0, pw - w)), mode="edge")
    return padded.reshape(ph // factor, factor, pw // factor, factor).max(axis=(1, 3))


def _grey_values(image):
    """`image` as the cascade holds it: 8- and 16-bit integers as they are, anything else as
    float32. Every filter converts what it reads to float32, exactly for such integers, so the
    features are the same either way; a 3D frame's tens of uint8 sections then take a quarter
    of the memory and are not converted as a whole for every section."""
    image = np.asarray(image)
    if np.issubdtype(image.dtype, np.integer) and image.dtype.itemsize <= 2:
        return image
    return image.astype(np.float32, copy=False)


class _Section:
    """One section of a frame: its core region with the mirrored halo; caches its image levels,
    image features and per-node maps.

    Coordinates: a map of node n at level l covers level-0 offsets [-margin(n), core + margin(n))
    around the core, at level-l resolution (all offsets are multiples of 2^L).
    """

    def __init__(self, spec, image, core_shape, halo, margin_table, room):
        self.spec, self.halo = spec, halo
        self.core_shape = core_shape  # multiples of 2^L
        self.margins = margin_table
        self.room = room  # level-0 px of the volume beyond the core: top, bottom, left, right
        image = _grey_values(image)
        # (2k + 1, H, W), k = image_z_reach: the section and k sections on each side, the centre
        # at index k; kept as given (a view of the frame's stack, never copied)
        self._levels = {0: image if image.ndim == 3 else image[np.newaxis]}
        self._features = {}
        self.maps = {}

    def image(self, level):
        """The section's image at `level`: at level 0 every section it holds; at a coarser
        level (pooled in plane only) the centre and its ``neighbours`` on each side (in 3D,
        the centre alone: the 3D bank is used at level 0 only)."""
        if level not in self._levels:
            stack = self._levels[0]
            k, centre = self.spec.neighbours, stack.shape[0] // 2
            self._levels[level] = block_mean(
                stack[centre - k : centre + k + 1], (1, 2**level, 2**level)
            )
        return self._levels[level]

    def clip(self, margin):
        """The part of `margin` (level-0 px) on each side (top, bottom, left, right) that lies
        inside the volume: only there are features and maps computed."""
        return tuple(min(margin, r) for r in self.room)

    def region(self, level, margin):
        """Slices of a level-l frame-sized array covering the core plus `margin` (level-0 px),
        clipped to the volume (:meth:`clip`)."""
        f = 2**level
        top, bottom, left, right = self.clip(margin)
        h, w = self.core_shape
        return (
            slice((self.halo - top) // f, (self.halo + h + bottom) // f),
            slice((self.halo - left) // f, (self.halo + w + right) // f),
        )

    def widest(self, level):
        """The widest margin (level-0 px) any node of this frame reads at `level`."""
        return max([0] + [m for (_, lv), m in self.margins.items() if lv == level])

    def _bank(self, level, stack, extra):
        """Image features of the centre of `stack` (this section's image at `level`), without
        its `extra` pixels of context on each side."""
        sigmas = level_sigmas(self.spec, level)
        if level == 0 and self.spec.dims == 3:
            spacing = (self.spec.voxel_aspect, 1.0, 1.0)
            return section_filter_bank_3d(stack, sigmas=sigmas, spacing=spacing, halo=extra)
        centre = stack.shape[0] // 2
        bank = filter_bank(stack[centre], sigmas=sigmas, mirror_edges=False, halo=extra)
        if stack.shape[0] == 1:
            return bank
        # one array of channel planes, as the centre's bank is: a node then multiplies the
        # planes where they lie instead of copying every band of them (about 2x faster)
        parts = [np.moveaxis(bank, -1, 0)] + [
            np.moveaxis(neighbour_features(stack[k], sigmas=sigmas), -1, 0)[
                :, extra:-extra, extra:-extra
            ]
            for k in range(stack.shape[0])
            if k != centre
        ]
        return np.moveaxis(np.concatenate(parts), 0, -1)

    def features(self, level, margin):
        """Image features of `level` over the core + `margin` (clipped to the volume); computed
        once per level.

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
            self._features[level] = (self._bank(level, stack, extra), widest)
        feats, widest = self._features[level]
        if widest == margin:
            return feats
        f = 2**level
        top, bottom, left, right = (
            (w - m) // f for w, m in zip(self.clip(widest), self.clip(margin), strict=True)
        )
        return feats[top : feats.shape[0] - bottom, left : feats.shape[1] - right]


class _Frame:
    """One core region with its mirrored halo over the sections its final node needs.

    `image` is (2 z_halo + 1, H, W); section offset d (|d| <= z_halo - k, k = image_z_reach) is
    made on first use from the sections d - k .. d + k around it (a view: slices along z of the
    stack share its memory).
    """

    def __init__(
        self, spec, image, core_shape, halo, margin_table, final, *, extended=False, room=None
    ):
        self.spec, self.halo = spec, halo
        self.extended = extended  # the core was extended (mirrored) to multiples of 2^L
        self.room = room or (halo,) * 4
        self.core_shape = core_shape
        self.margins = margin_table
        self.final = final or (spec.stages, 0)
        self.z_halo = z_halo(spec, self.final)
        self.stack = image  # every section the frame needs (:func:`_grey_values`)
        self._sections = {}

    def section(self, offset):
        if offset not in self._sections:
            n, centre = image_z_reach(self.spec), self.z_halo + offset
            if not 0 <= centre - n and centre + n < self.stack.shape[0]:
                raise TesseraInputError(f"section offset {offset} lies beyond the frame's sections")
            stack = self.stack[centre - n : centre + n + 1]  # a view, not a copy
            self._sections[offset] = _Section(
                self.spec, stack, self.core_shape, self.halo, self.margins, self.room
            )
        return self._sections[offset]

    @property
    def maps(self):
        """Maps computed so far on the frame's own section: {node: (map, margin)}."""
        return self.section(0).maps

    def features(self, level, margin, offset=0):
        return self.section(offset).features(level, margin)

    def context_maps(self, consumer, margin, offset=0):
        """Every input map of `consumer` at the consumer's level, with its stencil's offset scale.

        The maps of the consumer's own section (offset `offset`), then, from stage 2 on, the
        previous stage's final map of each section in ``context_offsets`` around it. Each map
        covers the consumer's core + margin (clipped to the volume, :meth:`_Section.clip`) plus
        the stencil's reach (level-l pixels `cut` on each side, as if at the consumer's level).
        A finer map is pooled down (factor 1); a coarser one is left at its level, with the
        factor by which the consumer repeats it up (nearest): its stencil's offsets are scaled
        by the factor, which equals reading the stencil at the coarse level and upsampling the
        samples (:func:`coarse_index`).
        """
        spec = self.spec
        level = consumer[1]
        out = []
        reads = [(producer, offset) for producer in node_inputs(spec, *consumer)]
        reads += [((consumer[0] - 1, 0), offset + d) for d in context_offsets(spec, consumer[0])]
        clipped = self.section(offset).clip(margin)
        for producer, at in reads:
            prob, p_margin = self.section(at).maps[producer]
            p_level = producer[1]
            reach = read_reach(spec, level, p_level)
            top, bottom, left, right = ((p_margin - (c + reach)) // (2**p_level) for c in clipped)
            src = prob[top : prob.shape[0] - bottom, left : prob.shape[1] - right]
            if p_level <= level:
                out.append(
                    (_pool(src, 2 ** (level - p_level), spec.pooling), 1, reach // (2**level))
                )
            else:
                out.append((src, 2 ** (p_level - level), reach // (2**level)))
        return out


def coarse_index(cut, start, stop, factor):
    """Rows of a coarse map (repeated up by `factor`) that stencil centres start..stop read.

    A map repeated up by `factor` and read `cut` pixels in, at offset ``k * factor``, holds at
    consumer pixel i the coarse value ``k + (cut + i) // factor``: every stencil sample of row
    i comes from coarse row ``(cut + i) // factor``, shifted by k.

    Examples
    --------
    >>> coarse_index(4, 0, 5, 2)
    array([2, 2, 3, 3, 4])
    """
    return (cut + np.arange(start, stop)) // factor


def _stencil_offsets(radii):
    offsets = [(0, 0)]
    for k in radii:
        offsets += [(-k, 0), (k, 0), (0, -k), (0, k), (-k, -k), (-k, k), (k, -k), (k, k)]
    return offsets


def _row_sources(frame, node, margin, offset=0):
    """The (H, W, k) arrays whose channels, side by side, are the columns of `node`'s features
    over the core + margin of section `offset`: the image features, then one view per stencil
    sample of every context map (no copies)."""
    feats = frame.features(node[1], margin, offset)
    h, w, _ = feats.shape
    sources = [feats]
    offsets = _stencil_offsets(frame.spec.stencil_radii)
    for prob, scale, cut in frame.context_maps(node, margin, offset):
        if scale > 1:
            prob = np.repeat(np.repeat(prob, scale, axis=0), scale, axis=1)
        # `cut` >= the widest offset, so every sample lies inside the map: no padding needed
        for dy, dx in offsets:
            y0, x0 = cut + dy * scale, cut + dx * scale
            sources.append(prob[y0 : y0 + h, x0 : x0 + w, np.newaxis])
    return sources


def node_matrix(frame, node, margin, offset=0):
    """(H, W, C) float32 features of `node` over the core + margin (of section `offset`): image
    features, then the stencil samples of every context map, written straight into one array."""
    sources = _row_sources(frame, node, margin, offset)
    h, w, _ = sources[0].shape
    out = np.empty((h, w, sum(s.shape[2] for s in sources)), dtype=np.float32)
    channel = 0
    for source in sources:
        out[..., channel : channel + source.shape[2]] = source
        channel += source.shape[2]
    return out


def node_rows(frame, node, margin, pick, offset=0):
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
    sources = _row_sources(frame, node, margin, offset)
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


# Pixels whose first-layer products :func:`_linear_map` forms at once (whole image rows, so
# a band holds up to about this many): fewer, larger bands spend less time on per-band work.
PLANE_BAND = 2 * BAND_ROWS


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


def _banded_map(frame, node, margin, classifier, offset):
    """``classifier.predict`` of the whole :func:`node_matrix`, band by band (:func:`_bands`)
    in one reused buffer, bit for bit."""
    sources = _row_sources(frame, node, margin, offset)
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


def _add_coarse_parts(zb, coarse, offsets, y0, y1, w, step):
    """Add to the first-layer sums `zb` of rows y0..y1 (width `w`) the parts of the coarser
    maps: each multiplied at its own level over the coarse cells those rows read, then repeated
    up. Where every cell lies whole in the band (rows and width multiples of `step`, the
    coarsest factor), the parts are summed coarsest first on ever finer grids and added once;
    a region cut by a volume edge repeats each part up alone."""
    k = len(offsets)
    aligned = all(cut % f == 0 for _, f, cut, _ in coarse)
    aligned = aligned and (y1 - y0) % step == 0 and w % step == 0
    total, at = None, None  # the coarse parts summed on the grid of factor `at`
    for prob, factor, cut, part in coarse:
        iy, ix = coarse_index(cut, y0, y1, factor), coarse_index(cut, 0, w, factor)
        a0, a1, b0, b1 = iy[0], iy[-1] + 1, ix[0], ix[-1] + 1
        samples = np.empty((k, a1 - a0, b1 - b0), dtype=np.float32)
        for plane, (dy, dx) in enumerate(offsets):
            samples[plane] = prob[a0 + dy : a1 + dy, b0 + dx : b1 + dx]
        g = (samples.reshape(k, -1).T @ part).reshape(a1 - a0, b1 - b0, -1)
        if not aligned:
            zb += np.take(np.take(g, ix - b0, axis=1), iy - a0, axis=0).reshape(zb.shape)
        elif total is None:
            total, at = g, factor
        else:  # the coarser sum repeats over this grid's cells
            r = at // factor
            g += np.repeat(np.repeat(total, r, axis=0), r, axis=1)
            total, at = g, factor
    if total is not None:
        # repeated along x (a contiguous copy), then added to each of the `at` rows of a cell
        # row in one long run
        total = np.repeat(total, at, axis=1)
        zb.reshape(total.shape[0], at, -1)[...] += total.reshape(total.shape[0], 1, -1)


def _linear_map(frame, node, margin, classifier, offset):
    """The classifier's output from its first step ``X @ W + b`` formed in parts, never
    forming X.

    The stencil samples of maps at the node's own level are written as planes (contiguous
    copies) of a band of image rows, beside a plane of ones for the bias, and multiplied at
    once; so are the image features, unless their planes are whole (the region the features
    were made for), which are multiplied where they lie. A coarser map's part is multiplied at
    its own level, where its stencil is read (a quarter or a sixteenth of the pixels), and
    repeated up (:func:`coarse_index`).
    """
    weights, bias = classifier.linear_weights()
    feats = frame.features(node[1], margin, offset)
    h, w, channels = feats.shape
    planes = np.moveaxis(feats, -1, 0)  # a view: the bank stores channel planes
    # each plane's rows follow one another: a band of rows of every plane is one matrix
    direct = planes.dtype == np.float32 and planes.strides[1:] == (4 * w, 4)
    offsets = _stencil_offsets(frame.spec.stencil_radii)
    k = len(offsets)
    fine, coarse, column = [], [], channels
    rows = [] if direct else [weights[:channels]]
    for prob, factor, cut in frame.context_maps(node, margin, offset):
        part = weights[column : column + k]
        if factor == 1:
            fine.append((prob, cut))
            rows.append(part)
        else:
            coarse.append((prob, factor, cut, np.ascontiguousarray(part)))
        column += k
    fine_weights = np.concatenate(rows + [bias[np.newaxis]])
    coarse.sort(key=lambda read: -read[1])  # coarsest first: each is summed into the next
    # bands of whole rows, a multiple of the coarsest repeat: a coarse part then adds by
    # broadcasting over aligned f x f cells
    step = max([1] + [factor for _, factor, _, _ in coarse])
    band = min(max(step, PLANE_BAND // w // step * step), -(-h // step) * step)
    x = np.empty((fine_weights.shape[0], band * w), dtype=np.float32)
    x[-1] = 1.0  # the bias's plane
    z = np.empty((band * w, weights.shape[1]), dtype=np.float32)
    if direct:
        image_weights = np.ascontiguousarray(weights[:channels])
        context_sums = np.empty_like(z) if fine else None
    out = np.empty((h, w), dtype=np.float32)
    with classifier.thread_limit():
        for y0 in range(0, h, band):
            y1 = min(h, y0 + band)
            n = (y1 - y0) * w
            planar = x[:-1, :n].reshape(-1, y1 - y0, w)
            plane = 0
            if not direct:
                planar[:channels] = planes[:, y0:y1]
                plane = channels
            for prob, cut in fine:
                for dy, dx in offsets:
                    planar[plane] = prob[cut + dy + y0 : cut + dy + y1, cut + dx : cut + dx + w]
                    plane += 1
            if not direct:
                zb = np.matmul(x[:, :n].T, fine_weights, out=z[:n])
            else:
                zb = np.matmul(planes[:, y0:y1].reshape(channels, n).T, image_weights, out=z[:n])
                if fine:
                    zb += np.matmul(x[:, :n].T, fine_weights, out=context_sums[:n])
                else:
                    add_row(zb, bias)
            _add_coarse_parts(zb, coarse, offsets, y0, y1, w, step)
            out[y0:y1] = classifier.predict_from_linear(zb).reshape(y1 - y0, w)
    return out


def node_map(frame, node, margin, classifier, offset=0):
    """(H, W) float32 output of `classifier` on `node`'s features over the core + margin (of
    section `offset`).

    ``classifier.predict`` on the whole :func:`node_matrix`, without making the matrix (tens of
    bytes per feature and pixel): for a classifier whose first step is linear
    (:meth:`~tessera.cascade.classifiers.BinaryClassifier.linear_weights`, the networks), the
    product is formed in parts (:func:`_linear_map`; within float32 rounding of the whole
    matrix's prediction); for others, band by band in one reused buffer, bit for bit. Only the
    part inside the volume is classified; the map beyond a volume edge is its mirror
    (:func:`mirror_beyond_volume`).
    """
    if classifier.linear_weights() is None:
        out = _banded_map(frame, node, margin, classifier, offset)
    else:
        out = _linear_map(frame, node, margin, classifier, offset)
    f = 2 ** node[1]
    pads = tuple((margin - c) // f for c in frame.section(offset).clip(margin))
    return mirror_beyond_volume(out, pads)


def node_feature_names(spec, stage, level):
    """Names of the columns a node's classifier sees, in order."""
    sigmas = level_sigmas(spec, level)
    image_names = feature_names(sigmas, ndim=3 if spec.dims == 3 and level == 0 else 2)
    for offset in [o for o in range(-spec.neighbours, spec.neighbours + 1) if o]:
        image_names += neighbour_feature_names(sigmas, offset=offset)
    names = [f"L{level}:{n}" for n in image_names]
    offsets = ["c"] + [
        f"r{k}{d}" for k in spec.stencil_radii for d in ("n", "s", "w", "e", "nw", "ne", "sw", "se")
    ]
    for producer in node_inputs(spec, stage, level):
        names += [f"ctx(s{producer[0]},l{producer[1]}):{o}" for o in offsets]
    for d in context_offsets(spec, stage):
        names += [f"ctx(s{stage - 1},l0,z{d:+d}):{o}" for o in offsets]
    return names


def make_frame(spec, image, core_shape, *, final=None, output_sigma=0.0, room=None):
    """A frame for a core of `core_shape` whose `image` carries the halo of ``receptive_radius``.

    The core is extended by mirroring to multiples of 2^L (labels there are ignored).

    `room` (:func:`tessera.cascade.geometry.volume_room`) says where the volume ends: maps are
    then computed only inside it and mirrored beyond it, so a core at the volume's edge does not
    classify its halo. Without it (training tiles) every map covers the whole margin, computed
    on the mirrored image.
    """
    halo = receptive_radius(spec, final, output_sigma=output_sigma)
    zh = z_halo(spec, final)
    image = _grey_values(image)
    if image.ndim == 2:
        image = image[np.newaxis]
    expected = (2 * zh + 1, *(c + 2 * halo for c in core_shape))
    if image.shape != expected:
        raise TesseraInputError(
            f"image must have shape {expected} (sections z-{zh}..z+{zh}, "
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
        final,
        extended=any(extra),
        room=None if room is None else tuple(min(int(r), halo) for r in room),
    )


def share_features(source, target):
    """Give every section of `target` (a frame of the same core and image with a narrower halo,
    in plane and in z) the image features of the same section of `source`, cropped, at every
    level both use: nothing is filtered again.

    The features of a pixel are the same numbers over any region that holds their halo (fixed
    order filters, then per-pixel arithmetic), so the crop equals computing them afresh. That
    holds when `target`'s image is the crop of `source`'s; a core extended to multiples of
    2^L mirrors each frame's own halo end, so frames whose core was extended are left alone.
    Returns the (section offset, level) pairs shared.
    """
    shared = []
    if source.core_shape != target.core_shape or source.extended or target.extended:
        return shared
    if any(min(s, target.halo) != t for s, t in zip(source.room, target.room, strict=True)):
        return shared  # frames of other volumes: their features cover other regions
    reach = target.z_halo - image_z_reach(target.spec)
    if reach > source.z_halo - image_z_reach(source.spec):
        return shared
    for offset in range(-reach, reach + 1):
        into, out_of = target.section(offset), source.section(offset)
        for level in sorted({lv for _, lv in target.margins}):
            widest = into.widest(level)
            if level in into._features or widest > out_of.widest(level):
                continue
            into._features[level] = (out_of.features(level, widest), widest)
            shared.append((offset, level))
    return shared


def adopt_sections(frame, previous):
    """Give `frame` the sections it shares with `previous`, the frame of the section before.

    Consecutive sections of a block read the same core region; a section's image features and
    maps do not depend on which frame it belongs to (the same image values, core and margins),
    so with ``context_sections`` the maps of the sections around are computed once, not once
    per frame that reads them. Both frames must be for the same core, halo and final node.
    """
    same = (frame.core_shape, frame.halo, frame.final) == (
        previous.core_shape,
        previous.halo,
        previous.final,
    )
    if not same:
        raise TesseraInputError("frames of different cores or cascades share no sections")
    reach = frame.z_halo - image_z_reach(frame.spec)
    for offset, section in previous._sections.items():
        if -reach <= offset - 1 <= reach:
            frame._sections[offset - 1] = section


def ensure_maps(frame, node, models, fold):
    """Compute (and cache in the frame) the maps of every ancestor of `node`, not `node` itself,
    on every section `node` reads them on (its own, and with ``context_sections`` the sections
    around it), earlier stages first."""
    spec = frame.spec
    for a in ancestors(spec, node)[:-1]:
        reach = section_reach(spec, a, node)
        for offset in range(-reach, reach + 1):
            maps = frame.section(offset).maps
            if a not in maps:
                margin = frame.margins[a]
                clf = models[a].for_tile(fold)
                maps[a] = (node_map(frame, a, margin, clf, offset), margin)
