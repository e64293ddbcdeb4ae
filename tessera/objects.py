"""From a probability map to globally labelled objects, block by block.

The steps, in order (every one defined on the whole volume, computed out of core):

1. *Mask*: voxels with probability >= `low`.
2. *Morphology*: binary opening then closing with an ellipsoid of the given radius in nm (round
   in physical space, so anisotropic voxels get fewer voxels along z). Outside the volume counts
   as background for the opening and as foreground for the closing, so objects cut by the
   volume edge are neither eroded nor grown there.
3. *Hysteresis*: keep the connected components of the mask that hold at least one voxel with
   probability >= `high` (``low == high`` is a plain global threshold).
4. *Holes*: background cavities enclosed by one object (6-connected background) are filled,
   unless filling would touch another object.
5. *Size*: objects with a volume outside [`min_volume_um3`, `max_volume_um3`] are removed, by
   their whole volume (an object spanning many blocks is measured once).
6. *Labels*: objects are numbered 1..N in raster order of their first voxel, which is what
   ``scipy.ndimage.label`` does on a volume held in memory.

Out of core: each block is read with a halo of the morphology's reach, labelled on its own, and
labels that touch across block faces (with the stated connectivity) are merged with a graph's
connected components (``scipy.sparse.csgraph``, a union-find in effect). Memory grows with the
block size and the number of objects, never with the volume.
"""

import json
import logging
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import zarr
from scipy import ndimage
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from tessera.errors import TesseraInputError
from tessera.io.atomic import atomic_path, write_table, write_text
from tessera.io.omezarr import AXES, multiscale_attrs, open_image
from tessera.io.store_checksums import record_checksums, verified_bytes
from tessera.pyramid import link_tree
from tessera.threshold import apply_threshold
from tessera.workflow.files.qc_table import excluded_sections
from tessera.workflow.files.scores import validation_threshold

CONNECTIVITY = {6: 1, 18: 2, 26: 3}  # neighbours in 3D -> rank of scipy's binary structure
_log = logging.getLogger(__name__)


def connectivity_structure(connectivity):
    """The 3 x 3 x 3 neighbourhood of 6-, 18- or 26-connectivity.

    Examples
    --------
    >>> int(connectivity_structure(6).sum()), int(connectivity_structure(26).sum())
    (7, 27)
    """
    if connectivity not in CONNECTIVITY:
        raise TesseraInputError(f"connectivity must be 6, 18 or 26, got {connectivity!r}")
    return ndimage.generate_binary_structure(3, CONNECTIVITY[connectivity])


def ball(radius_nm, spacing):
    """Ellipsoid structuring element of `radius_nm` in physical space; None for radius 0.

    Parameters
    ----------
    radius_nm : float
    spacing : (float, float, float)
        Voxel size z, y, x in nm.

    Examples
    --------
    >>> ball(20, (40, 10, 10)).shape  # 0 voxels along z, 2 in-plane
    (1, 5, 5)
    """
    if radius_nm < 0:
        raise TesseraInputError(f"morphology radius must be >= 0 nm, got {radius_nm}")
    if radius_nm == 0:
        return None
    semi = [radius_nm / s for s in spacing]
    reach = [int(np.floor(r)) for r in semi]
    grids = np.ogrid[tuple(slice(-k, k + 1) for k in reach)]
    return sum((g / r) ** 2 for g, r in zip(grids, semi)) <= 1.0


def _reach(element):
    return np.zeros(3, int) if element is None else np.array(element.shape) // 2


def clean_mask(prob, *, low, opening=None, closing=None):
    """Steps 1-2 on an in-memory array: threshold, then opening and closing."""
    mask = apply_threshold(prob, low)
    if opening is not None:
        mask = ndimage.binary_erosion(mask, opening, border_value=0)
        mask = ndimage.binary_dilation(mask, opening, border_value=0)
    if closing is not None:
        mask = ndimage.binary_dilation(mask, closing, border_value=0)
        mask = ndimage.binary_erosion(mask, closing, border_value=1)
    return mask


def check_settings(*, high, low, min_volume_um3, max_volume_um3, connectivity, source=None):
    """Refuse inconsistent filtering settings with one clear message."""
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


def _blocks(shape, block):
    for z0 in range(0, shape[0], block[0]):
        for y0 in range(0, shape[1], block[1]):
            for x0 in range(0, shape[2], block[2]):
                yield (
                    (z0, y0, x0),
                    tuple(min(o + b, s) for o, b, s in zip((z0, y0, x0), block, shape)),
                )


