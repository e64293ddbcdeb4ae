"""Shape and size of labelled objects in physical units, and densities per region.

Every measure takes the voxel size (``spacing``, z y x in nm) and honours anisotropy: volumes
and surfaces are in µm³ and µm², the surface comes from marching cubes run with the spacing
(Lorensen & Cline 1987), moments are taken in nm, and the skeleton is computed on a grid made
near-isotropic first (the thinning itself knows nothing of spacing). Objects are measured one by
one from their bounding boxes, so no whole volume is ever loaded.
"""

import math

import numpy as np
import pandas as pd
from scipy import ndimage
from scipy.spatial import cKDTree
from skimage.measure import marching_cubes, mesh_surface_area
from skimage.morphology import skeletonize

from tessera.errors import TesseraInputError
from tessera.spacing import normalize_spacing

MEASURES = (
    "volume_um3",
    "surface_um2",
    "sphericity",
    "equivalent_diameter_um",
    "major_axis_um",
    "intermediate_axis_um",
    "minor_axis_um",
    "elongation",
    "flatness",
    "skeleton_length_um",
    "branch_points",
    "end_points",
    "complexity_index",
)
#: Columns of the region table, in order.
REGION_COLUMNS = (
    "region",
    "region_volume_um3",
    "objects",
    "objects_whole",
    "V_V",
    "S_V",
    "N_V",
    "N_V_exclude_touching",
    "N_V_biased",
)


def surface_area(mask, *, spacing):
    """Surface area (µm²) of a binary object by marching cubes at level 0.5 with `spacing`.

    The mask is padded by one background voxel so the surface is closed.

    Examples
    --------
    >>> cube = np.ones((10, 10, 10), bool)
    >>> round(surface_area(cube, spacing=(100, 100, 100)), 1)  # 6 faces of 1 um², edges rounded
    4.9
    """
    spacing = normalize_spacing(spacing, 3)
    padded = np.pad(np.asarray(mask, dtype=np.float32), 3)
    if padded.max() == 0:
        raise TesseraInputError("cannot measure the surface of an empty object")
    # Marching cubes on a hard 0/1 mask follows the voxel staircase and overestimates smooth
    # surfaces by ~8 % at any resolution; a light blur (one finest voxel, round in nm) first
    # lets the 0.5 level cut the voxel edges, so the bias then shrinks with resolution.
    sigma = [min(spacing) / s for s in spacing]
    smooth = ndimage.gaussian_filter(padded, sigma, mode="constant", truncate=3.0)
    if smooth.max() <= 0.5:
        # thinner than the blur everywhere (a speck or a one-voxel sheet): the blurred mask never
        # reaches the level, so measure the voxel staircase of the mask itself
        smooth = padded
    verts, faces, _, _ = marching_cubes(smooth, level=0.5, spacing=spacing)
    return float(mesh_surface_area(verts, faces)) / 1e6


def principal_axes(mask, *, spacing):
    """Full lengths (µm) of the axes of the ellipsoid with the object's second moments, longest first.

    A solid ellipsoid with semi-axes a has variance a²/5 along each axis, so the length along a
    principal direction is 2 √(5 λ) for eigenvalue λ of the covariance of voxel centres. Each voxel
    is a box, not a point: its own variance s²/12 per axis is added.

    Examples
    --------
    >>> box = np.ones((2, 4, 8), bool)  # a solid box of side L has axis 2 √(5/12) L ≈ 1.29 L
    >>> [round(length, 3) for length in principal_axes(box, spacing=(100, 100, 100))]
    [1.033, 0.516, 0.258]
    """
    spacing = np.asarray(normalize_spacing(spacing, 3))
    coords = np.argwhere(mask) * spacing
    if len(coords) == 0:
        raise TesseraInputError("cannot measure the axes of an empty object")
    cov = np.cov(coords.T, bias=True) if len(coords) > 1 else np.zeros((3, 3))
    cov = cov + np.diag(spacing**2 / 12.0)
    eig = np.sort(np.clip(np.linalg.eigvalsh(cov), 0, None))[::-1]
    return tuple(float(2 * math.sqrt(5 * v) / 1000.0) for v in eig)


def _isotropic_factors(spacing):
    finest = min(spacing)
    return tuple(max(1, int(round(s / finest))) for s in spacing)


#: A side branch of a skeleton no longer than this many times the distance from its junction
#: to the object's surface is pruned: shorter than the object is thick there, it is a bump of
#: the surface (a voxel staircase, say), not a branch.
SPUR_RADII = 2.0

