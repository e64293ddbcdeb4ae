"""Mitochondria of a demo volume: tubes along smooth random paths, some branched, some in
clusters of touching mitochondria (as packed in brown adipocytes).

Each mitochondrion stays in the cytoplasm of one cell, clear of membranes, nuclei, lipid
droplets and the mitochondria placed before it, except that a clustered one starts pressed
against one placed before it (their centrelines closer than the sum of their radii, so the two
touch over a contact patch and each keeps its own id). Geometry is in nm (axes z, y, x).
"""

import math

import numpy as np

from tessera_demo.geometry import MEMBRANE_HALF_NM, cell_clearance, nucleus_clearance

__all__ = ["make_mitochondria"]

_MITO_RADIUS_NM = (100.0, 200.0)
_MITO_LENGTH_NM = (400.0, 2000.0)
_MITO_STEP_NM = 60.0
_MITO_BRANCHED = 0.2
_MITO_PER_UM3 = 3.0  # per µm³ of room for a mitochondrion of the reference radius
_MITO_REFERENCE_RADIUS_NM = 150.0
_MITO_GAP_NM = 20.0
_MITO_CRISTA_PERIOD_NM = (60.0, 90.0)
_MITO_TRIES = 300
_MITO_CLUSTERED = 0.35  # placed against an earlier mitochondrion
#: Centreline distance of a clustered pair over the sum of their radii: below 1 they overlap a
#: little and touch over a patch whose radius is a fraction of theirs.
_MITO_CONTACT = (0.82, 0.95)
_MITO_PARTNER_TRIES = 40


def _latin(rng, n, low, high):
    """n draws, one per equal-probability stratum of Uniform(low, high), in random order."""
    u = (rng.permutation(n) + rng.random(n)) / n
    return low + u * (high - low)


class _Space:
    """Clearance checks for centreline points of a new mitochondrion."""

    def __init__(self, grid, cells, nuclei, lipids):
        self.grid, self.cells, self.nuclei = grid, cells, nuclei
        self.lipids = lipids["params"]
        self.points = np.zeros((0, 3))
        self.reach = np.zeros(0)
        self.owner = np.zeros(0, np.int64)

    def bounds(self, r):
        half = self.grid.spacing / 2
        lo = r + half
        hi = self.grid.extent - r - half
        # A stack thinner than the tube: keep the centre near the middle; the tube is cut by the
        # top and bottom of the volume (the path stays inside, so the tube stays one piece).
        thin = lo > hi
        lo = np.where(thin, 0.4 * self.grid.extent, lo)
        hi = np.where(thin, 0.6 * self.grid.extent, hi)
        return lo, hi

    def ok(self, p, r, half_step, cell, bounds, contact=None):
        """Whether a centreline point fits; `contact` = (id, distance): the centreline of
        mitochondrion `id` may come as close as `distance` (a clustered one touches it)."""
        lo, hi = bounds
        if np.any(p < lo - 1e-6) or np.any(p > hi + 1e-6):
            return False
        owner, cd = cell_clearance(self.cells, p)
        if owner != cell or cd < r + MEMBRANE_HALF_NM + _MITO_GAP_NM:
            return False
        pad = r + _MITO_GAP_NM + half_step
        if nucleus_clearance(self.nuclei, p) < pad:
            return False
        for q, s in self.lipids:
            if np.linalg.norm(p - q) - s < pad:
                return False
        if len(self.points):
            d = np.sqrt(((self.points - p) ** 2).sum(axis=1))
            need = self.reach + pad
            if contact is not None:
                need = np.where(self.owner == contact[0], contact[1], need)
            if np.any(d < need):
                return False
        return True

    def add(self, points, r, half_step, owner=0):
        self.points = np.vstack([self.points, points])
        self.reach = np.concatenate([self.reach, np.full(len(points), r + half_step)])
        self.owner = np.concatenate([self.owner, np.full(len(points), owner, np.int64)])


