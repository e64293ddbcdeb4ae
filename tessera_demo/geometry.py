"""The organelle geometry of a demo volume: cells, nuclei, lipid droplets and vesicles.

All geometry is done in physical nanometres, so shapes are round in physical space whatever the
voxel spacing. Spacing is given per array axis in the order z, y, x. Mitochondria, the main
target, are in :mod:`tessera_demo.mitochondria`.
"""

import math

import numpy as np
from scipy import ndimage

__all__ = [
    "MEMBRANE_HALF_NM",
    "Grid",
    "cell_clearance",
    "make_cells",
    "make_lipids",
    "make_nuclei",
    "make_vesicles",
    "nucleus_clearance",
    "smooth_noise",
]

# Geometry, in nm. Cell and nucleus sizes are shrunk for fields narrower than the reference
# field (small test volumes); mitochondria and vesicles never are.
_REFERENCE_FIELD_NM = 4096.0
_CELL_SPACING_NM = 3500.0
#: Half the thickness of a cell membrane; organelles keep at least this far from the boundary.
MEMBRANE_HALF_NM = 12.0
_NUCLEUS_RADIUS_NM = (1000.0, 1400.0)
_NUCLEUS_MARGIN_NM = 100.0
_NUCLEUS_ROUGHNESS = 0.03
_LIPID_RADIUS_NM = (250.0, 550.0)
_LIPID_PER_UM2 = 0.25
_VESICLE_RADIUS_NM = (20.0, 30.0)
_VESICLE_RIM_NM = 10.0
_VESICLE_PER_UM3 = 60.0


class Grid:
    """Voxel-centre coordinates (nm) of a volume; voxel (0, 0, 0) is at the origin.

    Parameters
    ----------
    shape : tuple of 3 int
        Voxels in z, y, x.
    spacing : sequence of 3 float
        Voxel size in nm per axis (z, y, x).

    Attributes
    ----------
    axes : list of 3 float32 arrays
        Centre of every voxel along each axis, in nm.
    extent : (3,) float64 array
        Distance from the first to the last voxel centre per axis, in nm.
    voxel_um3 : float
        Volume of one voxel in µm³.
    g : float
        Field width over the 4096 nm reference field, clipped to [0.35, 1]: the factor on cell
        and nucleus sizes in narrow test volumes.

    Examples
    --------
    >>> grid = Grid((8, 64, 64), (40.0, 8.0, 8.0))
    >>> grid.extent.tolist(), grid.box((0.0, 0.0, 0.0), (80.0, 8.0, 8.0))
    ([280.0, 504.0, 504.0], (slice(0, 3, None), slice(0, 2, None), slice(0, 2, None)))
    """

    def __init__(self, shape, spacing):
        self.shape = shape
        self.spacing = np.asarray(spacing, dtype=np.float64)
        self.axes = [
            np.arange(n, dtype=np.float32) * np.float32(s)
            for n, s in zip(shape, spacing, strict=True)
        ]
        self.extent = np.array([(n - 1) * s for n, s in zip(shape, spacing, strict=True)])
        self.voxel_um3 = float(np.prod(self.spacing)) * 1e-9
        self.g = float(
            np.clip(min(self.extent[1], self.extent[2]) / _REFERENCE_FIELD_NM, 0.35, 1.0)
        )

    def box(self, lo, hi):
        """Index slices of the voxels whose centres may lie in [lo, hi] (nm), or None."""
        sl = []
        for a in range(3):
            i0 = max(int(math.floor(lo[a] / self.spacing[a])), 0)
            i1 = min(int(math.ceil(hi[a] / self.spacing[a])) + 1, self.shape[a])
            if i1 <= i0:
                return None
            sl.append(slice(i0, i1))
        return tuple(sl)

    def coords(self, box):
        """Voxel-centre coordinates (nm) of `box`, as z, y, x arrays broadcasting to its shape."""
        z, y, x = (self.axes[a][box[a]] for a in range(3))
        return z[:, None, None], y[None, :, None], x[None, None, :]


