"""Filtering a probability volume into labelled objects: the steps of :mod:`tessera.objects`."""

import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import zarr

from tessera.errors import TesseraInputError
from tessera.objects import _passes
from tessera.objects.depth_limit import split_depth_problem
from tessera.objects.morphology import ball, connectivity_structure, reach
from tessera.objects.split import check_split_depth, check_valley_probability

#: Largest bounding box (voxels) an object is split in. Splitting one box peaks at about 125
#: bytes a voxel (distance, tie-breaker, h-maxima reconstruction and watershed, measured with
#: scikit-image 0.26), so 2**23 voxels (e.g. 64 x 362 x 362) need about 1 GB on top of the
#: rest of the objects job.
SPLIT_MAX_VOXELS = 2**23
# Voxels of one chunk of the scratch label stores at most (1 MiB of int64), where a block's
# divisors allow: objects are read back box by box, and a small box should not decode a chunk
# of a whole block (64 MB at the default block).
SCRATCH_CHUNK_VOXELS = 2**17

#: Columns of the object table, in order.
OBJECT_COLUMNS = (
    "id",
    "voxels",
    "volume_um3",
    "z0",
    "y0",
    "x0",
    "z1",
    "y1",
    "x1",
    "centroid_z_nm",
    "centroid_y_nm",
    "centroid_x_nm",
    "touches_volume_border",
    "touches_excluded_section",
    "cavities_filled",
)


def check_settings(
    *,
    high,
    low,
    min_volume_um3,
    max_volume_um3,
    connectivity,
    split_min_depth_nm=None,
    split_valley_probability=None,
    source=None,
):
    """Refuse inconsistent filtering settings with one clear message (`source` names the file).

    Examples
    --------
    >>> check_settings(high=0.5, low=0.3, min_volume_um3=0, max_volume_um3=None, connectivity=26)
    >>> check_settings(high=0.5, low=0.7, min_volume_um3=0, max_volume_um3=None, connectivity=26)
    Traceback (most recent call last):
    tessera.errors.TesseraInputError: objects threshold low (0.7) must not exceed high (0.5)
    """
    for name, value in (("high", high), ("low", low)):
        if not (isinstance(value, (int, float)) and 0.0 <= value <= 1.0):
            raise TesseraInputError(
                f"objects threshold {name} must be a probability in [0, 1], got {value!r}",
                source=source,
            )
    if low > high:
        raise TesseraInputError(
            f"objects threshold low ({low}) must not exceed high ({high})", source=source
        )
    if min_volume_um3 < 0:
        raise TesseraInputError(
            f"objects min_volume_um3 must be >= 0, got {min_volume_um3}", source=source
        )
    if max_volume_um3 is not None and max_volume_um3 < min_volume_um3:
        raise TesseraInputError(
            f"objects min_volume_um3 ({min_volume_um3}) is larger than max_volume_um3 ({max_volume_um3})",
            source=source,
        )
    connectivity_structure(connectivity)
    if split_min_depth_nm is not None:
        check_split_depth(split_min_depth_nm)
        problem = split_depth_problem(split_min_depth_nm, max_volume_um3)
        if problem:
            raise TesseraInputError(f"objects {problem}", source=source)
    if split_valley_probability is not None:
        check_valley_probability(split_valley_probability)