def _walk(rng, space, start, direction, length, r, n_steps, cell, *, turn_sd=0.22, contact=None):
    """Smooth random path of `n_steps` equal steps; None if it runs out of room."""
    step = length / n_steps
    bounds = space.bounds(r)
    older = int(math.ceil(2.5 * r / step)) + 1
    pts = [start]
    d = direction
    for _ in range(n_steps):
        for attempt in range(12):
            turn = rng.normal(0.0, turn_sd * (1 + 0.6 * attempt), 3) * np.array([0.5, 1.0, 1.0])
            nd = d + turn
            nd /= np.linalg.norm(nd)
            q = pts[-1] + step * nd
            # No folding back onto itself: keep away from its own earlier centreline.
            if older < len(pts) and np.any(
                ((np.asarray(pts[: len(pts) - older]) - q) ** 2).sum(axis=1) < (2 * r) ** 2
            ):
                continue
            if space.ok(q, r, step / 2, cell, bounds, contact):
                break
        else:
            return None
        pts.append(q)
        d = nd
    return np.array(pts)


def _random_direction(rng):
    d = rng.normal(0.0, 1.0, 3) * np.array([0.3, 1.0, 1.0])
    return d / np.linalg.norm(d)


def _usable_um3(rng, grid, space, n_points=3000):
    """Volume (µm³) where a mitochondrion of the reference radius could start, by sampling."""
    r = _MITO_REFERENCE_RADIUS_NM
    bounds = space.bounds(r)
    hits = 0
    for _ in range(n_points):
        p = rng.random(3) * grid.extent
        cell, _ = cell_clearance(space.cells, p)
        hits += space.ok(p, r, 0.0, cell, bounds)
    return hits / n_points * float(np.prod(grid.extent)) * 1e-9


def make_mitochondria(rng, grid, cells, nuclei, lipids, scale):
    """Mitochondria: tubes along smooth random paths, confined to the cytoplasm of one cell.

    Parameters
    ----------
    rng : dict of str to numpy.random.Generator
        The dataset's streams (:func:`tessera_demo.study.streams`); ``mito_count``,
        ``mito_shape`` and ``mito_place`` are used.
    grid : tessera_demo.geometry.Grid
        The volume.
    cells, nuclei, lipids : dict
        As returned by :mod:`tessera_demo.geometry`; mitochondria keep clear of membranes,
        nuclei, lipid droplets and each other.
    scale : float
        Factor on the volume of every mitochondrion: radius, path length and branch are
        scaled by ``scale ** (1/3)``. The size draws do not depend on it.

    Returns
    -------
    dict
        ``labels`` uint16 instance labels 1..n, ``depth`` float32 distance (nm) inside the tube
        (-1 outside), ``arc`` float32 position (nm) along the centreline, ``params`` one dict
        per placed mitochondrion (``touches``: the id it was placed against, 0 for none), ``unplaced`` count of those that found no room,
        ``linear_scale`` ``scale ** (1/3)``.

    Examples
    --------
    >>> from tessera_demo.geometry import Grid, make_cells
    >>> from tessera_demo.study import streams
    >>> rng, grid = streams(4), Grid((8, 96, 96), (40.0, 8.0, 8.0))
    >>> cells = make_cells(rng["cells"], grid)
    >>> mitos = make_mitochondria(rng, grid, cells, {"params": []}, {"params": []}, 1.0)
    >>> int(mitos["labels"].max()) == len(mitos["params"])
    True
    """
    # The count follows the room left by nuclei, lipid droplets and membranes, measured for a
    # fixed reference radius so that it does not depend on `scale`.
    space = _Space(grid, cells, nuclei, lipids)
    usable = _usable_um3(rng["mito_count"], grid, space)
    n = max(1, int(rng["mito_count"].poisson(_MITO_PER_UM3 * usable)))
    sizes = _draw_sizes(rng["mito_shape"], n)
    radius, length = sizes["radius"], sizes["length"]
    nominal = math.pi * radius**2 * length + 4.0 / 3.0 * math.pi * radius**3
    order = np.argsort(-nominal, kind="stable")

    lin = scale ** (1.0 / 3.0)
    # One generator per mitochondrion, so renders that differ only in `scale` stay paired.
    place_rngs = rng["mito_place"].spawn(n)
    labels = np.zeros(grid.shape, dtype=np.uint16)
    depth = np.full(grid.shape, -1.0, dtype=np.float32)
    arc = np.zeros(grid.shape, dtype=np.float32)
    placed, mains = [], []  # mains: (main centreline, radius, cell) of each placed one
    unplaced = 0
    for i in order:
        r = radius[i] * lin
        L = length[i] * lin
        n_steps = max(2, int(math.ceil(length[i] / _MITO_STEP_NM)))
        result, cell, against = None, None, 0
        if sizes["clustered"][i] and placed:
            result, cell, against = _place_against(
                place_rngs[i], space, cells, mains, float(sizes["contact"][i]), r, L, n_steps
            )
        if result is None:
            result, cell = _place(place_rngs[i], space, cells, sizes, i, r, L, n_steps)
        if result is None:
            unplaced += 1
            continue
        mid = len(placed) + 1
        for path, rr, half_step in result:
            _render_tube(grid, path, rr, mid, labels, depth, arc)
            space.add(path, rr, half_step, owner=mid)
        mains.append((result[0][0], r, cell))
        placed.append(
            {
                "id": mid,
                "branched": bool(sizes["branched"][i]) and not against,
                "period": float(sizes["period"][i]),
                "radius": float(r),
                "length": float(L),
                "cell": int(cell),
                "touches": int(against),
            }
        )
    return {
        "labels": labels,
        "depth": depth,
        "arc": arc,
        "params": placed,
        "unplaced": unplaced,
        "linear_scale": lin,
    }