_NEIGHBOURS = [np.array(o) - 1 for o in np.ndindex(3, 3, 3) if o != (1, 1, 1)]


def _near_isotropic(mask, spacing):
    """`mask` on a grid refined along its coarse axes by whole factors (linear interpolation
    between voxel centres, kept where >= 1/2), and the refined grid's voxel size.

    A nearest-neighbour copy would turn each section into a slab with a step at its faces,
    which thinning reads as side branches; interpolating keeps the surface smooth across them.
    """
    factors = _isotropic_factors(spacing)
    step = np.array([s / f for s, f in zip(spacing, factors, strict=True)])
    mask = np.asarray(mask, bool)
    if all(f == 1 for f in factors):
        return mask, step
    fine = ndimage.zoom(mask.astype(np.float32), factors, order=1, mode="nearest", grid_mode=True)
    return fine >= 0.5, step


def _skeleton_graph(skeleton, step):
    """Voxels of a skeleton (none on the array's border) and their 26-neighbour links: for voxel
    i, ``neighbour[start[i]:start[i + 1]]`` with the physical ``distance`` to each."""
    points = np.argwhere(skeleton)
    index = np.full(skeleton.shape, -1, np.int64)
    index[tuple(points.T)] = np.arange(len(points))
    source, neighbour, distance = [], [], []
    for offset in _NEIGHBOURS:
        found = index[tuple((points + offset).T)]
        linked = np.flatnonzero(found >= 0)
        source.append(linked)
        neighbour.append(found[linked])
        distance.append(np.full(linked.size, float(np.linalg.norm(offset * step))))
    source, neighbour, distance = (np.concatenate(a) for a in (source, neighbour, distance))
    order = np.argsort(source, kind="stable")
    start = np.searchsorted(source[order], np.arange(len(points) + 1))
    return points, start, neighbour[order], distance[order]


def _junction_limits(mask, points, degree, step):
    """:data:`SPUR_RADII` times the distance (nm) from each junction voxel (more than two
    neighbours) to the nearest voxel outside `mask`; 0 elsewhere. Pruning only ever consults
    voxels that were junctions from the start (removing a spur lowers degrees), and the
    nearest outside voxel of a point inside touches the object, so only those are searched."""
    limit = np.zeros(len(points))
    junctions = np.flatnonzero(degree > 2)
    if junctions.size:
        outside = np.argwhere(ndimage.binary_dilation(mask, np.ones((3, 3, 3))) & ~mask)
        depth, _ = cKDTree(outside * step).query(points[junctions] * step)
        limit[junctions] = SPUR_RADII * depth
    return limit


def _shortest_spur(alive, degree, start, neighbour, distance, limit):
    """(length, voxels) of the shortest side branch shorter than its junction's `limit`, or
    None. A side branch runs from an end voxel through voxels of two neighbours to a junction
    (more than two); a path between two ends is the whole skeleton, never a spur."""
    best = None
    for end in np.flatnonzero(alive & (degree == 1)):
        path, previous, current, length = [end], -1, end, 0.0
        while True:
            links = slice(start[current], start[current + 1])
            onward = [
                (j, d)
                for j, d in zip(neighbour[links], distance[links], strict=True)
                if alive[j] and j != previous
            ]
            if len(onward) != 1:
                break
            following, step = onward[0]
            length += step
            if degree[following] > 2:
                if length < limit[following] and (best is None or length < best[0]):
                    best = (length, path)
                break
            if degree[following] == 1:
                break
            path.append(following)
            previous, current = current, following
    return best


