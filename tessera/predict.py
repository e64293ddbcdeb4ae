"""Sharded prediction of whole volumes: block geometry and block prediction.

A volume at a target's working level is cut into *blocks* (cores that tile the volume without
overlap). Each block is predicted from a window that adds a halo of the cascade's receptive
radius around its core, mirrored beyond the volume, so a core's probabilities depend on nothing
outside its window. Block origins in y and x are multiples of 2^L (L = the cascade's levels), so
every coarse level of a block lies on the same grid as for the whole volume: stitched cores then
equal the prediction of the volume in one piece, whatever the block size.

Work is shared among a fixed number of *shard jobs* per dataset and target (a contiguous run of
blocks each), so the workflow's job count does not grow with the volume. The jobs
(``tessera.workflow.jobs.predict``) write each block with a checksummed manifest; the stitch
checks every block against the plan and the manifest before it copies it into the OME-Zarr
probability map, which it alone writes (one writer per zarr chunk).
"""

import numpy as np

from tessera.cascade.api import (
    cascade_spec,
    mirrored_block,
    mix_sections,
    predict_frames,
    receptive_radius,
    sections_reach,
    volume_room,
    z_halo,
)
from tessera.errors import TesseraInputError
from tessera.probability_encoding import encode_probability, stored_dtype