class _Stats:
    """Per provisional label: voxels, coordinate sums, first raster index, bbox, flags."""

    def __init__(self):
        self.parts = []

    def add(self, labels, n, origin, shape, seeds, excluded_z):
        if n == 0:
            return
        flat = labels.ravel()
        count = np.bincount(flat, minlength=n + 1)[1:]
        zz, yy, xx = np.indices(labels.shape, sparse=True)
        sums = [
            np.bincount(
                flat, weights=np.broadcast_to(c + o, labels.shape).ravel(), minlength=n + 1
            )[1:]
            for c, o in zip((zz, yy, xx), origin)
        ]
        # block raster order is global raster order for the voxels of one block
        ids, first = np.unique(flat, return_index=True)
        keep = ids > 0
        local = np.unravel_index(first[keep], labels.shape)
        first_index = np.zeros(n, np.int64)
        first_index[ids[keep] - 1] = np.ravel_multi_index(
            tuple(c + o for c, o in zip(local, origin)), shape
        )
        seeded = np.bincount(flat[seeds.ravel()], minlength=n + 1)[1:] > 0
        boxes = ndimage.find_objects(labels, max_label=n)
        lo = np.array([[s.start + o for s, o in zip(b, origin)] for b in boxes], np.int64)
        hi = np.array([[s.stop + o for s, o in zip(b, origin)] for b in boxes], np.int64)
        in_excluded = np.isin(np.arange(labels.shape[0]) + origin[0], excluded_z)
        excl = np.bincount(flat[np.repeat(in_excluded, labels[0].size)], minlength=n + 1)[1:] > 0
        self.parts.append((count, np.stack(sums, 1), first_index, seeded, lo, hi, excl))

    def merged(self, component, n_components):
        count, sums, first, seeded, lo, hi, excl = (np.concatenate(p) for p in zip(*self.parts))
        out = {
            "voxels": np.bincount(component, weights=count, minlength=n_components).astype(
                np.int64
            ),
            "sums": np.stack(
                [
                    np.bincount(component, weights=sums[:, k], minlength=n_components)
                    for k in range(3)
                ],
                1,
            ),
        }
        out["first"] = np.full(n_components, np.iinfo(np.int64).max)
        np.minimum.at(out["first"], component, first)
        for name, values, fn, start in (
            ("lo", lo, np.minimum, np.iinfo(np.int64).max),
            ("hi", hi, np.maximum, 0),
        ):
            arr = np.full((n_components, 3), start, np.int64)
            fn.at(arr, component, values)
            out[name] = arr
        for name, values in (("seeded", seeded), ("excluded", excl)):
            arr = np.zeros(n_components, bool)
            np.logical_or.at(arr, component, values)
            out[name] = arr
        return out


def _bridging_plan(excluded, depth):
    """For each excluded section: (z below, z above, weight of above) of its interpolation."""
    bad = set(int(z) for z in excluded)
    plan = {}
    for z in sorted(bad):
        below = next((k for k in range(z - 1, -1, -1) if k not in bad), None)
        above = next((k for k in range(z + 1, depth) if k not in bad), None)
        if below is None and above is None:
            continue
        if below is None or above is None:
            plan[z] = (below if above is None else above, below if above is None else above, 0.0)
        else:
            plan[z] = (below, above, (z - below) / (above - below))
    return plan


def _read_bridged(prob, lo, hi, bridge, scale):
    """prob[lo:hi] as probabilities, with excluded sections interpolated from their neighbours."""
    region = np.asarray(
        prob[lo[0] : hi[0], lo[1] : hi[1], lo[2] : hi[2]], dtype=np.float32
    ) / np.float32(scale)
    for z, (below, above, w) in bridge.items():
        if lo[0] <= z < hi[0]:
            a = np.asarray(
                prob[below, lo[1] : hi[1], lo[2] : hi[2]], dtype=np.float32
            ) / np.float32(scale)
            b = np.asarray(
                prob[above, lo[1] : hi[1], lo[2] : hi[2]], dtype=np.float32
            ) / np.float32(scale)
            region[z - lo[0]] = (1 - w) * a + w * b
    return region