def smooth_noise(rng, grid, corr_nm):
    """Gaussian noise with unit sd, correlated over about `corr_nm`, float32 on the grid.

    Parameters
    ----------
    rng : numpy.random.Generator
        Source of the noise.
    grid : Grid
        The volume.
    corr_nm : float
        Correlation length in nm: white noise on a grid of ``corr_nm / 2`` steps, smoothed and
        interpolated linearly to the voxels.

    Returns
    -------
    ndarray of float32, shape ``grid.shape``

    Examples
    --------
    >>> grid = Grid((8, 64, 64), (40.0, 8.0, 8.0))
    >>> noise = smooth_noise(np.random.default_rng(0), grid, 250.0)
    >>> noise.dtype, noise.shape
    (dtype('float32'), (8, 64, 64))
    """
    steps = [max(1.0, corr_nm / 2.0 / s) for s in grid.spacing]
    coarse_shape = [
        int(math.ceil((n - 1) / st)) + 2 for n, st in zip(grid.shape, steps, strict=True)
    ]
    coarse = rng.standard_normal(coarse_shape, dtype=np.float32)
    coarse = ndimage.gaussian_filter(
        coarse,
        sigma=[
            1.0 if st > 1 else corr_nm / 2 / s for st, s in zip(steps, grid.spacing, strict=True)
        ],
        mode="wrap",
    )
    coarse /= max(float(coarse.std()), 1e-6)
    out = coarse
    for axis, (n, st) in enumerate(zip(grid.shape, steps, strict=True)):
        pos = np.arange(n, dtype=np.float64) / st
        i0 = np.floor(pos).astype(np.intp)
        w = (pos - i0).astype(np.float32)
        shape = [1, 1, 1]
        shape[axis] = n
        w = w.reshape(shape)
        out = np.take(out, i0, axis=axis) * (1 - w) + np.take(out, i0 + 1, axis=axis) * w
    return out.astype(np.float32, copy=False)


def _rotation_2d(theta):
    return math.cos(theta), math.sin(theta)


# ---------------------------------------------------------------------------------------------
# cells: 3D Voronoi cells of well-separated seeds, membranes on the bisector planes


def make_cells(rng, grid):
    """3D Voronoi cells of well-separated seeds, with membranes on the bisector planes.

    Parameters
    ----------
    rng : numpy.random.Generator
        Draws the seeds.
    grid : Grid
        The volume.

    Returns
    -------
    dict
        ``seeds`` (k, 3) seed positions in nm (some outside the volume), ``owner`` int16 index
        of the nearest seed per voxel, ``boundary`` float32 distance (nm) to the cell boundary,
        ``labels`` uint16 cell labels 1..n (0 on membranes), ``present`` seeds owning voxels.

    Examples
    --------
    >>> cells = make_cells(np.random.default_rng(0), Grid((8, 64, 64), (40.0, 8.0, 8.0)))
    >>> cells["labels"].dtype, bool(cells["labels"].max() >= 1)
    (dtype('uint16'), True)
    """
    g = grid.g
    spacing = _CELL_SPACING_NM * g
    margin = np.array([1000.0 * g, 1500.0 * g, 1500.0 * g])
    lo, hi = -margin, grid.extent + margin
    seeds = []
    for _ in range(600):
        p = lo + rng.random(3) * (hi - lo)
        if all(np.linalg.norm(p - q) >= spacing for q in seeds):
            seeds.append(p)
    seeds = np.array(seeds)
    k = len(seeds)
    z, y, x = grid.axes
    # Nearest seed = argmax of the linear score q.s - |s|^2 / 2.
    best = np.full(grid.shape, -np.inf, dtype=np.float32)
    owner = np.zeros(grid.shape, dtype=np.int16)

    def score(j):
        s = seeds[j].astype(np.float32)
        plane = y[:, None] * s[1] + x[None, :] * s[2] - np.float32(0.5 * seeds[j] @ seeds[j])
        return (z * s[0])[:, None, None] + plane[None]

    for j in range(k):
        sj = score(j)
        better = sj > best
        np.maximum(best, sj, out=best)
        owner[better] = j
    present = np.unique(owner)
    # Distance to the cell boundary: min over neighbours of the distance to the bisector plane.
    inv = np.zeros((k, k), dtype=np.float32)
    for a in range(k):
        for b in range(k):
            if a != b:
                inv[a, b] = 1.0 / np.linalg.norm(seeds[a] - seeds[b])
    boundary = np.full(grid.shape, np.inf, dtype=np.float32)
    for j in present:
        if len(present) == 1:
            break
        f = (best - score(j)) * np.take(inv[:, j], owner)
        f[owner == j] = np.inf
        np.minimum(boundary, f, out=boundary)
    labels_of_seed = np.zeros(k, dtype=np.uint16)
    labels_of_seed[present] = np.arange(1, len(present) + 1, dtype=np.uint16)
    labels = labels_of_seed[owner]
    labels[boundary < MEMBRANE_HALF_NM] = 0
    return {
        "seeds": seeds,
        "owner": owner,
        "boundary": boundary,
        "labels": labels,
        "present": present,
    }