def _axis_step(n, most, align):
    """Block size along an axis of `n` px: the fewest blocks of at most `most` px, of nearly
    equal size, on the `align` grid (never more than the axis needs)."""
    count = -(-n // most)
    share = -(-n // count)
    return min(-(-share // align) * align, n)


def plan_shards(shape, *, block, halo, align, jobs, max_halo=None):
    """Cut a (Z, Y, X) volume into blocks and share them among `jobs` jobs.

    Blocks are sized to the volume: along each axis the volume is cut into the fewest blocks
    no larger than `block`, of nearly equal size (y and x on the `align` grid), so no thin
    strip of blocks reads a whole halo for a few pixels and no block is larger than the volume.
    A volume with fewer blocks than jobs is cut thinner in z (sections do not depend on each
    other's halo), so every job gets work; where the blocks would share unevenly among the jobs
    (3 blocks for 2 jobs), z is cut into up to twice as many slabs if that evens them out.
    None of this changes a voxel of the result.

    Parameters
    ----------
    shape : (int, int, int)
        Volume shape at the working level.
    block : (int, int, int)
        Largest core per block, z y x (y and x rounded up to multiples of `align`); memory
        grows with it. Each block's sections are read with the halo in y and x, once per block:
        fewer, larger blocks in-plane read less halo.
    halo : int
        In-plane halo (pixels of the working level) each block is read with: the model's
        receptive radius (:func:`shard_halo`).
    align : int
        Block origins in y and x are multiples of this (2^L for an L-level cascade).
    jobs : int
        Number of shard jobs; each gets a contiguous run of blocks (possibly none, when the
        volume has fewer sections than jobs).
    max_halo : int, optional
        Refuse a model whose halo is larger (it would make every block mostly halo).

    Returns
    -------
    dict
        ``shape``, ``block`` (the largest block as used), ``halo``, ``align``, ``blocks`` (list
        of ``[z0, z1, y0, y1, x0, x1]``) and ``jobs`` (list of lists of block indices).

    Examples
    --------
    >>> plan = plan_shards((3, 100, 60), block=(2, 64, 64), halo=16, align=4, jobs=2)
    >>> plan["block"]
    [2, 52, 60]
    >>> plan["blocks"]
    [[0, 2, 0, 52, 0, 60], [0, 2, 52, 100, 0, 60], [2, 3, 0, 52, 0, 60], [2, 3, 52, 100, 0, 60]]
    >>> plan["jobs"]
    [[0, 1], [2, 3]]
    """
    shape = tuple(int(s) for s in shape)
    if len(shape) != 3 or min(shape) < 1:
        raise TesseraInputError(f"volume shape must be 3 positive integers, got {shape}")
    block = [int(b) for b in block]
    if len(block) != 3 or min(block) < 1:
        raise TesseraInputError(f"predict.block must be 3 positive integers (z, y, x), got {block}")
    if not isinstance(jobs, int) or jobs < 1:
        raise TesseraInputError(f"predict.shard_jobs must be an integer >= 1, got {jobs!r}")
    if max_halo is not None and halo > max_halo:
        raise TesseraInputError(
            f"the model's receptive field needs a halo of {halo} px, more than predict.max_halo = {max_halo}; "
            "use fewer levels, smaller sigmas or stencil radii, or raise predict.max_halo"
        )
    problem = block_halo_problem(block, halo)
    if problem:
        raise TesseraInputError(problem)
    ny, nx = (_axis_step(n, -(-b // align) * align, align) for n, b in zip(shape[1:], block[1:]))
    in_plane = -(-shape[1] // ny) * -(-shape[2] // nx)
    z_count = max(-(-shape[0] // block[0]), min(shape[0], -(-jobs // in_plane)))
    steps = [_balanced_z_step(shape[0], z_count, in_plane, jobs), ny, nx]
    blocks = []
    for z0 in range(0, shape[0], steps[0]):
        for y0 in range(0, shape[1], ny):
            for x0 in range(0, shape[2], nx):
                blocks.append(
                    [
                        z0,
                        min(z0 + steps[0], shape[0]),
                        y0,
                        min(y0 + ny, shape[1]),
                        x0,
                        min(x0 + nx, shape[2]),
                    ]
                )
    n = len(blocks)
    shares = [list(range(j * n // jobs, (j + 1) * n // jobs)) for j in range(jobs)]
    return {
        "shape": list(shape),
        "block": steps,
        "halo": int(halo),
        "align": int(align),
        "blocks": blocks,
        "jobs": shares,
    }


def block_halo_problem(block, halo):
    """Why blocks of `block` cannot be read with `halo`: smaller in y or x than it, or None.

    Such a block would read more halo than core. Refused by :func:`plan_shards`, and by the
    workflow when it loads, for the halo a target's cascade settings give (:func:`shard_halo`).

    Parameters
    ----------
    block : sequence of int
        ``predict.block``, z y x.
    halo : int
        In-plane halo, pixels of the working level.

    Returns
    -------
    str or None

    Examples
    --------
    >>> block_halo_problem([1, 64, 48], 40) is None
    True
    >>> block_halo_problem([1, 64, 32], 40)
    "predict.block [1, 64, 32] is smaller in y or x than the model's halo of 40 px: every block would read more halo than core; use blocks of at least 40 px (a few times more is efficient)"
    """
    block = [int(b) for b in block]
    if min(block[1:]) >= halo:
        return None
    return (
        f"predict.block {block} is smaller in y or x than the model's halo of {halo} px: every "
        f"block would read more halo than core; use blocks of at least {halo} px (a few times "
        "more is efficient)"
    )


def _balanced_z_step(depth, slabs, in_plane, jobs):
    """Sections per slab for `slabs` slabs of a volume `depth` sections deep, or for up to twice
    as many where that shares the blocks evenly among `jobs` and `slabs` would leave the
    busiest job a fifth or more above the mean (3 blocks for 2 jobs: one job would take 2).

    Examples
    --------
    >>> _balanced_z_step(82, 3, 1, 2)  # 4 slabs of 21 rather than 3 of 28 for 2 jobs
    21
    >>> _balanced_z_step(82, 3, 1, 7)  # no count up to 6 shares evenly among 7 jobs
    28
    >>> _balanced_z_step(7, 3, 9, 4)  # 27 blocks for 4 jobs: 7 at most, near the mean
    3
    """
    step = -(-depth // slabs)
    blocks = -(-depth // step) * in_plane
    if -(-blocks // jobs) < 1.2 * blocks / jobs:
        return step
    for count in range(slabs + 1, min(depth, 2 * slabs) + 1):
        even = -(-depth // count)
        if -(-depth // even) * in_plane % jobs == 0:
            return even
    return step


def halo_overhead(plan):
    """Pixels each section of the plan's blocks is classified over, per pixel of the volume.

    A block classifies its core and the part of its halo inside the volume (beyond the volume
    the maps are mirrored, not computed): the cost of exact block-wise prediction, paid once
    per block and section. A volume in one block pays none.

    Examples
    --------
    >>> plan = {"shape": [1, 100, 100], "halo": 50, "align": 4}
    >>> halo_overhead({**plan, "blocks": [[0, 1, 0, 100, 0, 100]]})
    1.0
    >>> halo_overhead({**plan, "blocks": [[0, 1, 0, 52, 0, 100], [0, 1, 52, 100, 0, 100]]})
    1.98
    """
    align, halo = plan["align"], plan["halo"]
    ny, nx = (-(-n // align) * align for n in plan["shape"][1:])
    window = 0
    for z0, z1, y0, y1, x0, x1 in plan["blocks"]:
        cy, cx = (-(-(b - a) // align) * align for a, b in ((y0, y1), (x0, x1)))
        rows = min(halo, y0) + cy + min(halo, ny - y0 - cy)
        cols = min(halo, x0) + cx + min(halo, nx - x0 - cx)
        window += (z1 - z0) * rows * cols
    return window / float(np.prod(plan["shape"]))


def shard_halo(spec, *, output_sigma=0.0):
    """The halo every block of a whole-volume prediction is read with: the receptive radius.

    Derived once, when the shard plan is made; the shard jobs read it from the plan.

    Examples
    --------
    >>> from tessera.cascade.api import CascadeSpec
    >>> spec = CascadeSpec(stages=1, levels=0, sigmas=(1.0,))
    >>> shard_halo(spec) == receptive_radius(spec)
    True
    """
    return receptive_radius(spec, output_sigma=output_sigma)


def plan_fits_cascade(plan, spec):
    """Whether a shard plan's halo and block alignment are those of cascade `spec`."""
    halo = shard_halo(spec, output_sigma=plan.get("output_sigma", 0.0))
    return halo == plan["halo"] and spec.align == plan["align"]


def block_read_bytes(spec, shape, *, halo, itemsize=1, output_sigma_z=0.0):
    """Bytes :func:`predict_block` holds for its image beyond what one frame counts itself.

    A block of `shape` (z, y, x) is read once with `halo` pixels in plane and the cascade's
    ``z_halo`` sections on each side (and, with smoothing across sections, the sections that
    smoothing reads): the raw values (`itemsize` bytes each) and their mirrored copy, which
    every frame takes a view of. A frame counts its own window of ``2 z_halo + 1`` sections
    (:func:`tessera.cascade.api.frame_memory_bytes`); the rest is counted here, with the
    float32 maps held for the smoothing across sections.

    Examples
    --------
    >>> from tessera.cascade.api import CascadeSpec
    >>> spec = CascadeSpec(stages=1, levels=0, sigmas=(1.0,))
    >>> block_read_bytes(spec, (3, 10, 10), halo=0)  # 2 x 3 sections of uint8, less the frame's 1
    500
    """
    z, y, x = (int(v) for v in shape)
    reach = sections_reach(output_sigma_z)
    sections = z + 2 * reach + 2 * z_halo(spec)
    pixels = (y + 2 * int(halo)) * (x + 2 * int(halo))
    # the raw read is freed once mirrored (where the block crosses an edge): counting both
    # keeps the figure an upper bound without following the order of events
    held_maps = (2 * reach + 1) * y * x * 4 if reach else 0
    return pixels * itemsize * (2 * sections - (2 * z_halo(spec) + 1)) + held_maps


def predict_block(
    models, volume, box, *, halo=None, output_sigma=0.0, output_sigma_z=0.0, dtype="float32"
):
    """Probabilities of the core `box` = (z0, z1, y0, y1, x0, x1) of a (Z, Y, X) volume.

    The block's sections and the cascade's ``z_halo`` sections on each side (mirrored beyond the
    first and last section) are read once, with a halo of the receptive radius in plane
    (mirrored beyond the volume; a shard plan's ``halo``, or :func:`shard_halo` when not given),
    and kept in their stored dtype (uint8 after ingest: a quarter of float32, and the filter
    banks convert only what they read, exactly); each section is predicted from a view of that
    stack with
    :func:`tessera.cascade.api.predict_frames` (consecutive sections share the maps of the
    sections around them). `volume` may be a zarr array. Each section's float32 map is stored
    as `dtype` (:func:`tessera.probability_encoding.encode_probability`: uint8 round(255 p),
    float16 or float32) as soon as it is made, so the block is held in that dtype only.

    With `output_sigma_z` (σ in sections) the maps are smoothed across sections
    (:mod:`tessera.cascade.across_sections`): the block also predicts the sections within that
    smoothing's reach above and below it that lie inside the volume, holds the few maps the
    smoothing reads at a time, and stores each section once its smoothed map is complete.
    """
    spec = cascade_spec(models)
    halo = shard_halo(spec, output_sigma=output_sigma) if halo is None else halo
    z0, z1, y0, y1, x0, x1 = (int(v) for v in box)
    sections = z_halo(spec)
    reach = sections_reach(output_sigma_z)
    n_sections = volume.shape[0]
    # sections whose maps the block computes: its own and, inside the volume, those its
    # smoothing across sections reads (beyond the volume the maps are mirrored, not computed)
    first, last = max(z0 - reach, 0), min(z1 + reach, n_sections)
    # one read for the whole block: a 3D cascade reads tens of sections around each section,
    # and consecutive sections' windows overlap in all but one of them
    stack = mirrored_block(
        volume, first - sections, last + sections, y0 - halo, y1 + halo, x0 - halo, x1 + halo
    )
    windows = (stack[k : k + 2 * sections + 1] for k in range(last - first))
    out = np.empty((z1 - z0, y1 - y0, x1 - x0), dtype=stored_dtype(dtype))
    room = volume_room(spec, volume.shape[1:], (y0, y1, x0, x1))
    maps = predict_frames(models, windows, (y1 - y0, x1 - x0), output_sigma=output_sigma, room=room)
    if not reach:
        for k, prob in enumerate(maps):
            out[k] = encode_probability(prob, dtype)
        return out
    held, z = {}, z0
    for k, prob in enumerate(maps):
        held[first + k] = prob
        # every section whose smoothing reads no section beyond those made so far
        while z < z1 and min(z + reach, n_sections - 1) <= first + k:
            out[z - z0] = encode_probability(
                mix_sections(held.__getitem__, z, output_sigma_z, n_sections), dtype
            )
            z += 1
            # later sections read nothing below z - reach (mirrored ones lie above it)
            for old in [s for s in held if s < z - reach]:
                del held[old]
    return out