def _draw_sizes(shape_rng, n):
    """Base sizes of `n` mitochondria (before the volume factor), drawn in this fixed order."""
    radius = _latin(shape_rng, n, *_MITO_RADIUS_NM)
    length = _latin(shape_rng, n, *_MITO_LENGTH_NM)
    branched = np.zeros(n, dtype=bool)
    branched[shape_rng.permutation(n)[: int(round(_MITO_BRANCHED * n))]] = True
    branch_at = shape_rng.uniform(0.3, 0.7, n)
    branch_len = shape_rng.uniform(0.3, 0.6, n)
    branch_angle = shape_rng.uniform(math.radians(50), math.radians(90), n)
    period = shape_rng.uniform(*_MITO_CRISTA_PERIOD_NM, n)
    # drawn last, so the draws above are those of a volume without clusters
    clustered = shape_rng.random(n) < _MITO_CLUSTERED
    contact = shape_rng.uniform(*_MITO_CONTACT, n)
    return {
        "clustered": clustered,
        "contact": contact,
        "radius": radius,
        "length": length,
        "branched": branched,
        "branch_at": branch_at,
        "branch_len": branch_len,
        "branch_angle": branch_angle,
        "period": period,
    }


def _place(place, space, cells, sizes, i, r, L, n_steps):
    """Centrelines of mitochondrion `i` as [(path, radius, half step), ...] and its cell.

    Up to ``_MITO_TRIES`` random starts; (None, None) if none of them leaves room.
    """
    length, branch_len, branch_angle = sizes["length"], sizes["branch_len"], sizes["branch_angle"]
    for _try in range(_MITO_TRIES):
        bounds = space.bounds(r)
        start = bounds[0] + place.random(3) * (bounds[1] - bounds[0])
        cell, _ = cell_clearance(cells, start)
        if not space.ok(start, r, L / n_steps / 2, cell, bounds):
            continue
        main = _walk(place, space, start, _random_direction(place), L, r, n_steps, cell)
        if main is None:
            continue
        parts = [(main, r, L / n_steps / 2)]
        if sizes["branched"][i]:
            rb = 0.75 * r
            k = int(np.clip(round(sizes["branch_at"][i] * n_steps), 1, n_steps - 1))
            tangent = main[k + 1] - main[k - 1]
            tangent /= np.linalg.norm(tangent)
            perp = np.cross(tangent, _random_direction(place))
            perp /= max(np.linalg.norm(perp), 1e-9)
            bdir = math.cos(branch_angle[i]) * tangent + math.sin(branch_angle[i]) * perp
            b_steps = max(2, int(math.ceil(branch_len[i] * length[i] / _MITO_STEP_NM)))
            # The parent is not yet in `space`, so the branch may start inside it.
            side = _walk(
                place, space, main[k], bdir, branch_len[i] * L, rb, b_steps, cell, turn_sd=0.15
            )
            if side is None:
                continue
            parts.append((side, rb, branch_len[i] * L / b_steps / 2))
        return parts, cell
    return None, None