def cell_clearance(cells, p):
    """(owner seed, distance from point p to its Voronoi cell boundary), exact.

    Parameters
    ----------
    cells : dict
        As returned by :func:`make_cells` (only ``seeds`` is used).
    p : (3,) array
        Point in nm.

    Returns
    -------
    tuple of (int, float)
        Index of the nearest seed and the distance to the nearest bisector plane (inf with
        one seed).

    Examples
    --------
    >>> cells = {"seeds": np.array([[0.0, 0.0, 0.0], [0.0, 0.0, 100.0]])}
    >>> cell_clearance(cells, np.array([0.0, 0.0, 20.0]))
    (0, 30.0)
    """
    seeds = cells["seeds"]
    d2 = ((seeds - p) ** 2).sum(axis=1)
    a = int(np.argmin(d2))
    if len(seeds) == 1:
        return a, np.inf
    others = np.arange(len(seeds)) != a
    f = (d2[others] - d2[a]) / (2.0 * np.linalg.norm(seeds[others] - seeds[a], axis=1))
    return a, float(f.min())


# ---------------------------------------------------------------------------------------------
# nuclei: one rough ellipsoid in some cells, clipped to the cell interior


def make_nuclei(rng, rng_texture, grid, cells):
    """One rough ellipsoid nucleus in some cells, clipped to the cell interior.

    Parameters
    ----------
    rng : numpy.random.Generator
        Draws which cells have a nucleus, and its radii and orientation.
    rng_texture : numpy.random.Generator
        Draws the roughness of the surface.
    grid : Grid
        The volume.
    cells : dict
        As returned by :func:`make_cells`.

    Returns
    -------
    dict
        ``labels`` uint16 instance labels, ``depth`` float32 distance (nm) inside the nucleus,
        ``params`` one dict (centre, radii, theta, cell) per nucleus.

    Examples
    --------
    >>> grid = Grid((8, 64, 64), (40.0, 8.0, 8.0))
    >>> rng = np.random.default_rng(1)
    >>> nuclei = make_nuclei(rng, rng, grid, make_cells(rng, grid))
    >>> int(nuclei["labels"].max()) == len(nuclei["params"])
    True
    """
    g = grid.g
    seeds = cells["seeds"]
    present = cells["present"]
    centre = grid.extent / 2
    field = [
        (s, i)
        for i, s in enumerate(seeds)
        if i in set(present.tolist())
        and 0 <= s[1] <= grid.extent[1]
        and 0 <= s[2] <= grid.extent[2]
    ]
    if field:
        chosen = {min(field, key=lambda t: np.hypot(*(t[0][1:] - centre[1:])))[1]}
    else:
        chosen = {
            int(present[np.argmin([np.hypot(*(seeds[i][1:] - centre[1:])) for i in present])])
        }
    for _, i in field:
        if rng.random() < 0.35:
            chosen.add(i)
    labels = np.zeros(grid.shape, dtype=np.uint16)
    depth = np.zeros(grid.shape, dtype=np.float32)
    rough = smooth_noise(rng_texture, grid, 400.0)
    np.clip(rough, -2.0, 2.0, out=rough)
    params = []
    for i in sorted(chosen):
        radii = np.array([rng.uniform(*_NUCLEUS_RADIUS_NM) * g for _ in range(3)])
        c = seeds[i].copy()
        c[0] = float(np.clip(c[0], 0.0, grid.extent[0]))
        theta = rng.uniform(0, math.pi)
        reach = radii.max() / (1 - 2 * _NUCLEUS_ROUGHNESS)
        box = grid.box(c - reach, c + reach)
        if box is None:
            continue
        zz, yy, xx = grid.coords(box)
        cos, sin = _rotation_2d(theta)
        u = (yy - c[1]) * cos + (xx - c[2]) * sin
        v = -(yy - c[1]) * sin + (xx - c[2]) * cos
        rho = np.sqrt(((zz - c[0]) / radii[0]) ** 2 + (u / radii[1]) ** 2 + (v / radii[2]) ** 2)
        rho = rho * (1 + _NUCLEUS_ROUGHNESS * rough[box])
        inner = cells["boundary"][box] - (MEMBRANE_HALF_NM + _NUCLEUS_MARGIN_NM * g)
        inside = (rho <= 1) & (cells["owner"][box] == i) & (inner > 0)
        if not inside.any():
            continue
        nid = len(params) + 1
        labels[box][inside] = nid
        d = np.minimum((1 - rho) * radii.min(), inner)
        depth[box][inside] = d[inside]
        params.append({"centre": c, "radii": radii, "theta": theta, "cell": i})
    return {"labels": labels, "depth": depth, "params": params}


