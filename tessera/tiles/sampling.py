"""Annotation tiles cut from full label volumes: where they go and what they hold."""

import zlib

import numpy as np
import pandas as pd

from tessera.block_reduce import block_mean
from tessera.errors import TesseraInputError
from tessera.tiles.checks import as_int, check_factors, safe_tile_id
from tessera.tiles.registry import validate_registry

__all__ = [
    "ANNOTATED_SECTIONS",
    "annotated_working_sections",
    "labels_to_target_mask",
    "level_shape",
    "sample_tiles_from_labels",
    "unannotated_sections",
]

#: Which sections of a label volume count as annotated (``targets.<t>.annotations.sections``):
#: every one, or only those holding a target voxel.
ANNOTATED_SECTIONS = ("all", "labelled")


def unannotated_sections(labels, *, sections="all"):
    """Level-0 sections of a label volume that count as not annotated, ascending.

    Parameters
    ----------
    labels : ndarray
        ``(P, M, N)`` label volume, > 0 = target.
    sections : {'all', 'labelled'}, optional
        ``'all'``: every section is annotated, and 0 is background wherever it stands.
        ``'labelled'``: only the sections holding a target voxel are; the others (a volume
        annotated on some sections only, the rest left 0) are neither sampled nor scored. A
        section truly without the target is then left out too, the price of telling the two
        apart without a record of which sections were painted.

    Returns
    -------
    list of int

    Examples
    --------
    >>> lab = np.zeros((4, 3, 3), dtype=np.uint8); lab[1, 1, 1] = lab[3, 0, 0] = 2
    >>> unannotated_sections(lab, sections="labelled")
    [0, 2]
    >>> unannotated_sections(lab)
    []
    """
    if sections not in ANNOTATED_SECTIONS:
        raise TesseraInputError(
            f"sections must be one of {', '.join(ANNOTATED_SECTIONS)}, got {sections!r}"
        )
    labels = np.asarray(labels)
    if labels.ndim != 3:
        raise TesseraInputError(f"expected 3D (z, y, x) labels, got shape {labels.shape}")
    if sections == "all":
        return []
    labelled = labels.reshape(labels.shape[0], -1).any(axis=1)
    return [int(z) for z in np.flatnonzero(~labelled)]