def _place_against(place, space, cells, mains, contact, r, L, n_steps):
    """An unbranched centreline starting pressed against a placed mitochondrion.

    It starts beside a random point of a random placed one's main centreline, `contact` times
    the sum of their radii away (so the two overlap a little and touch over a patch), runs
    along it, and may come that close to it all along but no closer to anything else than an
    ordinary mitochondrion. Returns ([(path, radius, half step)], cell, id touched), or
    (None, None, 0) when ``_MITO_PARTNER_TRIES`` attempts find no room."""
    half_step = L / n_steps / 2
    for _try in range(_MITO_PARTNER_TRIES):
        against = int(place.integers(len(mains)))
        path, r_other, cell = mains[against]
        k = int(place.integers(len(path)))
        tangent = path[min(k + 1, len(path) - 1)] - path[max(k - 1, 0)]
        tangent /= max(np.linalg.norm(tangent), 1e-9)
        side = np.cross(tangent, _random_direction(place))
        side /= max(np.linalg.norm(side), 1e-9)
        touch = (against + 1, contact * (r_other + r))
        start = path[k] + touch[1] * side
        bounds = space.bounds(r)
        if not space.ok(start, r, half_step, cell, bounds, touch):
            continue
        direction = tangent if place.random() < 0.5 else -tangent
        main = _walk(place, space, start, direction, L, r, n_steps, cell, contact=touch)
        if main is not None:
            return [(main, r, half_step)], cell, against + 1
    return None, None, 0


def _render_tube(grid, path, r, mid, labels, depth, arc):
    """Paint the union of capsules along `path` (radius r) into the label/depth/arc arrays."""
    s = 0.0
    for p0, p1 in zip(path[:-1], path[1:], strict=True):
        seg = p1 - p0
        seg_len = float(np.linalg.norm(seg))
        box = grid.box(np.minimum(p0, p1) - r, np.maximum(p0, p1) + r)
        if box is None:
            s += seg_len
            continue
        zz, yy, xx = grid.coords(box)
        rz, ry, rx = (zz - np.float32(p0[0])), (yy - np.float32(p0[1])), (xx - np.float32(p0[2]))
        u = seg / max(seg_len, 1e-9)
        t = rz * np.float32(u[0]) + ry * np.float32(u[1]) + rx * np.float32(u[2])
        np.clip(t, 0, seg_len, out=t)
        d2 = (
            (rz - t * np.float32(u[0])) ** 2
            + (ry - t * np.float32(u[1])) ** 2
            + (rx - t * np.float32(u[2])) ** 2
        )
        dep = np.float32(r) - np.sqrt(d2)
        sub = depth[box]
        upd = (dep >= 0) & (dep > sub) & ((labels[box] == 0) | (labels[box] == mid))
        if not upd.any():
            s += seg_len
            continue
        sub[upd] = dep[upd]
        labels[box][upd] = mid
        arc[box][upd] = (s + t)[upd]
        s += seg_len