def nucleus_clearance(nuclei, p):
    """Lower bound of the distance from point p to every nucleus (inf if none).

    Parameters
    ----------
    nuclei : dict
        As returned by :func:`make_nuclei` (only ``params`` is used).
    p : (3,) array
        Point in nm.

    Returns
    -------
    float
        Negative inside a nucleus.

    Examples
    --------
    >>> one = {"centre": np.zeros(3), "radii": np.full(3, 100.0), "theta": 0.0}
    >>> bool(nucleus_clearance({"params": [one]}, np.zeros(3)) < 0)
    True
    >>> nucleus_clearance({"params": []}, np.zeros(3))
    inf
    """
    best = np.inf
    for n in nuclei["params"]:
        c, radii = n["centre"], n["radii"]
        cos, sin = _rotation_2d(n["theta"])
        dy, dx = p[1] - c[1], p[2] - c[2]
        u, v = dy * cos + dx * sin, -dy * sin + dx * cos
        rho = math.sqrt(((p[0] - c[0]) / radii[0]) ** 2 + (u / radii[1]) ** 2 + (v / radii[2]) ** 2)
        # rho shrinks by at most (1 - 2 * roughness); scaling the ellipsoid by 1/a_min at most
        # bounds the Euclidean distance from below.
        best = min(best, (rho * (1 - 2 * _NUCLEUS_ROUGHNESS) - 1) * radii.min())
    return best


# ---------------------------------------------------------------------------------------------
# lipid droplets (not a target): homogeneous spheres in the cytoplasm