def _face_pairs(provisional, origin, end, shape, structure):
    """Label pairs that touch across the upper faces of one block (other blocks' faces are theirs)."""
    pairs = []
    for axis in range(3):
        if end[axis] >= shape[axis]:
            continue
        sl = [slice(max(o - 1, 0), min(e + 1, s)) for o, e, s in zip(origin, end, shape)]
        sl[axis] = slice(end[axis] - 1, end[axis] + 1)
        region = np.asarray(provisional[tuple(sl)])
        a, b = np.moveaxis(region, axis, 0)
        for shift in np.argwhere(np.moveaxis(structure, axis, 0)[2]) - 1:
            s1, s2 = (int(v) for v in shift)
            h, w = a.shape
            pa = a[max(0, -s1) : h - max(0, s1), max(0, -s2) : w - max(0, s2)]
            pb = b[max(0, s1) : h - max(0, -s1), max(0, s2) : w - max(0, -s2)]
            touch = (pa > 0) & (pb > 0)
            if touch.any():
                pairs.append(np.stack([pa[touch], pb[touch]], 1))
    # one row per pair of labels, not per touching voxel: what is kept grows with the number of
    # objects crossing faces, not with the face area
    return [np.unique(np.concatenate(pairs), axis=0)] if pairs else []


def _cavity(mask, others, structure):
    """Voxels of the holes of `mask` that may be filled (not touching any voxel of `others`)."""
    filled = ndimage.binary_fill_holes(mask)
    holes = filled & ~mask
    if not holes.any():
        return holes
    lab, n = ndimage.label(holes)  # background cavities, 6-connected
    bad = np.unique(lab[ndimage.binary_dilation(others, structure) & (lab > 0)])
    if bad.size:
        holes &= ~np.isin(lab, bad)
    return holes


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
    scale : float
        Stored value of probability 1 (255 for uint8 maps).
    workdir : path, optional
        Where the temporary provisional labels go (default: the system's temporary folder).

    Returns
    -------
    pandas.DataFrame
        One row per object: ``id``, ``voxels``, ``volume_um3``, bounding box ``z0 y0 x0 z1 y1
        x1`` (voxels, end exclusive), centroid in nm, ``touches_volume_border``,
        ``touches_excluded_section`` and ``cavities_filled``.

    Examples
    --------
    >>> p = np.zeros((3, 8, 8), np.float32); p[1, 1:3, 1:3] = 0.9; p[1, 5:7, 4:8] = 0.8
    >>> labels = np.zeros(p.shape, np.uint32)
    >>> table = label_objects(p, labels, spacing=(50, 10, 10), high=0.5, block=(2, 4, 4))
    >>> table[["id", "voxels", "touches_volume_border"]].to_dict("list")
    {'id': [1, 2], 'voxels': [4, 8], 'touches_volume_border': [False, True]}
    """
    low = high if low is None else low
    check_settings(
        high=high,
        low=low,
        min_volume_um3=min_volume_um3,
        max_volume_um3=max_volume_um3,
        connectivity=connectivity,
    )
    shape = tuple(int(s) for s in prob.shape)
    if len(shape) != 3 or tuple(out.shape) != shape:
        raise TesseraInputError(
            f"probability and label volumes must be 3D of one shape, got {shape}, {out.shape}"
        )
    block = tuple(int(b) for b in block)
    structure = connectivity_structure(connectivity)
    opening, closing = ball(open_radius_nm, spacing), ball(close_radius_nm, spacing)
    halo = 2 * _reach(opening) + 2 * _reach(closing)
    voxel_nm3 = float(np.prod(spacing))
    excluded = np.array(sorted(int(z) for z in excluded_sections), dtype=np.int64)
    bridge = _bridging_plan(excluded if bridge_excluded else (), shape[0])

    with tempfile.TemporaryDirectory(dir=workdir, prefix="tessera-labels-") as tmp:
        provisional = zarr.create_array(
            store=str(Path(tmp) / "provisional.zarr"),
            shape=shape,
            dtype=np.int64,
            chunks=block,
            fill_value=0,
            zarr_format=3,
        )
        # pass 1: clean mask and provisional labels per block
        stats, offset = _Stats(), 0
        for origin, end in _blocks(shape, block):
            lo = [max(o - h, 0) for o, h in zip(origin, halo)]
            hi = [min(e + h, s) for e, h, s in zip(end, halo, shape)]
            region = _read_bridged(prob, lo, hi, bridge, scale)
            mask = clean_mask(region, low=low, opening=opening, closing=closing)
            core = tuple(slice(o - a, e - a) for o, e, a in zip(origin, end, lo))
            mask, seeds = mask[core], apply_threshold(region[core], high) & mask[core]
            labels, n = ndimage.label(mask, structure)
            stats.add(labels, n, origin, shape, seeds, excluded)
            provisional[origin[0] : end[0], origin[1] : end[1], origin[2] : end[2]] = np.where(
                labels > 0, labels + offset, 0
            )
            offset += n
        # pass 2: merge across block faces
        pairs = []
        for origin, end in _blocks(shape, block):
            pairs += _face_pairs(provisional, origin, end, shape, structure)
            if len(pairs) > 64:  # merge as we go so the list stays small
                pairs = [np.unique(np.concatenate(pairs), axis=0)]
        edges = (
            np.unique(np.concatenate(pairs), axis=0) - 1 if pairs else np.zeros((0, 2), np.int64)
        )
        graph = coo_matrix(
            (np.ones(len(edges), np.int8), (edges[:, 0], edges[:, 1])), shape=(offset, offset)
        )
        n_comp, component = (
            connected_components(graph, directed=False) if offset else (0, np.zeros(0, np.int64))
        )
        objects = stats.merged(component, n_comp) if offset else None
        kept = np.flatnonzero(objects["seeded"]) if offset else np.zeros(0, np.int64)
        # pass 3: holes, per object in its bounding box (one voxel of margin where the volume allows)
        cavities, unfilled = {}, set()
        fill_max_voxels = fill_max_voxels or 8 * int(np.prod(block))
        if fill_holes:
            kept_lut = np.zeros(offset + 1, np.int64)
            kept_lut[1:][np.isin(component, kept)] = 1
            comp_lut = np.concatenate([[-1], component])
            for c in kept:
                if (
                    max_volume_um3 is not None
                    and objects["voxels"][c] * voxel_nm3 / 1e9 > max_volume_um3
                ):
                    continue  # filling only adds volume: it is out either way
                lo = np.maximum(objects["lo"][c] - 1, 0)
                hi = np.minimum(objects["hi"][c] + 1, shape)
                if np.prod(hi - lo) > fill_max_voxels:
                    unfilled.add(int(c))
                    continue
                box = np.asarray(provisional[lo[0] : hi[0], lo[1] : hi[1], lo[2] : hi[2]])
                mine = comp_lut[box] == c
                others = (kept_lut[box] > 0) & ~mine
                holes = _cavity(mine, others, structure)
                if holes.any():
                    points = np.argwhere(holes) + lo
                    cavities[c] = points
                    objects["voxels"][c] += len(points)
                    objects["sums"][c] += points.sum(axis=0)
                    objects["excluded"][c] |= bool(np.isin(points[:, 0], excluded).any())
        volume = objects["voxels"] * voxel_nm3 / 1e9 if offset else np.zeros(0)
        size_ok = volume[kept] >= min_volume_um3
        if max_volume_um3 is not None:
            size_ok &= volume[kept] <= max_volume_um3
        kept = kept[size_ok]
        kept = kept[np.argsort(objects["first"][kept], kind="stable")] if offset else kept
        final = np.zeros(max(n_comp, 1), np.int64)
        final[kept] = np.arange(1, len(kept) + 1)
        lut = np.concatenate([[0], final[component]]) if offset else np.zeros(1, np.int64)
        if len(kept) > np.iinfo(out.dtype).max:
            raise TesseraInputError(f"{len(kept)} objects do not fit label dtype {out.dtype}")
        # pass 4: global labels
        for origin, end in _blocks(shape, block):
            box = np.asarray(
                provisional[origin[0] : end[0], origin[1] : end[1], origin[2] : end[2]]
            )
            out[origin[0] : end[0], origin[1] : end[1], origin[2] : end[2]] = lut[box].astype(
                out.dtype
            )
        for c, points in cavities.items():
            if final[c]:
                lo, hi = points.min(axis=0), points.max(axis=0) + 1
                region = np.asarray(out[lo[0] : hi[0], lo[1] : hi[1], lo[2] : hi[2]])
                region[tuple((points - lo).T)] = final[c]
                out[lo[0] : hi[0], lo[1] : hi[1], lo[2] : hi[2]] = region

    rows = []
    for c in kept:
        lo_, hi_ = objects["lo"][c], objects["hi"][c]
        centroid = objects["sums"][c] / objects["voxels"][c] * np.asarray(spacing)
        rows.append(
            {
                "id": int(final[c]),
                "voxels": int(objects["voxels"][c]),
                "volume_um3": float(volume[c]),
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
                "touches_excluded_section": bool(objects["excluded"][c]),
                "cavities_filled": bool(fill_holes and int(c) not in unfilled),
            }
        )
    columns = [
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
    ]
    return pd.DataFrame(rows, columns=columns)


def _subsample(source, target, factor, band=512):
    """target = source[::fz, ::fy, ::fx], read one band of rows of one section at a time."""
    fz, fy, fx = factor
    for oz in range(target.shape[0]):
        for oy in range(0, target.shape[1], band):
            rows = np.asarray(source[oz * fz, oy * fy : min((oy + band) * fy, source.shape[1]), :])
            target[oz, oy : oy + band, :] = rows[::fy, ::fx][: target.shape[1] - oy]


def objects_job(
    probability, qc_table, scores, out_image, out_table, out_settings, *, target, settings
):
    """Filter a stitched probability map into objects; write labels, table and settings.

    The labels go to ``labels/<target>`` inside a copy of the probability image (NGFF image-label,
    levels hard-linked, not copied), so a viewer shows both together.
    """
    settings = dict(settings)
    high = settings.pop("high")
    if high is None:
        high = validation_threshold(scores)
    low = settings.pop("low")
    low = high if low is None else low
    group, info = open_image(probability)
    prob = info["levels"][0]
    extra = info["extra"].get("probability", {})
    scale = float(extra.get("scale", 1.0))
    z_factor = int(info["extra"].get("probability", {}).get("z_factor", 1))
    excluded = excluded_sections(qc_table, z_factor)
    used = {
        "target": target,
        "high": high,
        "low": low,
        **settings,
        "connectivity_meaning": f"{settings['connectivity']}-connected voxels in 3D belong to one object",
        "excluded_sections": excluded,
        "spacing_nm": list(info["spacing"]),
    }
    block = settings.pop("block")
    level_paths = [d["path"] for d in group.attrs["ome"]["multiscales"][0]["datasets"]]
    with atomic_path(out_image) as tmp:
        for name in level_paths:
            link_tree(Path(probability) / name, tmp / name)
        (tmp / "zarr.json").write_bytes(verified_bytes(probability, "zarr.json"))
        root = zarr.open_group(store=str(tmp), mode="r+", zarr_format=3)
        labels_group = root.create_group("labels")
        labels_group.attrs["ome"] = {"version": "0.5", "labels": [target]}
        image = labels_group.create_group(target)
        # NGFF wants a label level per image level; coarser label levels take every f-th voxel
        # (labels cannot be averaged), so their first voxel sits on level 0's first voxel.
        ome = multiscale_attrs(
            name=f"{target} objects", spacing=info["spacing"], factors=info["factors"]
        )
        for dataset in ome["multiscales"][0]["datasets"]:
            dataset["coordinateTransformations"] = dataset["coordinateTransformations"][:1]
        ome["image-label"] = {"version": "0.5", "source": {"image": "../../"}}
        image.attrs.update({"ome": ome, "tessera": {"objects": used}})
        levels = []
        for k, factor in enumerate(info["factors"]):
            shape = tuple(-(-s // f) for s, f in zip(prob.shape, factor))
            levels.append(
                image.create_array(
                    name=str(k),
                    shape=shape,
                    dtype=np.uint32,
                    chunks=tuple(min(c, s) for c, s in zip((1, 512, 512), shape)),
                    dimension_names=AXES,
                    fill_value=0,
                )
            )
        table = label_objects(
            prob,
            levels[0],
            spacing=info["spacing"],
            high=high,
            low=low,
            block=block,
            scale=scale,
            excluded_sections=excluded,
            workdir=Path(out_image).parent,
            **settings,
        )
        for factor, level in zip(info["factors"][1:], levels[1:]):
            _subsample(levels[0], level, factor)
        # the probability levels keep the records made when they were stitched
        record_checksums(tmp, linked={name: probability for name in level_paths})
    write_table(out_table, table)
    write_text(out_settings, json.dumps({**used, "objects": len(table)}, indent=1) + "\n")
    return {"objects": len(table), "high": high, "low": low}
