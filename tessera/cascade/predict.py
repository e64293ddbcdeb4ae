"""Prediction with a trained cascade: a frame (core + halo), a whole section, and the peak
memory one frame takes."""

import numpy as np

from tessera.cascade.across_sections import mix_sections
from tessera.cascade.classifiers import linear_first_step
from tessera.cascade.features import feature_names
from tessera.cascade.frame import (
    BAND_ROWS,
    PLANE_BAND,
    adopt_sections,
    ensure_maps,
    make_frame,
    node_feature_names,
    node_map,
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
    z_halo,
)
from tessera.cascade.mirror import mirrored_stack
from tessera.cascade.section_features import _CHUNK_VALUES
from tessera.cascade.smoothing import gaussian_smooth
from tessera.cascade.spec import (
    context_offsets,
    node_inputs,
    node_settings,
    nodes,
    spec_from_settings,
)
from tessera.errors import TesseraInputError


def cascade_spec(models):
    """The spec of a complete set of node models (stages = the last stage present)."""
    stages = max(s for s, _ in models)
    spec = next(iter(models.values())).spec
    spec = spec_from_settings(node_settings(spec), stages=stages)
    missing = [n for n in nodes(spec) if n not in models]
    if missing:
        raise TesseraInputError(f"the cascade lacks the models of nodes {missing}")
    return spec


def predict_frame(models, image, core_shape, *, output_sigma=0.0, room=None):
    """Final probability (float32) of the core of one block (core + ``receptive_radius`` halo).

    This is the block-prediction function: read a block of the working level with a halo of
    ``receptive_radius(spec, output_sigma=output_sigma)`` pixels (mirrored beyond the volume)
    and ``z_halo(spec)`` sections on each side, and keep the returned core. Block origins must
    be multiples of ``2**levels`` for results to equal whole-image prediction.

    Parameters
    ----------
    output_sigma : float
        Gaussian σ (px) applied to the final map. Isolated specks and pinholes of pixel-wise
        classification are mostly noise, and neighbouring pixels of an organelle agree; a light
        smoothing of the output raised test F1 on real ssTEM (see the README). The models do not
        depend on it.
    room : (int, int, int, int), optional
        Where the volume ends around the core (:func:`tessera.cascade.geometry.volume_room`): maps
        are computed inside the volume only and mirrored beyond it, so a block at an edge (a
        small volume in one block) does not classify its halo. Without it, the halo is
        classified on the mirrored image.
    """
    return next(predict_frames(models, [image], core_shape, output_sigma=output_sigma, room=room))


def predict_frames(models, images, core_shape, *, output_sigma=0.0, room=None):
    """:func:`predict_frame` of consecutive sections of one core; yields each section's map.

    `images` yields the window of each section in turn (sections z, z + 1, ...). With
    ``context_sections`` the maps of earlier stages a frame shares with the one before are
    reused, not recomputed (the numbers are the same, bit for bit).
    """
    spec = cascade_spec(models)
    final, previous = (spec.stages, 0), None
    for image in images:
        frame = make_frame(spec, image, tuple(core_shape), output_sigma=output_sigma, room=room)
        if previous is not None:
            adopt_sections(frame, previous)
            previous = None  # what it does not share is freed before the maps are made
        ensure_maps(frame, final, models, -1)
        margin = frame.margins[final]
        prob = node_map(frame, final, margin, models[final].classifier)
        if output_sigma > 0:
            # the map covers core + margin >= the kernel's reach: every core pixel sees real values
            prob = gaussian_smooth(prob, output_sigma)
        previous = frame if spec.context_sections else None
        yield prob[margin : margin + core_shape[0], margin : margin + core_shape[1]]


def predict_section(models, volume, z=None, *, output_sigma=0.0, output_sigma_z=0.0):
    """Probability map of one whole section, in one piece (maps mirrored beyond its edges).

    `volume` is a 2D section, or a (Z, Y, X) array with `z` the section (needed when the
    cascade reads neighbouring sections: ``z_halo`` of them on each side, mirrored beyond the
    volume's first and last section). With `output_sigma_z` (σ in sections) the maps of the
    sections around are predicted too and the section's map is smoothed across them
    (:func:`tessera.cascade.across_sections.mix_sections`).
    """
    spec = cascade_spec(models)
    halo = receptive_radius(spec, output_sigma=output_sigma)
    volume = np.asarray(volume)
    if volume.ndim == 2:
        volume, z = volume[np.newaxis], 0
    h, w = volume.shape[1:]

    def one(section):
        image = mirrored_stack(volume, section, z_halo(spec), -halo, h + halo, -halo, w + halo)
        return predict_frame(models, image, (h, w), output_sigma=output_sigma, room=(0, 0, 0, 0))

    if output_sigma_z <= 0:
        return one(z)
    return mix_sections(one, z, output_sigma_z, volume.shape[0])


# Per-row working memory of a classifier on one band of rows beyond the rows themselves and
# their finite check: hidden layers or per-tree descent state (float32/int64).
_CLASSIFIER_ROW_BYTES = 256
# The same for a first step formed in parts (:func:`tessera.cascade.frame._linear_map`): its
# sums and their finite check, the coarse maps' parts repeated up, and the later layers.
_LINEAR_ROW_BYTES = 256