def label_objects(
    prob,
    out,
    *,
    spacing,
    high,
    low=None,
    open_radius_nm=0.0,
    close_radius_nm=0.0,
    fill_holes=True,
    min_volume_um3=0.0,
    max_volume_um3=None,
    connectivity=26,
    block=(32, 512, 512),
    excluded_sections=(),
    scale=1.0,
    workdir=None,
    fill_max_voxels=None,
    bridge_excluded=True,
    split_min_depth_nm=None,
    split_valley_probability=None,
    split_max_voxels=None,
):
    """Filter a probability volume into labelled objects, block by block.

    Parameters
    ----------
    prob : (Z, Y, X) array-like
        Probabilities times `scale` (a zarr array is read block by block).
    out : (Z, Y, X) writable array
        Receives the labels (uint32 or wider); a zarr array or numpy array.
    spacing : (float, float, float)
        Voxel size z, y, x in nm.
    high, low : float
        Hysteresis thresholds on the probability (low defaults to high).
    open_radius_nm, close_radius_nm : float
        Radii of the opening and the closing (0 = none).
    fill_holes : bool
        Fill enclosed cavities, object by object within its bounding box. Objects whose box
        exceeds `fill_max_voxels` are left unfilled (and flagged ``cavities_filled`` False), so
        that one huge object never loads a huge box.
    fill_max_voxels : int, optional
        Default: 8 blocks' worth of voxels.
    min_volume_um3, max_volume_um3 : float
        Size range kept (max None = no limit).
    connectivity : {6, 18, 26}
    block : (int, int, int)
        Block size of the out-of-core passes (the result does not depend on it).
    excluded_sections : sequence of int
        Sections (z of this volume) excluded by QC; objects touching one are flagged.
    bridge_excluded : bool
        Replace the probabilities of excluded sections by linear interpolation between the
        nearest usable sections above and below before anything else, so that a blank or blurred
        section does not cut every organelle crossing it in two (the object keeps its flag).
    split_min_depth_nm : float, optional
        Separate touching organelles (:mod:`tessera.objects.split`): each kept object is split
        by a seeded watershed on its distance transform in nm, seeded by the maxima that rise
        at least this far (nm) above their saddle with a higher one. A piece smaller than
        `min_volume_um3` is handed to the pieces around it, so no object in the table is
        smaller than that. None = no splitting (the table then has no ``split_checked`` column).
    split_valley_probability : float, optional
        With splitting: the distance is scaled by ``min(p / split_valley_probability, 1)``
        first, so a dip of probability between organelles pressed together (no neck in the
        mask) becomes a saddle that splits them (:func:`tessera.objects.split.valley_height`).
        None = the shape alone decides.
    split_max_voxels : int, optional
        Objects whose bounding box (with one voxel of margin where the volume allows) holds
        more voxels are left whole and flagged
        (``split_checked`` False). Default :data:`SPLIT_MAX_VOXELS`, a fixed number, so that
        which objects are split never depends on the block size.
    scale : float
        Stored value of probability 1 (255 for uint8 maps).
    workdir : path, optional
        Where the temporary provisional labels go (default: the system's temporary folder).

    Returns
    -------
    pandas.DataFrame
        One row per object: ``id``, ``voxels``, ``volume_um3``, bounding box ``z0 y0 x0 z1 y1
        x1`` (voxels, end exclusive), centroid in nm, ``touches_volume_border``,
        ``touches_excluded_section``, ``cavities_filled`` (of the object it was split from) and,
        with splitting, ``split_checked``.

    Examples
    --------
    >>> p = np.zeros((3, 8, 8), np.float32); p[1, 1:3, 1:3] = 0.9; p[1, 5:7, 4:8] = 0.8
    >>> labels = np.zeros(p.shape, np.uint32)
    >>> table = label_objects(p, labels, spacing=(50, 10, 10), high=0.5, block=(2, 4, 4))
    >>> table[["id", "voxels", "touches_volume_border"]].to_dict("list")
    {'id': [1, 2], 'voxels': [4, 8], 'touches_volume_border': [False, True]}
    """
    # Longer than 60 lines only through keyword arguments: the four passes over the volume are
    # in tessera.objects._passes; this function checks the settings and carries each pass's
    # results to the next.
    low = high if low is None else low
    check_settings(
        high=high,
        low=low,
        min_volume_um3=min_volume_um3,
        max_volume_um3=max_volume_um3,
        connectivity=connectivity,
        split_min_depth_nm=split_min_depth_nm,
        split_valley_probability=split_valley_probability,
    )
    shape = tuple(int(s) for s in prob.shape)
    if len(shape) != 3 or tuple(out.shape) != shape:
        raise TesseraInputError(
            f"probability and label volumes must be 3D of one shape, got {shape}, {out.shape}"
        )
    block = tuple(int(b) for b in block)
    structure = connectivity_structure(connectivity)
    opening, closing = ball(open_radius_nm, spacing), ball(close_radius_nm, spacing)
    voxel_nm3 = float(np.prod(spacing))
    excluded = np.array(sorted(int(z) for z in excluded_sections), dtype=np.int64)

    bridge = _passes.bridging_plan(excluded if bridge_excluded else (), shape[0])
    with tempfile.TemporaryDirectory(dir=workdir, prefix="tessera-labels-") as tmp:
        provisional = zarr.create_array(
            store=str(Path(tmp) / "provisional.zarr"),
            shape=shape,
            dtype=np.int64,
            chunks=scratch_chunks(block, shape),
            fill_value=0,
            zarr_format=3,
        )
        stats, offset = _passes.provisional_labels(
            prob,
            provisional,
            shape=shape,
            block=block,
            halo=2 * reach(opening) + 2 * reach(closing),
            bridge=bridge,
            scale=scale,
            thresholds=(low, high),
            morphology=(opening, closing),
            structure=structure,
            excluded=excluded,
        )
        n_comp, component = _passes.merge_across_faces(
            provisional, shape=shape, block=block, structure=structure, offset=offset
        )
        objects = stats.merged(component, n_comp) if offset else None
        kept = np.flatnonzero(objects["seeded"]) if offset else np.zeros(0, np.int64)
        cavities, unfilled = {}, set()
        fill_max_voxels = fill_max_voxels or 8 * int(np.prod(block))
        if fill_holes:
            cavities, unfilled = _passes.fill_cavities(
                provisional,
                objects,
                component,
                kept,
                offset=offset,
                shape=shape,
                structure=structure,
                excluded=excluded,
                voxel_nm3=voxel_nm3,
                max_volume_um3=max_volume_um3,
                fill_max_voxels=fill_max_voxels,
            )
        volume, kept, final = _passes.number_objects(
            objects,
            kept,
            offset=offset,
            n_comp=n_comp,
            voxel_nm3=voxel_nm3,
            size_range=(min_volume_um3, max_volume_um3),
        )
        units = _whole_objects(
            objects, kept, final, volume, fill_holes=fill_holes, unfilled=unfilled
        )
        pieces = None
        if split_min_depth_nm is not None and not len(kept):
            units["split_checked"] = np.zeros(0, bool)
        elif split_min_depth_nm is not None:
            units, final, pieces = _split_objects(
                Path(tmp),
                provisional,
                component,
                kept,
                objects,
                cavities,
                shape=shape,
                block=block,
                split=dict(
                    spacing=spacing,
                    min_depth_nm=split_min_depth_nm,
                    structure=structure,
                    valley_probability=split_valley_probability,
                    min_volume_um3=min_volume_um3,
                ),
                # the probabilities the mask was made from (excluded sections bridged alike)
                probability=None
                if split_valley_probability is None
                else lambda lo, hi: _passes.read_bridged(prob, lo, hi, bridge, scale),
                excluded=excluded,
                max_voxels=split_max_voxels or SPLIT_MAX_VOXELS,
                voxel_nm3=voxel_nm3,
                flags=(fill_holes, unfilled),
            )
        lut = np.concatenate([[0], final[component]]) if offset else np.zeros(1, np.int64)
        if len(units["id"]) > np.iinfo(out.dtype).max:
            raise TesseraInputError(
                f"{len(units['id'])} objects do not fit label dtype {out.dtype}"
            )
        _passes.write_labels(
            out, provisional, lut, final, cavities, shape=shape, block=block, pieces=pieces
        )
    return _object_table(units, spacing=spacing, shape=shape)