def skeleton_measures(mask, *, spacing):
    """Length (µm), branch points and end points of the object's 3D skeleton.

    The mask is first refined to a near-isotropic grid (:func:`_near_isotropic`), then thinned
    (``skimage.morphology.skeletonize``). Side branches no longer than :data:`SPUR_RADII` times
    the distance from their junction to the surface are pruned, shortest first, as surface
    bumps. The length sums the physical distances between 26-neighbouring skeleton voxels; a
    branch point is a cluster of skeleton voxels with more than two neighbours, an end point a
    voxel with exactly one. A skeleton of one voxel has length 0 and no end points.

    Examples
    --------
    >>> rod = np.zeros((5, 5, 40), bool); rod[1:4, 1:4, 2:38] = True
    >>> length, branches, ends = skeleton_measures(rod, spacing=(10, 10, 10))
    >>> branches, ends, 0.25 < length < 0.37
    (0, 2, True)
    """
    spacing = normalize_spacing(spacing, 3)
    fine, step = _near_isotropic(mask, spacing)
    padded = np.pad(fine, 1)
    skeleton = skeletonize(padded) > 0
    if not skeleton.any():
        return 0.0, 0, 0
    points, start, neighbour, distance = _skeleton_graph(skeleton, step)
    degree = np.diff(start)
    limit = _junction_limits(padded, points, degree, step)
    alive = np.ones(len(points), bool)
    while (spur := _shortest_spur(alive, degree, start, neighbour, distance, limit)) is not None:
        for voxel in spur[1]:
            alive[voxel] = False
            degree[neighbour[start[voxel] : start[voxel + 1]]] -= 1
    source = np.repeat(np.arange(len(points)), np.diff(start))
    kept = alive[source] & alive[neighbour] & (neighbour > source)
    junction = np.zeros(skeleton.shape, bool)
    junction[tuple(points[alive & (degree > 2)].T)] = True
    branches = ndimage.label(junction, np.ones((3, 3, 3)))[1]
    ends = int((alive & (degree == 1)).sum())
    return float(distance[kept].sum()) / 1000.0, int(branches), ends


def complexity_index(surface_um2, volume_um3):
    """Mitochondrial complexity index MCI = SA³ / (16 π² V²) (Vincent et al., Sci Rep 2019).

    Dimensionless; it grows as an object departs from a compact, sphere-like shape (for a
    sphere it is 9 / (4π) ≈ 0.716), through elongation and branching alike.

    Examples
    --------
    >>> round(complexity_index(4 * math.pi, 4 / 3 * math.pi), 3)  # the unit sphere
    0.716
    """
    return surface_um2**3 / (16 * math.pi**2 * volume_um3**2)


def measure_object(mask, *, spacing):
    """Every measure of one object given as a binary mask (its bounding box suffices).

    Returns
    -------
    dict
        Keys of :data:`MEASURES`. Sphericity ψ = π^(1/3) (6V)^(2/3) / A (Wadell 1935);
        equivalent diameter = (6V/π)^(1/3); elongation = major / intermediate axis, flatness =
        intermediate / minor axis (both ≥ 1).

    Examples
    --------
    >>> m = measure_object(np.ones((4, 4, 4), bool), spacing=(50, 50, 50))
    >>> m["volume_um3"], round(m["sphericity"], 2), m["elongation"], m["end_points"]
    (0.008, 1.64, 1.0, 0)
    """
    spacing = normalize_spacing(spacing, 3)
    mask = np.asarray(mask, bool)
    voxels = int(mask.sum())
    if voxels == 0:
        raise TesseraInputError("cannot measure an empty object")
    volume = voxels * float(np.prod(spacing)) / 1e9
    area = surface_area(mask, spacing=spacing)
    major, intermediate, minor = principal_axes(mask, spacing=spacing)
    length, branches, ends = skeleton_measures(mask, spacing=spacing)
    return {
        "volume_um3": volume,
        "surface_um2": area,
        "sphericity": math.pi ** (1 / 3) * (6 * volume) ** (2 / 3) / area,
        "equivalent_diameter_um": (6 * volume / math.pi) ** (1 / 3),
        "major_axis_um": major,
        "intermediate_axis_um": intermediate,
        "minor_axis_um": minor,
        "elongation": major / intermediate if intermediate > 0 else math.inf,
        "flatness": intermediate / minor if minor > 0 else math.inf,
        "skeleton_length_um": length,
        "branch_points": branches,
        "end_points": ends,
        "complexity_index": complexity_index(area, volume),
    }