def make_lipids(rng, grid, cells, nuclei):
    """Lipid droplets (not a target): homogeneous spheres in the cytoplasm.

    Parameters
    ----------
    rng : numpy.random.Generator
        Draws the count, radii and positions.
    grid : Grid
        The volume.
    cells, nuclei : dict
        As returned by :func:`make_cells` and :func:`make_nuclei`; droplets keep clear of
        membranes and nuclei.

    Returns
    -------
    dict
        ``mask`` bool, ``depth`` float32 distance (nm) inside a droplet, ``params`` list of
        (centre, radius).

    Examples
    --------
    >>> grid = Grid((8, 64, 64), (40.0, 8.0, 8.0))
    >>> rng = np.random.default_rng(2)
    >>> cells = make_cells(rng, grid)
    >>> lipids = make_lipids(rng, grid, cells, {"params": []})
    >>> lipids["mask"].shape, lipids["depth"].dtype
    ((8, 64, 64), dtype('float32'))
    """
    g = grid.g
    area_um2 = grid.extent[1] * grid.extent[2] * 1e-6
    n = rng.poisson(_LIPID_PER_UM2 * area_um2)
    placed = []
    for _ in range(n):
        r = rng.uniform(*_LIPID_RADIUS_NM) * g
        for _try in range(50):
            p = rng.random(3) * grid.extent
            _, cd = cell_clearance(cells, p)
            if cd < r + MEMBRANE_HALF_NM + 40 * g:
                continue
            if nucleus_clearance(nuclei, p) < r + 60 * g:
                continue
            if any(np.linalg.norm(p - q) < r + s + 60 * g for q, s in placed):
                continue
            placed.append((p, r))
            break
    mask = np.zeros(grid.shape, dtype=bool)
    depth = np.zeros(grid.shape, dtype=np.float32)
    for p, r in placed:
        box = grid.box(p - r, p + r)
        if box is None:
            continue
        zz, yy, xx = grid.coords(box)
        d = r - np.sqrt((zz - p[0]) ** 2 + (yy - p[1]) ** 2 + (xx - p[2]) ** 2)
        inside = d >= 0
        mask[box] |= inside
        depth[box][inside] = d[inside]
    return {"mask": mask, "depth": depth, "params": placed}


# ---------------------------------------------------------------------------------------------
# vesicles (not a target): small dark-rimmed spheres in free cytoplasm


def make_vesicles(rng, grid, free, cyto_um3):
    """Vesicles (not a target): small dark-rimmed spheres in free cytoplasm.

    Parameters
    ----------
    rng : numpy.random.Generator
        Draws the count, positions and radii.
    grid : Grid
        The volume.
    free : ndarray of bool
        Voxels of cytoplasm not taken by another organelle; rims are drawn only there.
    cyto_um3 : float
        Cytoplasm volume in µm³; the expected count is proportional to it.

    Returns
    -------
    dict
        ``rim`` bool mask of the vesicle rims, ``count`` vesicles placed.

    Examples
    --------
    >>> grid = Grid((8, 64, 64), (40.0, 8.0, 8.0))
    >>> free = np.ones(grid.shape, dtype=bool)
    >>> out = make_vesicles(np.random.default_rng(0), grid, free, 1.0)
    >>> out["count"] > 0 and bool(out["rim"].any())
    True
    """
    n = int(rng.poisson(_VESICLE_PER_UM3 * cyto_um3))
    cand = rng.random((3 * n + 10, 3)) * grid.extent
    idx = np.rint(cand / grid.spacing).astype(np.intp)
    ok = free[idx[:, 0], idx[:, 1], idx[:, 2]]
    centres = cand[ok][:n]
    radii = rng.uniform(*_VESICLE_RADIUS_NM, len(centres))
    rim = np.zeros(grid.shape, dtype=bool)
    if len(centres):
        reach = np.ceil(_VESICLE_RADIUS_NM[1] / grid.spacing).astype(int)
        off = np.stack(
            np.meshgrid(*[np.arange(-k, k + 1) for k in reach], indexing="ij"), axis=-1
        ).reshape(-1, 3)
        base = np.rint(centres / grid.spacing).astype(np.intp)
        vox = base[:, None, :] + off[None, :, :]
        inside = np.all((vox >= 0) & (vox < np.array(grid.shape)), axis=-1)
        dist = np.sqrt((((vox * grid.spacing) - centres[:, None, :]) ** 2).sum(axis=-1))
        on_rim = inside & (dist <= radii[:, None]) & (dist >= radii[:, None] - _VESICLE_RIM_NM)
        v = vox[on_rim]
        rim[v[:, 0], v[:, 1], v[:, 2]] = True
        rim &= free
    return {"rim": rim, "count": int(len(centres))}