def _bank_3d(spec, level):
    return spec.dims == 3 and level == 0


def _image_channels(spec, level):
    sigmas = level_sigmas(spec, level)
    if _bank_3d(spec, level):
        return len(feature_names(sigmas, ndim=3))
    return len(feature_names(sigmas)) + 2 * spec.neighbours * (1 + 2 * len(sigmas))


def _filter_temporaries(spec, level, pixels, channels):
    """Bytes the filter bank of `level` holds in flight over `pixels` (the region and its
    context), beyond the region's features."""
    scales = len(level_sigmas(spec, level))
    if not _bank_3d(spec, level):
        # smoothed images of every scale plus one scale's derivatives and gradient products in
        # flight; with neighbours, the parts are concatenated (one more copy of the channels)
        return 4 * pixels * (scales + 8 + (channels if spec.neighbours else 0))
    # the 3D bank: three weighted sums along z and one smoothed plane per scale, then one
    # scale's derivatives and gradient products (of the region only; bounded by 4 S + 32
    # planes with the context, which covers the peaks tracemalloc measures with some room for
    # other numpy versions); while the sums are made, the sections within reach in float32 (in
    # chunks of at most _CHUNK_VALUES)
    sections = 2 * image_z_reach(spec) + 1
    sums = 4 * pixels * 3 * scales + 4 * min(_CHUNK_VALUES, sections * pixels)
    return max(4 * pixels * (4 * scales + 32), sums)


def frame_memory_bytes(spec, core_shape, *, output_sigma=0.0, itemsize=4):
    """Peak bytes :func:`predict_frame` allocates for one core of `core_shape` (y, x).

    Follows the frame's geometry: the image levels (with the sections the image features read
    and the sections ``context_sections`` adds, each of which has its own features and maps),
    every level's cached image features over the widest margin its nodes read, every node's
    map, and the larger of the filter bank's temporaries (2D, or 3D at level 0 with ``dims`` =
    3) and the biggest node's context maps with one band of its feature rows and the
    classifier's work on it. Everything is float32 but the frame's own image, which holds
    `itemsize` bytes per grey value (8- and 16-bit images are kept as they are).

    Examples
    --------
    >>> from tessera.cascade.spec import CascadeSpec
    >>> spec = CascadeSpec(stages=1, levels=0, sigmas=(1.0,))
    >>> frame_memory_bytes(spec, (64, 64)) > 4 * (64 + 2 * receptive_radius(spec)) ** 2 * len(feature_names((1.0,)))
    True
    """
    halo = receptive_radius(spec, output_sigma=output_sigma)
    cy, cx = padded_core_shape(spec, core_shape)
    margin = margins(spec, output_sigma=output_sigma)
    # sections the frame computes maps on; coarser levels pool the centre and its neighbours
    # of each (the stack of image_z_reach sections around it is a view of the frame's image)
    used = 2 * section_reach(spec, (1, 0)) + 1
    per_section = 2 * spec.neighbours + 1
    pixels0 = (cy + 2 * halo) * (cx + 2 * halo)
    # the sections read, then the coarser levels (float32 means)
    image = pixels0 * (itemsize * (2 * z_halo(spec) + 1) + 4 * used * per_section / 3)
    cached = filters = 0
    for level in range(spec.levels + 1):
        f = 2**level
        widest = max([0] + [m for (_, lv), m in margin.items() if lv == level])
        extra = feature_halo(spec, level)
        region = ((cy + 2 * widest) // f) * ((cx + 2 * widest) // f)
        pixels = ((cy + 2 * widest) // f + 2 * extra) * ((cx + 2 * widest) // f + 2 * extra)
        channels = _image_channels(spec, level)
        cached += 4 * region * channels * used  # features of the region only, not its context
        filters = max(filters, _filter_temporaries(spec, level, pixels, channels))

    def rows(node, extra_margin=0):
        f = 2 ** node[1]
        return ((cy + 2 * (margin[node] + extra_margin)) // f) * (
            (cx + 2 * (margin[node] + extra_margin)) // f
        )

    maps = sum(4 * rows(node) * (2 * section_reach(spec, node) + 1) for node in margin)
    work = 0
    for node in margin:
        width = len(node_feature_names(spec, *node))
        inputs = node_inputs(spec, *node)
        inputs += [(node[0] - 1, 0)] * len(context_offsets(spec, node[0]))
        context = sum(4 * rows(node, read_reach(spec, node[1], p[1])) for p in inputs)
        if linear_first_step(spec.classifier):
            # one band of feature planes (float32, with the bias's plane) and the work on it
            band = min(rows(node), PLANE_BAND + PLANE_BAND // 2)
            row_bytes = 4 * (width + 1) + _LINEAR_ROW_BYTES
        else:
            # one band of feature rows (float32), the classifier's finite check and working rows
            band = min(rows(node), BAND_ROWS + BAND_ROWS // 2)
            row_bytes = 5 * width + _CLASSIFIER_ROW_BYTES
        work = max(work, context + band * row_bytes)
    return int(image + cached + maps + max(filters, work))