def measure_objects(labels, objects, *, spacing):
    """Measures of every object of an object table, reading each bounding box of `labels`.

    Parameters
    ----------
    labels : (Z, Y, X) array-like
        Label volume (zarr or numpy); only bounding boxes are read.
    objects : pandas.DataFrame
        The object table (``id`` and bounding box ``z0 y0 x0 z1 y1 x1``).
    spacing : (float, float, float)

    Returns
    -------
    pandas.DataFrame
        The object table with the columns of :data:`MEASURES` added (volume from the voxels).

    Examples
    --------
    >>> labels = np.zeros((6, 12, 12), np.uint32)
    >>> labels[1:5, 1:5, 1:5] = 1; labels[0:4, 6:12, 6:12] = 2
    >>> table = pd.DataFrame({"id": [1, 2], "z0": [1, 0], "y0": [1, 6], "x0": [1, 6],
    ...                       "z1": [5, 4], "y1": [5, 12], "x1": [5, 12]})
    >>> measure_objects(labels, table, spacing=(100, 100, 100))["surface_um2"].round(2).tolist()
    [0.47, 1.06]
    """
    rows = []
    for row in objects.itertuples(index=False):
        box = np.asarray(labels[row.z0 : row.z1, row.y0 : row.y1, row.x0 : row.x1])
        measures = measure_object(box == row.id, spacing=spacing)
        rows.append({"id": row.id, **{k: v for k, v in measures.items() if k != "volume_um3"}})
    measured = pd.DataFrame(rows, columns=["id", *[m for m in MEASURES if m != "volume_um3"]])
    return objects.merge(measured, on="id", how="left")


def edge_corrected_weights(extents, window):
    """Miles–Lantuéjoul weights of whole objects: how many objects each one stands for.

    An object of bounding-box extent ``h`` (voxels per axis) lies wholly inside a window of
    ``W`` voxels, without touching its outermost voxels, at ``prod(W - h - 1)`` of the
    ``prod(W)`` positions per window volume. Weighting each whole object by
    ``prod(W) / prod(W - h - 1)`` makes the count of whole objects an unbiased estimate of the
    number of objects per window volume for a stationary pattern (Miles 1974; Lantuéjoul 1980;
    from memory): large objects are more often cut by the border, and count for more when seen.

    Parameters
    ----------
    extents : (n, 3) array of int
        Bounding-box extents ``z1 - z0, y1 - y0, x1 - x0`` of whole objects.
    window : tuple of 3 int
        Shape of the image volume.

    Returns
    -------
    (n,) float64 array, every value >= 1

    Examples
    --------
    >>> edge_corrected_weights([[1, 1, 1], [8, 8, 8]], (10, 10, 10)).round(3).tolist()
    [1.953, 1000.0]
    """
    extents = np.asarray(extents, dtype=np.float64).reshape(-1, 3)
    window = np.asarray(window, dtype=np.float64)
    room = window - extents - 1
    if (room <= 0).any():
        raise TesseraInputError(
            "an object as large as the volume cannot be whole; it touches the border"
        )
    return np.prod(window) / np.prod(room, axis=1)


def _overlaps(labels, region_labels, *, shape, block):
    """Voxels per region, and per (object id, region) pair, counted block by block."""
    region_voxels = {}
    overlap = {}  # (object id, region) -> voxels
    for z0 in range(0, shape[0], block[0]):
        for y0 in range(0, shape[1], block[1]):
            for x0 in range(0, shape[2], block[2]):
                sl = (slice(z0, z0 + block[0]), slice(y0, y0 + block[1]), slice(x0, x0 + block[2]))
                obj = np.asarray(labels[sl]).astype(np.int64).ravel()
                reg = (
                    np.ones_like(obj)
                    if region_labels is None
                    else np.asarray(region_labels[sl]).astype(np.int64).ravel()
                )
                ids, counts = np.unique(reg, return_counts=True)
                for r, c in zip(ids, counts, strict=True):
                    region_voxels[int(r)] = region_voxels.get(int(r), 0) + int(c)
                both = (obj > 0) & (reg > 0)
                if both.any():
                    pairs, counts = np.unique(
                        np.stack([obj[both], reg[both]]), axis=1, return_counts=True
                    )
                    for (o, r), c in zip(pairs.T, counts, strict=True):
                        overlap[(int(o), int(r))] = overlap.get((int(o), int(r)), 0) + int(c)
    return region_voxels, overlap


