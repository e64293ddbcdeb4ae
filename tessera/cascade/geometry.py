"""Geometry of a cascade: how far each node reads, and the halo (receptive radius) it needs.

Work happens on *frames*: a core region (a training tile, or a block to predict) plus a halo of
:func:`receptive_radius` pixels, mirrored beyond the volume. Each node computes its map only over
the core plus the margin its consumers read. Because the result at a core pixel depends on
nothing outside the halo, prediction block by block equals prediction of the whole image,
provided block origins are multiples of ``2**L``.
"""

import math

from tessera.cascade.features import feature_radius
from tessera.cascade.section_features import section_bank_z_reach
from tessera.cascade.spec import ancestors, node_inputs
from tessera.errors import TesseraInputError

# Largest Gaussian sigma (px) of the final map's smoothing; the config schema's
# targets.*.output_smoothing_px states the same bound.
MAX_OUTPUT_SIGMA = 32


def level_sigmas(spec, level):
    return spec.sigmas if level == 0 else spec.coarse_sigmas


def read_reach(spec, consumer_level, producer_level):
    """Level-0 pixels beyond a consumer pixel at which it reads a producer's map."""
    r = max(spec.stencil_radii)
    top = max(consumer_level, producer_level)
    # stencil at the coarser of the two levels, plus one block for pooling / upsampling phase
    return (2**top) * (r + 1)


def round_up(value, step):
    return int(math.ceil(value / step) * step)


def smoothing_reach(output_sigma):
    """Pixels the Gaussian smoothing of the final map reaches (scipy's kernel, truncate 4).

    Examples
    --------
    >>> smoothing_reach(0), smoothing_reach(2.0)
    (0, 8)
    """
    if not (isinstance(output_sigma, (int, float)) and 0 <= output_sigma <= MAX_OUTPUT_SIGMA):
        raise TesseraInputError(
            f"output smoothing sigma must be from 0 to {MAX_OUTPUT_SIGMA:g} px, got {output_sigma!r}"
        )
    return int(4.0 * output_sigma + 0.5) if output_sigma > 0 else 0


def margins(spec, final=None, *, output_sigma=0.0):
    """Level-0 margin around the core over which each node's map must be computed.

    Only the ancestors of `final` (default: the last node) are included; `final` itself needs
    a margin only for the smoothing of the output (`output_sigma`, px).
    """
    final = final or (spec.stages, 0)
    order = ancestors(spec, final)
    out = {n: 0 for n in order}
    out[final] = round_up(smoothing_reach(output_sigma), spec.align)
    for consumer in reversed(order):
        for producer in node_inputs(spec, *consumer):
            need = out[consumer] + read_reach(spec, consumer[1], producer[1])
            out[producer] = max(out[producer], round_up(need, spec.align))
    return out


def image_z_reach(spec):
    """Sections of image on each side of a section that the section's image features read.

    ``neighbours`` in 2D; in 3D (``dims`` = 3) the z reach of the 3D filter bank at the
    spec's ``sigmas`` and ``voxel_aspect``
    (:func:`tessera.cascade.section_features.section_bank_z_reach`). The coarser levels read
    no more than this (the centre section, and its ``neighbours`` in 2D).

    Examples
    --------
    >>> from tessera.cascade.spec import CascadeSpec
    >>> image_z_reach(CascadeSpec(neighbours=2))
    2
    >>> image_z_reach(CascadeSpec(dims=3, sigmas=(1.0, 2.0)))
    10
    >>> image_z_reach(CascadeSpec(dims=3, sigmas=(1.0, 2.0), voxel_aspect=2.0))
    6
    """
    if spec.dims == 3:
        return section_bank_z_reach(spec.sigmas, spacing=(spec.voxel_aspect, 1.0, 1.0))
    return spec.neighbours


