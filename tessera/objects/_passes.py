"""The out-of-core passes of :func:`tessera.objects.label.label_objects` (internal).

Pass 1 labels every block on its own (read with a halo of the morphology's reach) and collects
per-label statistics; pass 2 merges labels touching across block faces as a graph's connected
components; pass 3 fills cavities object by object in its bounding box; the size rule follows;
pass 4 (optional) splits each kept component, whole in its bounding box, into the organelles it
holds; the raster-order numbering follows; pass 5 writes the global labels. Nothing here holds more than a
block, an object's box, or a few numbers per object.
"""

import numpy as np
from scipy import ndimage
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from tessera.objects.morphology import clean_mask
from tessera.objects.split import split_touching
from tessera.threshold import apply_threshold


def blocks(shape, block):
    for z0 in range(0, shape[0], block[0]):
        for y0 in range(0, shape[1], block[1]):
            for x0 in range(0, shape[2], block[2]):
                yield (
                    (z0, y0, x0),
                    tuple(
                        min(o + b, s) for o, b, s in zip((z0, y0, x0), block, shape, strict=False)
                    ),
                )


class Stats:
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
            for c, o in zip((zz, yy, xx), origin, strict=True)
        ]
        # block raster order is global raster order for the voxels of one block
        ids, first = np.unique(flat, return_index=True)
        keep = ids > 0
        local = np.unravel_index(first[keep], labels.shape)
        first_index = np.zeros(n, np.int64)
        first_index[ids[keep] - 1] = np.ravel_multi_index(
            tuple(c + o for c, o in zip(local, origin, strict=True)), shape
        )
        seeded = np.bincount(flat[seeds.ravel()], minlength=n + 1)[1:] > 0
        boxes = ndimage.find_objects(labels, max_label=n)
        lo = np.array(
            [[s.start + o for s, o in zip(b, origin, strict=True)] for b in boxes], np.int64
        )
        hi = np.array(
            [[s.stop + o for s, o in zip(b, origin, strict=True)] for b in boxes], np.int64
        )
        in_excluded = np.isin(np.arange(labels.shape[0]) + origin[0], excluded_z)
        excl = np.bincount(flat[np.repeat(in_excluded, labels[0].size)], minlength=n + 1)[1:] > 0
        self.parts.append((count, np.stack(sums, 1), first_index, seeded, lo, hi, excl))

    def merged(self, component, n_components):
        count, sums, first, seeded, lo, hi, excl = (
            np.concatenate(p) for p in zip(*self.parts, strict=True)
        )
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


def bridging_plan(excluded, depth):
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


def read_bridged(prob, lo, hi, bridge, scale):
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
        sl = [
            slice(max(o - 1, 0), min(e + 1, s)) for o, e, s in zip(origin, end, shape, strict=True)
        ]
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


def provisional_labels(
    prob,
    provisional,
    *,
    shape,
    block,
    halo,
    bridge,
    scale,
    thresholds,
    morphology,
    structure,
    excluded,
):
    """Pass 1: clean mask and labels of each block on its own, numbered on from earlier blocks.

    Returns the statistics of every provisional label and how many there are."""
    low, high = thresholds
    opening, closing = morphology
    stats, offset = Stats(), 0
    for origin, end in blocks(shape, block):
        lo = [max(o - h, 0) for o, h in zip(origin, halo, strict=True)]
        hi = [min(e + h, s) for e, h, s in zip(end, halo, shape, strict=True)]
        region = read_bridged(prob, lo, hi, bridge, scale)
        mask = clean_mask(region, low=low, opening=opening, closing=closing)
        core = tuple(slice(o - a, e - a) for o, e, a in zip(origin, end, lo, strict=True))
        mask, seeds = mask[core], apply_threshold(region[core], high) & mask[core]
        labels, n = ndimage.label(mask, structure)
        stats.add(labels, n, origin, shape, seeds, excluded)
        provisional[origin[0] : end[0], origin[1] : end[1], origin[2] : end[2]] = np.where(
            labels > 0, labels + offset, 0
        )
        offset += n
    return stats, offset