def scratch_chunks(block, shape):
    """Chunks of the scratch label stores: the block clipped to the volume, halved along its
    longest even axis until a chunk holds at most :data:`SCRATCH_CHUNK_VOXELS` voxels.

    Every chunk divides the block (or the volume where the block is larger), so the passes
    still write whole chunks; only how the scratch is stored changes, never a label.

    Examples
    --------
    >>> scratch_chunks((32, 512, 512), (64, 256, 256))
    (32, 64, 64)
    >>> scratch_chunks((3, 5, 7), (100, 100, 100))
    (3, 5, 7)
    """
    chunks = [min(int(b), int(s)) for b, s in zip(block, shape, strict=True)]
    while np.prod(chunks) > SCRATCH_CHUNK_VOXELS:
        even = [a for a in range(len(chunks)) if chunks[a] % 2 == 0]
        if not even:
            break
        axis = max(even, key=lambda a: chunks[a])
        chunks[axis] //= 2
    return tuple(chunks)


def _whole_objects(objects, kept, final, volume, *, fill_holes, unfilled):
    """The measures of the kept components, in label order (no splitting)."""
    if not len(kept):
        return {"id": np.zeros(0, np.int64)}
    units = {name: objects[name][kept] for name in ("voxels", "sums", "lo", "hi", "excluded")}
    units["id"], units["volume_um3"] = final[kept], volume[kept]
    units["cavities_filled"] = np.array([fill_holes and int(c) not in unfilled for c in kept])
    return units