def annotated_working_sections(n_sections, unannotated, z_factor):
    """Working-level sections whose every level-0 section is annotated.

    A working-level section averages `z_factor` level-0 sections (a pyramid reduced in z);
    its labels are whole only when each of them is annotated.

    Examples
    --------
    Labels on every other section of 8, at a working level averaging pairs: no pair is whole.

    >>> annotated_working_sections(8, [0, 2, 4, 6], 2)
    []
    >>> annotated_working_sections(8, [0, 1, 6], 2)
    [1, 2]
    """
    skip = set(int(z) for z in unannotated)
    working = -(-int(n_sections) // int(z_factor))
    return [
        w
        for w in range(working)
        if not any(z in skip for z in range(w * z_factor, min((w + 1) * z_factor, n_sections)))
    ]


def labels_to_target_mask(labels, *, factors, threshold=0):
    """Binary target mask at a reduced level, by block majority.

    Parameters
    ----------
    labels : ndarray
        ``(P, M, N)`` level-0 labels; any integer (or bool) dtype. Voxels with a value above
        `threshold` are target.
    factors : sequence of 3 int
        Reduction (z, y, x) of the working level.
    threshold : int, optional
        0 for label volumes (any non-zero label is target); 127 for 8-bit binary images with
        anti-aliased edges.

    Returns
    -------
    ndarray of uint8
        ``ceil(shape / factors)`` mask, 1 where more than half of the block's voxels are
        target (``block_mean`` of the binary mask > 0.5; a tie is background).

    Examples
    --------
    >>> lab = np.array([[[0, 3, 3, 3], [0, 0, 3, 0]]], dtype=np.uint16)
    >>> labels_to_target_mask(lab, factors=(1, 2, 2))
    array([[[0, 1]]], dtype=uint8)
    """
    labels = np.asarray(labels)
    if labels.ndim != 3:
        raise TesseraInputError(f"expected 3D (z, y, x) labels, got shape {labels.shape}")
    if not (np.issubdtype(labels.dtype, np.integer) or labels.dtype == bool):
        raise TesseraInputError(f"expected integer labels, got {labels.dtype}")
    factors = check_factors(factors)
    binary = labels > threshold
    if factors == (1, 1, 1):
        return binary.astype(np.uint8)
    return (block_mean(binary, factors) > 0.5).astype(np.uint8)


def _tile_mask(label_source, z, y0, x0, height, width, factors, threshold):
    """Working-level mask of one tile, reading only its level-0 region."""
    fz, fy, fx = factors
    nz, ny, nx = label_source.shape
    region = label_source[
        z * fz : min((z + 1) * fz, nz),
        y0 * fy : min((y0 + height) * fy, ny),
        x0 * fx : min((x0 + width) * fx, nx),
    ]
    return labels_to_target_mask(np.asarray(region), factors=factors, threshold=threshold)[0]


def sample_tiles_from_labels(
    label_source,
    *,
    dataset,
    target,
    level,
    factors,
    size,
    count,
    seed,
    exclude_z=(),
    min_fraction=0.0,
    threshold=0,
    max_tries=200,
    allow_fewer=False,
):
    """Sample annotation tiles from a full label volume.

    Parameters
    ----------
    label_source : zarr.Array or ndarray
        ``(P, M, N)`` level-0 labels (z, y, x); only the sampled regions are read.
    dataset, target : str
        Names recorded in the registry.
    level : int
        Working level index, recorded in the registry.
    factors : sequence of 3 int
        Reduction of the working level (z, y, x).
    size : int
        Tile side at the working level.
    count : int
        Number of tiles.
    seed : int
        Seed, mixed with `dataset` and `target` so that stacks of the same shape are not
        sampled at the same places; the same inputs and seed give the same tiles.
    exclude_z : iterable of int, optional
        Level-0 sections never to sample (QC-flagged); a working-level section is skipped when
        any level-0 section it averages is excluded.
    min_fraction : float, optional
        Minimum target fraction of a tile (ignored pixels do not exist here).
    threshold : int, optional
        Target is ``label > threshold`` (see :func:`labels_to_target_mask`).
    max_tries : int, optional
        Random positions tried per tile before giving up.
    allow_fewer : bool, optional
        When no allowed section can take the next tile, return the tiles placed so far (at
        least one) instead of raising.

    Returns
    -------
    registry : pandas.DataFrame
        Source ``"labels"``; tile ids ``<dataset>-<target>-s<NNN>`` (sanitised).
    labels : dict of str to ndarray
        ``(size, size)`` uint8 masks of 0 and 1.

    Notes
    -----
    Sections are used in turn from a seeded permutation of the allowed sections, so tiles
    spread evenly over z; a section that cannot take a tile (no room, or no position reaching
    `min_fraction` in `max_tries` tries) passes its turn to the next one. Within a section
    positions are uniform and tiles on the same section do not overlap. Tiles lie wholly
    inside the working-level grid.

    Examples
    --------
    >>> lab = np.zeros((4, 32, 32), dtype=np.uint8); lab[:, 8:24, 8:24] = 1
    >>> reg, masks = sample_tiles_from_labels(lab, dataset="d", target="m", level=1,
    ...     factors=(1, 2, 2), size=8, count=3, seed=0, exclude_z=[2])
    >>> sorted(reg["z"].tolist()), masks[reg.loc[0, "tile_id"]].shape
    ([0, 1, 3], (8, 8))

    Sections of 16 x 16 working pixels hold one tile of 12 each:

    >>> reg, _ = sample_tiles_from_labels(lab, dataset="d", target="m", level=1,
    ...     factors=(1, 2, 2), size=12, count=6, seed=0, allow_fewer=True)
    >>> len(reg)
    4
    """
    shape0, level, factors, size, count, seed, max_tries, min_fraction = _sampling_options(
        label_source, dataset, target, level, factors, size, count, seed, max_tries, min_fraction
    )
    allowed, ny, nx = _allowed_sections(shape0, factors, level, size, exclude_z)
    # a stream of its own per dataset and target (the split draws from another one)
    rng = np.random.default_rng([seed, zlib.crc32(f"tiles\t{dataset}\t{target}".encode())])
    order = [int(z) for z in rng.permutation(allowed)]
    prefix = safe_tile_id(f"{dataset}-{target}")
    rows, masks = [], {}
    for i in range(count):
        placed = None
        # The section whose turn it is first; if it cannot take the tile, the following ones.
        for k in range(len(order)):
            z = order[(i + k) % len(order)]
            placed = _place_tile(
                label_source,
                rng,
                rows,
                z,
                ny,
                nx,
                size,
                factors,
                threshold,
                min_fraction,
                max_tries,
            )
            if placed is not None:
                break
        if placed is None and allow_fewer and rows:
            break
        if placed is None:
            wanted = f", target fraction >= {min_fraction}" if min_fraction > 0 else ""
            raise TesseraInputError(
                f"could not place tile {i + 1} of {count} on the {len(allowed)} allowed "
                f"level-{level} section(s) in {max_tries} tries each (non-overlapping{wanted}); "
                f"lower count or size{', or the target fraction' if wanted else ''}"
            )
        y0, x0, mask = placed
        tid = f"{prefix}-s{i + 1:03d}"
        rows.append(
            {
                "tile_id": tid,
                "dataset": dataset,
                "target": target,
                "level": level,
                "z": z,
                "y0": y0,
                "x0": x0,
                "height": size,
                "width": size,
                "source": "labels",
            }
        )
        masks[tid] = mask
    return validate_registry(pd.DataFrame(rows)), masks


def _sampling_options(
    label_source, dataset, target, level, factors, size, count, seed, max_tries, min_fraction
):
    """The checked options of :func:`sample_tiles_from_labels`, with the level-0 shape."""
    for key, value in (("dataset", dataset), ("target", target)):
        if not isinstance(value, str) or not value:
            raise TesseraInputError(f"{key} must be a non-empty string, got {value!r}")
    shape0 = tuple(int(s) for s in label_source.shape)
    if len(shape0) != 3:
        raise TesseraInputError(f"expected 3D (z, y, x) labels, got shape {shape0}")
    level = as_int(level, low=0, where="level", source=None)
    factors = check_factors(factors)
    size = as_int(size, low=1, where="size", source=None)
    count = as_int(count, low=1, where="count", source=None)
    seed = as_int(seed, low=0, where="seed", source=None)
    max_tries = as_int(max_tries, low=1, where="max_tries", source=None)
    try:
        min_fraction = float(min_fraction)
    except (TypeError, ValueError):
        raise TesseraInputError(f"min_fraction must be a number, got {min_fraction!r}") from None
    if not 0.0 <= min_fraction <= 1.0:
        raise TesseraInputError(f"min_fraction must be within [0, 1], got {min_fraction}")
    return shape0, level, factors, size, count, seed, max_tries, min_fraction


def level_shape(shape0, factors):
    """The shape of a level reduced by `factors` from level-0 `shape0`: each axis rounded up,
    as the pyramid keeps a partial block at the far edge.

    Examples
    --------
    >>> level_shape((16, 401, 500), (1, 2, 2))
    (16, 201, 250)
    """
    return tuple(-(-int(s) // int(f)) for s, f in zip(shape0, factors, strict=True))


def _allowed_sections(shape0, factors, level, size, exclude_z):
    """Working-level sections free of excluded level-0 ones, and the level's rows and columns."""
    excluded = {as_int(z, low=0, where="exclude_z", source=None) for z in exclude_z}
    nz, ny, nx = level_shape(shape0, factors)
    if size > ny or size > nx:
        raise TesseraInputError(
            f"size {size} exceeds the level-{level} section ({ny} x {nx} pixels)"
        )
    fz = factors[0]
    allowed = [
        z
        for z in range(nz)
        if not any(z0 in excluded for z0 in range(z * fz, min((z + 1) * fz, shape0[0])))
    ]
    if not allowed:
        raise TesseraInputError(
            f"every level-{level} section averages an excluded level-0 section ({len(excluded)} "
            f"of {shape0[0]} excluded); nothing to sample from"
        )
    return allowed, ny, nx


def _place_tile(
    label_source, rng, rows, z, ny, nx, size, factors, threshold, min_fraction, max_tries
):
    """A random tile position on section z: (y0, x0, mask), or None after `max_tries`."""
    taken = [(r["y0"], r["x0"]) for r in rows if r["z"] == z]
    for _ in range(max_tries):
        y0 = int(rng.integers(0, ny - size + 1))
        x0 = int(rng.integers(0, nx - size + 1))
        if any(abs(y0 - ty) < size and abs(x0 - tx) < size for ty, tx in taken):
            continue
        mask = _tile_mask(label_source, z, y0, x0, size, size, factors, threshold)
        if min_fraction > 0 and mask.mean() < min_fraction:
            continue
        return y0, x0, mask
    return None