def merge_across_faces(provisional, *, shape, block, structure, offset):
    """Pass 2: provisional labels touching across block faces become one component.

    Returns the number of components and the component of each provisional label (label k is
    ``component[k - 1]``)."""
    pairs = []
    for origin, end in blocks(shape, block):
        pairs += _face_pairs(provisional, origin, end, shape, structure)
        if len(pairs) > 64:  # merge as we go so the list stays small
            pairs = [np.unique(np.concatenate(pairs), axis=0)]
    edges = np.unique(np.concatenate(pairs), axis=0) - 1 if pairs else np.zeros((0, 2), np.int64)
    graph = coo_matrix(
        (np.ones(len(edges), np.int8), (edges[:, 0], edges[:, 1])), shape=(offset, offset)
    )
    return connected_components(graph, directed=False) if offset else (0, np.zeros(0, np.int64))


def fill_cavities(
    provisional,
    objects,
    component,
    kept,
    *,
    offset,
    shape,
    structure,
    excluded,
    voxel_nm3,
    max_volume_um3,
    fill_max_voxels,
):
    """Pass 3: holes, per object in its bounding box (one voxel of margin where the volume allows).

    Adds the filled voxels to `objects` in place; returns the voxels filled per component and the
    components whose box was too large to fill."""
    cavities, unfilled = {}, set()
    kept_lut = np.zeros(offset + 1, np.int64)
    kept_lut[1:][np.isin(component, kept)] = 1
    comp_lut = np.concatenate([[-1], component])
    for c in kept:
        if max_volume_um3 is not None and objects["voxels"][c] * voxel_nm3 / 1e9 > max_volume_um3:
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
    return cavities, unfilled


def number_objects(objects, kept, *, offset, n_comp, voxel_nm3, size_range):
    """Steps 5-6: drop the objects outside the size range, number the others 1..N in raster
    order of their first voxel.

    Returns the volume of every component, the kept components in label order and the final
    label of every component (0 = removed)."""
    min_volume_um3, max_volume_um3 = size_range
    volume = objects["voxels"] * voxel_nm3 / 1e9 if offset else np.zeros(0)
    size_ok = volume[kept] >= min_volume_um3
    if max_volume_um3 is not None:
        size_ok &= volume[kept] <= max_volume_um3
    kept = kept[size_ok]
    kept = kept[np.argsort(objects["first"][kept], kind="stable")] if offset else kept
    final = np.zeros(max(n_comp, 1), np.int64)
    final[kept] = np.arange(1, len(kept) + 1)
    return volume, kept, final


def write_labels(out, provisional, lut, final, cavities, *, shape, block, pieces=None):
    """Pass 5: global labels, block by block, then the filled cavities of the kept objects.

    `pieces` is ``(pieces_store, piece_final)`` when components were split: there a piece's
    label replaces its component's (whose final label is 0), cavities included."""
    for origin, end in blocks(shape, block):
        where = tuple(slice(o, e) for o, e in zip(origin, end, strict=True))
        labels = lut[np.asarray(provisional[where])]
        if pieces is not None:
            piece = np.asarray(pieces[0][where])
            labels = np.where(piece > 0, pieces[1][piece], labels)
        out[where] = labels.astype(out.dtype)
    for c, points in cavities.items():
        if final[c]:
            lo, hi = points.min(axis=0), points.max(axis=0) + 1
            region = np.asarray(out[lo[0] : hi[0], lo[1] : hi[1], lo[2] : hi[2]])
            region[tuple((points - lo).T)] = final[c]
            out[lo[0] : hi[0], lo[1] : hi[1], lo[2] : hi[2]] = region


def _piece_stats(pieces, lo, shape, excluded):
    """Voxels, coordinate sums, first raster index, box and excluded flag of pieces 1..k."""
    k = int(pieces.max())
    flat = pieces.ravel()
    where = np.argwhere(pieces) + lo
    inside = flat[flat > 0]
    ids, first = np.unique(flat, return_index=True)
    first_box = np.array(np.unravel_index(first[ids > 0], pieces.shape)).T + lo
    boxes = ndimage.find_objects(pieces)
    return {
        "voxels": np.bincount(inside, minlength=k + 1)[1:].astype(np.int64),
        "sums": np.stack(
            [np.bincount(inside, weights=where[:, a], minlength=k + 1)[1:] for a in range(3)], 1
        ),
        "first": np.ravel_multi_index(tuple(first_box.T), shape).astype(np.int64),
        "lo": np.array([[s.start for s in b] for b in boxes], np.int64) + lo,
        "hi": np.array([[s.stop for s in b] for b in boxes], np.int64) + lo,
        "excluded": np.bincount(inside[np.isin(where[:, 0], excluded)], minlength=k + 1)[1:] > 0,
    }