def _split_objects(tmp, provisional, component, kept, objects, cavities, **options):
    """Pass 4 and the numbering with pieces: the objects' measures in label order, the final
    label of every whole component, and ``(pieces_store, piece_final)`` for the last pass."""
    shape, block = options["shape"], options["block"]
    fill_holes, unfilled = options["flags"]
    pieces_store = zarr.create_array(
        store=str(tmp / "pieces.zarr"),
        shape=shape,
        dtype=np.int64,
        chunks=scratch_chunks(block, shape),
        fill_value=0,
        zarr_format=3,
    )
    parts, unchecked = _passes.split_components(
        provisional,
        pieces_store,
        component,
        kept,
        objects,
        cavities,
        shape=shape,
        split=options["split"],
        excluded=options["excluded"],
        max_voxels=options["max_voxels"],
        probability=options["probability"],
    )
    units, final, piece_final = _passes.number_with_pieces(
        objects, kept, parts, voxel_nm3=options["voxel_nm3"]
    )
    units["id"] = np.arange(1, len(units["voxels"]) + 1, dtype=np.int64)
    units["cavities_filled"] = np.array(
        [fill_holes and int(c) not in unfilled for c in units["component"]], dtype=bool
    )
    units["split_checked"] = np.array([int(c) not in unchecked for c in units["component"]])
    return units, final, (pieces_store, piece_final)


def _object_table(units, *, spacing, shape):
    """One row per object, in label order, with the columns of :data:`OBJECT_COLUMNS` (and
    ``split_checked`` when objects were split)."""
    columns = list(OBJECT_COLUMNS) + (["split_checked"] if "split_checked" in units else [])
    rows = []
    for k in range(len(units["id"])):
        lo_, hi_ = units["lo"][k], units["hi"][k]
        centroid = units["sums"][k] / units["voxels"][k] * np.asarray(spacing)
        row = {
            "id": int(units["id"][k]),
            "voxels": int(units["voxels"][k]),
            "volume_um3": float(units["volume_um3"][k]),
            "z0": int(lo_[0]),
            "y0": int(lo_[1]),
            "x0": int(lo_[2]),
            "z1": int(hi_[0]),
            "y1": int(hi_[1]),
            "x1": int(hi_[2]),
            "centroid_z_nm": float(centroid[0]),
            "centroid_y_nm": float(centroid[1]),
            "centroid_x_nm": float(centroid[2]),
            "touches_volume_border": bool((lo_ == 0).any() or (hi_ == np.asarray(shape)).any()),
            "touches_excluded_section": bool(units["excluded"][k]),
            "cavities_filled": bool(units["cavities_filled"][k]),
        }
        if "split_checked" in units:
            row["split_checked"] = bool(units["split_checked"][k])
        rows.append(row)
    return pd.DataFrame(rows, columns=columns)


def subsample_labels(source, target, *, factor, band=512):
    """``target = source[::fz, ::fy, ::fx]``, read one band of rows of one section at a time.

    Labels cannot be averaged, so a coarser label level takes every f-th voxel and its first
    voxel sits on the first voxel of `source`.

    Parameters
    ----------
    source : (Z, Y, X) array-like
        Labels (a zarr array is read band by band).
    target : (Z', Y', X') writable array
        ``ceil(source.shape / factor)`` voxels.
    factor : (int, int, int)
        Reduction along z, y, x.
    band : int
        Rows of `target` read and written at once.

    Examples
    --------
    >>> source = np.arange(3 * 5 * 5).reshape(3, 5, 5)
    >>> target = np.zeros((2, 3, 3), source.dtype)
    >>> subsample_labels(source, target, factor=(2, 2, 2), band=2)
    >>> np.array_equal(target, source[::2, ::2, ::2])
    True
    """
    fz, fy, fx = factor
    for oz in range(target.shape[0]):
        for oy in range(0, target.shape[1], band):
            rows = np.asarray(source[oz * fz, oy * fy : min((oy + band) * fy, source.shape[1]), :])
            target[oz, oy : oy + band, :] = rows[::fy, ::fx][: target.shape[1] - oy]