def region_densities(labels, region_labels, objects, *, spacing, block=(16, 512, 512)):
    """Count, volume, surface and numerical densities of objects per region.

    Parameters
    ----------
    labels : (Z, Y, X) array-like
        Object labels.
    region_labels : (Z, Y, X) array-like or None
        Region labels of the same shape (e.g. cells; 0 = no region). None = the whole volume is
        region 1.
    objects : pandas.DataFrame
        Measured objects (``id``, ``surface_um2``, ``touches_volume_border`` and the bounding
        box ``z0 y0 x0 z1 y1 x1``, upper bounds exclusive).
    spacing : (float, float, float)
    block : (int, int, int)
        Read in blocks of this size.

    Returns
    -------
    regions : pandas.DataFrame
        Per region: ``region``, ``region_volume_um3``, ``objects`` (all objects assigned by
        their largest overlap), ``objects_whole`` (those not cut by the volume border),
        ``V_V`` (object volume inside the region / region volume), ``S_V`` (µm² per µm³, surfaces
        of the assigned objects), ``N_V`` (objects per µm³: whole objects weighted by
        :func:`edge_corrected_weights`), ``N_V_exclude_touching`` (whole objects per µm³,
        unweighted) and ``N_V_biased`` (all objects per µm³, cut ones included).
    home : pandas.Series
        The region of each object id (0 = outside every region).

    Notes
    -----
    Objects cut by the volume border would be counted in two neighbouring volumes and their
    size is unknown. Leaving them out (``N_V_exclude_touching``) undercounts, and more so for
    large objects: a condition with larger organelles would show a spurious drop in N_V.
    ``N_V`` corrects for this with the Miles–Lantuéjoul weights, computed for the whole image
    volume as the window; for a region smaller than the volume (a cell) it is the same
    correction, exact on average over regions rather than for each one. ``N_V_biased`` counts
    cut objects as whole ones and overcounts. Report ``N_V`` and keep the other two beside it.

    Examples
    --------
    >>> labels = np.zeros((6, 12, 12), np.uint32)
    >>> labels[1:5, 1:5, 1:5] = 1; labels[0:4, 6:12, 6:12] = 2  # object 2 is cut by the border
    >>> table = pd.DataFrame({"id": [1, 2], "surface_um2": [0.5, 1.0], "z0": [1, 0],
    ...                       "y0": [1, 6], "x0": [1, 6], "z1": [5, 4], "y1": [5, 12],
    ...                       "x1": [5, 12], "touches_volume_border": [False, True]})
    >>> regions, home = region_densities(labels, None, table, spacing=(100, 100, 100))
    >>> regions[["objects", "objects_whole", "V_V", "N_V"]].round(3).to_dict("records")
    [{'objects': 2, 'objects_whole': 1, 'V_V': 0.241, 'N_V': 20.408}]
    >>> home.tolist()
    [1, 1]
    """
    spacing = normalize_spacing(spacing, 3)
    voxel_um3 = float(np.prod(spacing)) / 1e9
    shape = tuple(labels.shape)
    if region_labels is not None and tuple(region_labels.shape) != shape:
        raise TesseraInputError(
            f"region mask has shape {tuple(region_labels.shape)}, the labels {shape}"
        )
    region_voxels, overlap = _overlaps(labels, region_labels, shape=shape, block=block)
    home = {}
    for (o, r), c in overlap.items():
        if c > home.get(o, (0, 0))[1]:
            home[o] = (r, c)
    by_id = objects.set_index("id")
    missing = [c for c in ("z0", "y0", "x0", "z1", "y1", "x1") if c not in by_id.columns]
    if missing:
        raise TesseraInputError(f"object table lacks bounding-box column(s) {missing}")
    extent = pd.DataFrame({a: by_id[f"{a}1"] - by_id[f"{a}0"] for a in "zyx"})
    rows = []
    for region in sorted(r for r in region_voxels if r > 0):
        vol = region_voxels[region] * voxel_um3
        members = [o for o, (r, _) in home.items() if r == region]
        inside = sum(c for (o, r), c in overlap.items() if r == region) * voxel_um3
        surface = float(by_id.loc[members, "surface_um2"].sum()) if members else 0.0
        whole_ids = [o for o in members if not bool(by_id.loc[o, "touches_volume_border"])]
        weights = (
            edge_corrected_weights(extent.loc[whole_ids].to_numpy(), shape)
            if whole_ids
            else np.zeros(0)
        )
        rows.append(
            {
                "region": region,
                "region_volume_um3": vol,
                "objects": len(members),
                "objects_whole": len(whole_ids),
                "V_V": inside / vol,
                "S_V": surface / vol,
                "N_V": float(weights.sum()) / vol,
                "N_V_exclude_touching": len(whole_ids) / vol,
                "N_V_biased": len(members) / vol,
            }
        )
    table = pd.DataFrame(rows, columns=list(REGION_COLUMNS))
    region_of = pd.Series(
        {int(o): home.get(int(o), (0, 0))[0] for o in objects["id"]}, name="region", dtype=np.int64
    )
    return table, region_of