def split_components(
    provisional,
    pieces_store,
    component,
    kept,
    objects,
    cavities,
    *,
    shape,
    split,
    excluded,
    max_voxels,
    probability=None,
):
    """Pass 4: each kept component, whole in its bounding box (with its filled cavities), split
    into the organelles it holds; the pieces of split components go to `pieces_store` as
    1-based piece numbers unique over the volume.

    `split` holds ``split_touching``'s keyword arguments; `probability`, when given, reads the
    probabilities of a box ``(lo, hi)`` (as pass 1 read them), passed on with filled cavities
    counted as sure (they are inside by the fill rule, whatever their probability). Returns the pieces' statistics per
    split component (a dict of arrays, and the number of its first piece) and the components
    whose box exceeds `max_voxels` (left whole and flagged)."""
    comp_lut = np.concatenate([[-1], component])
    parts, unchecked, next_piece = {}, set(), 1
    for c in kept:
        lo = np.maximum(objects["lo"][c] - 1, 0)
        hi = np.minimum(objects["hi"][c] + 1, shape)
        if np.prod(hi - lo) > max_voxels:
            unchecked.add(int(c))
            continue
        box = tuple(slice(a, b) for a, b in zip(lo, hi, strict=True))
        mine = comp_lut[np.asarray(provisional[box])] == c
        if int(c) in cavities:
            mine[tuple((cavities[int(c)] - lo).T)] = True
        sure = None
        if probability is not None:
            sure = probability(lo, hi)
            if int(c) in cavities:
                sure[tuple((cavities[int(c)] - lo).T)] = 1.0
        pieces = split_touching(mine, origin=tuple(int(v) for v in lo), probability=sure, **split)
        if pieces.max() < 2:
            continue
        parts[int(c)] = (_piece_stats(pieces, lo, shape, excluded), next_piece)
        region = np.asarray(pieces_store[box])
        region[mine] = pieces[mine] + (next_piece - 1)
        pieces_store[box] = region
        next_piece += int(pieces.max())
    return parts, unchecked


def number_with_pieces(objects, kept, parts, *, voxel_nm3):
    """Step 7 with split components: every object, whole component or piece, numbered 1..N in
    raster order of its first voxel.

    Returns the objects' measures in label order (a dict of arrays, ``component`` the
    component each comes from), the final label of every whole component (0 = split or
    removed) and the final label of every piece number of `pieces_store`."""
    whole = np.array([c for c in kept if int(c) not in parts], np.int64)
    names = ("voxels", "sums", "first", "lo", "hi", "excluded")
    units = {name: [objects[name][whole]] for name in names}
    units["component"], units["piece"] = [whole], [np.zeros(len(whole), np.int64)]
    for c, (stats, first_piece) in parts.items():
        for name in names:
            units[name].append(stats[name])
        k = len(stats["voxels"])
        units["component"].append(np.full(k, c, np.int64))
        units["piece"].append(np.arange(first_piece, first_piece + k, dtype=np.int64))
    units = {name: np.concatenate(values) for name, values in units.items()}
    order = np.argsort(units["first"], kind="stable")
    units = {name: values[order] for name, values in units.items()}
    labels = np.arange(1, len(order) + 1, dtype=np.int64)
    final = np.zeros(len(objects["voxels"]), np.int64)
    final[units["component"][units["piece"] == 0]] = labels[units["piece"] == 0]
    piece_final = np.zeros(int(units["piece"].max(initial=0)) + 1, np.int64)
    piece_final[units["piece"]] = labels
    piece_final[0] = 0
    units["volume_um3"] = units["voxels"] * voxel_nm3 / 1e9
    return units, final, piece_final