def z_halo(spec, final=None):
    """Sections of image needed on each side of a frame's own section.

    The one place the z extent of a frame is derived. A node's image features read
    :func:`image_z_reach` sections on each side; from stage 2 on, a node also reads the previous
    stage's map on ``context_sections`` sections on each side, so the map of stage s is needed
    on :func:`section_reach` sections around the frame's own, each of them with its own
    image reach. Prediction and training windows are read with this many sections on each side
    (mirrored beyond the volume's first and last section).

    Examples
    --------
    >>> from tessera.cascade.spec import CascadeSpec
    >>> z_halo(CascadeSpec(stages=3, neighbours=1, context_sections=2))
    5
    >>> z_halo(CascadeSpec(stages=3, neighbours=1, context_sections=2), (1, 0))
    1
    >>> z_halo(CascadeSpec(stages=2, dims=3, sigmas=(1.0, 2.0), context_sections=1))
    11
    """
    stage = (final or (spec.stages, 0))[0]
    return image_z_reach(spec) + section_reach(spec, (1, 0), (stage, 0))


def section_reach(spec, node, final=None):
    """Sections on each side of the frame's own on which `node`'s map is needed for `final`.

    Examples
    --------
    >>> from tessera.cascade.spec import CascadeSpec
    >>> spec = CascadeSpec(stages=3, context_sections=1)
    >>> [section_reach(spec, (s, 0)) for s in (1, 2, 3)]
    [2, 1, 0]
    """
    stage = (final or (spec.stages, 0))[0]
    return (stage - node[0]) * spec.context_sections


def feature_halo(spec, level):
    """Level-l pixels of image around a region that its features depend on.

    The same in 2D and 3D (``dims`` = 3): the 3D bank's in-plane σ are the finest-axis σ times
    at most 1, so it reaches no further in plane than the 2D bank of the same σ
    (:func:`tessera.cascade.features.feature_radius`).
    """
    return feature_radius(level_sigmas(spec, level)) + 1


def receptive_radius(spec, final=None, *, output_sigma=0.0):
    """Halo (level-0 pixels, a multiple of 2^L) that makes the core independent of anything beyond.

    `output_sigma` > 0 adds the reach of the Gaussian smoothing of the final map.

    Examples
    --------
    >>> from tessera.cascade.spec import CascadeSpec
    >>> r = receptive_radius(CascadeSpec(stages=1, levels=0, sigmas=(1.0,)))
    >>> r == feature_radius((1.0,)) + 2  # one pixel spare for the level grid
    True
    """
    m = margins(spec, final, output_sigma=output_sigma)
    radius = max(m[n] + (2 ** n[1]) * (feature_halo(spec, n[1]) + 1) for n in m)
    return round_up(radius, spec.align)


def padded_core_shape(spec, shape):
    return tuple(round_up(n, spec.align) for n in shape)


def volume_room(spec, shape, box):
    """Level-0 px of the volume beyond a core on each side (top, bottom, left, right), on the
    2^L grid of the core.

    `shape` is the (Y, X) size of the volume, `box` = (y0, y1, x0, x1) the core. The volume
    counts as extended to multiples of 2^L, as a core at its far end is. For a core whose
    origin lies on the 2^L grid (prediction blocks) the values are exact; for another (a
    training tile) they are rounded down to the grid, so at most 2^L - 1 px of image at an
    edge is taken as lying beyond it.

    Examples
    --------
    >>> from tessera.cascade.spec import CascadeSpec
    >>> volume_room(CascadeSpec(levels=2), (10, 16), (0, 10, 4, 8))
    (0, 0, 4, 8)
    >>> volume_room(CascadeSpec(levels=2), (30, 30), (7, 15, 0, 30))
    (4, 16, 0, 0)
    """
    y0, y1, x0, x1 = (int(v) for v in box)
    if not (0 <= y0 < y1 <= shape[0] and 0 <= x0 < x1 <= shape[1]):
        raise TesseraInputError(f"core {box} lies beyond a volume of {tuple(shape)}")
    ny, nx = padded_core_shape(spec, shape)
    cy, cx = padded_core_shape(spec, (y1 - y0, x1 - x0))
    grid = spec.align
    return tuple(max(0, v) // grid * grid for v in (y0, ny - y0 - cy, x0, nx - x0 - cx))
