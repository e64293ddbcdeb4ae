"""Synthetic SBEM-like volumes with known truth, for exercising the pipeline end to end.

The demo study is invented: a lab compares brown adipose tissue of animals kept at
thermoneutrality with animals kept in the cold, three animals per condition, one dataset per
animal. Every dataset is rendered from a seed, so the whole study is reproducible byte for byte,
and every dataset carries its true labels, its true defects and a built-in effect on
mitochondrial volume (see ``demo/README.md``).

All geometry is done in physical nanometres, so shapes are round in physical space whatever the
voxel spacing. Spacing is given per array axis in the order z, y, x.

Rendering order: cells (3D Voronoi with membranes), nuclei, lipid droplets, mitochondria
(tubes along smooth random paths, some branched), vesicles, then imaging (in-plane blur,
shot-noise-like noise, drift along z) and finally the section defects.
"""

import json
import math
import zlib
from pathlib import Path

import numpy as np
import tifffile
from PIL import Image
from scipy import ndimage

from tessera.errors import TesseraInputError
from tessera.io.atomic import atomic_path
from tessera.spacing import normalize_spacing

__all__ = [
    "CONDITION_SCALES",
    "STUDY_DATASETS",
    "TARGETS",
    "dataset_seed",
    "render_dataset",
    "subject_volume_scale",
    "write_dataset",
]

#: Built-in effect: factor on the volume of every mitochondrion, per condition.
CONDITION_SCALES = {"thermoneutral": 1.0, "cold": 1.25}

#: The invented study: dataset name (one per animal) -> condition.
STUDY_DATASETS = {
    "tn1": "thermoneutral",
    "tn2": "thermoneutral",
    "tn3": "thermoneutral",
    "cd1": "cold",
    "cd2": "cold",
    "cd3": "cold",
}

#: Standard deviation of the per-animal log-normal factor on mitochondrial volume.
ANIMAL_SD = 0.05

#: Annotated targets, in the order tiles are written.
TARGETS = ("mitochondria", "nuclei")

# Geometry, in nm. Cell and nucleus sizes are shrunk for fields narrower than the reference
# field (small test volumes); mitochondria and vesicles never are.
_REFERENCE_FIELD_NM = 4096.0
_CELL_SPACING_NM = 3500.0
_MEMBRANE_HALF_NM = 12.0
_NUCLEUS_RADIUS_NM = (1000.0, 1400.0)
_NUCLEUS_MARGIN_NM = 100.0
_NUCLEUS_ROUGHNESS = 0.03
_ENVELOPE_NM = 25.0
_LIPID_RADIUS_NM = (250.0, 550.0)
_LIPID_PER_UM2 = 0.25
_MITO_RADIUS_NM = (100.0, 200.0)
_MITO_LENGTH_NM = (400.0, 2000.0)
_MITO_STEP_NM = 60.0
_MITO_BRANCHED = 0.2
_MITO_PER_UM3 = 3.0  # per µm³ of room for a mitochondrion of the reference radius
_MITO_REFERENCE_RADIUS_NM = 150.0
_MITO_GAP_NM = 20.0
_MITO_RIM_NM = 18.0
_MITO_CRISTA_PERIOD_NM = (60.0, 90.0)
_MITO_TRIES = 300
_VESICLE_RADIUS_NM = (20.0, 30.0)
_VESICLE_RIM_NM = 10.0
_VESICLE_PER_UM3 = 60.0

# Grey levels before blur, noise and drift.
_GREY = {
    "cytoplasm": 172.0,
    "membrane": 58.0,
    "nucleoplasm": 140.0,
    "chromatin": 98.0,
    "envelope": 66.0,
    "lipid": 150.0,
    "lipid_rim": 118.0,
    "matrix": 118.0,
    "crista": 84.0,
    "mito_rim": 60.0,
    "vesicle_rim": 78.0,
}

# Imaging.
_PSF_SIGMA_PX = 0.8
_NOISE_GAIN = 0.5
_DRIFT_PER_10_SECTIONS = (2.0, 4.0)
_DEFECT_BLUR_SIGMA_PX = 4.0
_TORN_FRACTION = (0.35, 0.6)
_MISSING_VALUE = 0.0

_STREAMS = (
    "cells",
    "nuclei",
    "lipids",
    "mito_count",
    "mito_shape",
    "mito_place",
    "vesicles",
    "texture",
    "noise",
    "defects",
    "tiles",
)

_MIN_SHAPE = (8, 64, 64)


# ---------------------------------------------------------------------------------------------
# public API


def dataset_seed(study_seed, dataset):
    """Return the seed of one dataset of a study, stable across runs and platforms.

    Parameters
    ----------
    study_seed : int
        Non-negative seed of the whole study.
    dataset : str
        Dataset name.

    Returns
    -------
    int
        CRC-32 (``zlib.crc32``) of the UTF-8 text ``"<study_seed>:<dataset>"``, in
        ``[0, 2**32)``. Python's ``hash()`` is salted per process and is not used.

    Examples
    --------
    >>> import zlib
    >>> dataset_seed(7, "tn1") == zlib.crc32(b"7:tn1")
    True
    >>> dataset_seed(7, "tn1") != dataset_seed(7, "tn2")
    True
    """
    study_seed = _check_seed(study_seed, name="study_seed")
    if not isinstance(dataset, str) or not dataset:
        raise TesseraInputError(f"dataset must be a non-empty string, got {dataset!r}")
    return zlib.crc32(f"{study_seed}:{dataset}".encode())


def subject_volume_scale(
    subject, condition, *, study_seed, condition_scales=None, animal_sd=ANIMAL_SD
):
    """Return the mitochondrial volume factor of one animal: condition effect times animal effect.

    Parameters
    ----------
    subject : str
        Animal name (for example ``"cd2"``).
    condition : str
        Condition name, a key of `condition_scales`.
    study_seed : int
        Non-negative seed of the study; the animal factor is drawn from it and `subject` only.
    condition_scales : dict of str to float, optional
        Volume factor per condition; default :data:`CONDITION_SCALES`.
    animal_sd : float, optional
        Standard deviation of the natural log of the animal factor (log-normal, median 1).

    Returns
    -------
    float
        ``condition_scales[condition] * exp(e)`` with ``e ~ Normal(0, animal_sd**2)`` drawn by
        ``numpy.random.default_rng(dataset_seed(study_seed, "animal:" + subject))``.

    Examples
    --------
    >>> subject_volume_scale("cd1", "cold", study_seed=1, animal_sd=0.0)
    1.25
    """
    scales = CONDITION_SCALES if condition_scales is None else dict(condition_scales)
    if condition not in scales:
        raise TesseraInputError(f"condition must be one of {sorted(scales)}, got {condition!r}")
    base = _check_scale(scales[condition], name=f"condition_scales[{condition!r}]")
    try:
        sd = float(animal_sd)
    except (TypeError, ValueError):
        raise TesseraInputError(f"animal_sd must be a number, got {animal_sd!r}") from None
    if not math.isfinite(sd) or sd < 0:
        raise TesseraInputError(f"animal_sd must be finite and >= 0, got {animal_sd!r}")
    if not isinstance(subject, str) or not subject:
        raise TesseraInputError(f"subject must be a non-empty string, got {subject!r}")
    rng = np.random.default_rng(dataset_seed(study_seed, "animal:" + subject))
    eps = float(rng.normal(0.0, sd)) if sd > 0 else 0.0
    return float(base * math.exp(eps))


def render_dataset(
    *, seed, shape=(64, 512, 512), spacing=(40.0, 8.0, 8.0), mito_volume_scale=1.0, defects=True
):
    """Render one synthetic SBEM-like volume with its true labels.

    Parameters
    ----------
    seed : int
        Non-negative seed; the same seed and options give the same bytes.
    shape : tuple of 3 int, optional
        ``(P, M, N)`` voxels in z, y, x; at least ``(8, 64, 64)``.
    spacing : float or sequence of 3 float, optional
        Voxel size in nm per axis (z, y, x).
    mito_volume_scale : float, optional
        Factor on the volume of every mitochondrion. The geometry of each mitochondrion (radius,
        path length, branch) is scaled isotropically by ``mito_volume_scale ** (1/3)``, so its
        continuous volume is multiplied by exactly `mito_volume_scale`. The size draws do not
        depend on this factor, so two renders with the same seed are paired.
    defects : bool, optional
        Add one blank-or-torn section and one blurred section.

    Returns
    -------
    dict
        ``raw`` : (P, M, N) uint8 image.
        ``mitochondria`` : (P, M, N) uint16 instance labels, 1..n, 0 background.
        ``nuclei`` : (P, M, N) uint16 instance labels.
        ``cells`` : (P, M, N) uint16 cell labels, 0 on membranes.
        ``defects`` : dict with lists of section indices: ``blank`` (sections with missing
        data: wholly blank or torn), ``torn`` (those of them only partly missing), ``blurred``.
        ``summary`` : dict of plain Python numbers (counts, volumes in µm³, drift, ...).

    Notes
    -----
    Labels are the true geometry; defects and imaging affect ``raw`` only.

    Examples
    --------
    >>> out = render_dataset(seed=3, shape=(10, 96, 96))
    >>> out["raw"].dtype, out["mitochondria"].dtype, out["raw"].shape
    (dtype('uint8'), dtype('uint16'), (10, 96, 96))
    """
    seed = _check_seed(seed)
    shape = _check_shape(shape)
    spacing = normalize_spacing(spacing, 3)
    scale = _check_scale(mito_volume_scale)
    if not isinstance(defects, (bool, np.bool_)):
        raise TesseraInputError(f"defects must be true or false, got {defects!r}")
    rng = _streams(seed)
    grid = _Grid(shape, spacing)

    cells = _make_cells(rng["cells"], grid)
    nuclei = _make_nuclei(rng["nuclei"], rng["texture"], grid, cells)
    lipids = _make_lipids(rng["lipids"], grid, cells, nuclei)
    free = (cells["labels"] > 0) & (nuclei["labels"] == 0) & ~lipids["mask"]
    cyto_um3 = float(np.count_nonzero(free)) * grid.voxel_um3
    mitos = _make_mitochondria(rng, grid, cells, nuclei, lipids, scale)
    # Safety net: the placement keeps clearances, so this removes nothing in practice.
    mitos["labels"][~free] = 0
    free &= mitos["labels"] == 0
    vesicles = _make_vesicles(rng["vesicles"], grid, free, cyto_um3)

    image = _paint(rng["texture"], grid, cells, nuclei, lipids, mitos, vesicles)
    plan = _plan_defects(rng["defects"], grid) if defects else None
    if plan:
        _defocus(image, plan)
    drift = _image(rng["noise"], grid, image)
    if plan:
        defect_record = _remove_material(grid, image, plan)
    else:
        defect_record = {"blank": [], "torn": [], "blurred": []}
    raw = np.clip(np.rint(image), 0, 255).astype(np.uint8)

    summary = _summary(grid, cells, nuclei, lipids, mitos, vesicles, cyto_um3, scale, drift)
    return {
        "raw": raw,
        "mitochondria": mitos["labels"],
        "nuclei": nuclei["labels"],
        "cells": cells["labels"],
        "defects": defect_record,
        "summary": summary,
    }


def write_dataset(
    out_dir,
    *,
    dataset,
    condition,
    subject,
    seed,
    shape=(64, 512, 512),
    spacing=(40.0, 8.0, 8.0),
    mito_volume_scale=1.0,
    tile_size=128,
    tiles_per_target=6,
    heldout_per_target=3,
    defects=True,
):
    """Render one dataset and write it, with painted annotation tiles, into `out_dir`.

    Parameters
    ----------
    out_dir : str or Path
        Dataset directory; created, or replaced as a whole if it exists.
    dataset, condition, subject : str
        Names recorded in ``truth.json`` and ``tiles/points.tsv``.
    seed : int
        Seed of this dataset (see :func:`dataset_seed`).
    shape, spacing, mito_volume_scale, defects
        As in :func:`render_dataset`.
    tile_size : int, optional
        Side of the square annotation tiles in pixels.
    tiles_per_target : int, optional
        Painted (training) tiles per target.
    heldout_per_target : int, optional
        Held-out tiles per target, every one at least 3 sections away from every painted tile
        of the same target.

    Notes
    -----
    Files written::

        raw.tif                      uint8, one page per section, zlib
        cells.tif                    uint16 cell labels (0 = membrane)
        truth/mitochondria.tif       uint16 instance labels
        truth/nuclei.tif             uint16 instance labels
        truth.json                   parameters, defects, summary
        tiles/points.tsv             tile_id, dataset, target, z, y, x, size, set
        tiles/<target>/<tile_id>.png 0 background, 255 target

    A tile centred at (y, x) covers rows ``y - size//2`` to ``y - size//2 + size - 1`` (and
    likewise columns). Tiles avoid defect sections. Everything is written into a temporary
    sibling directory that is renamed to `out_dir` at the end, so a half-written dataset is
    never visible under `out_dir`.
    """
    out_dir = Path(out_dir)
    for key, value in (("dataset", dataset), ("condition", condition), ("subject", subject)):
        if not isinstance(value, str) or not value or any(c in value for c in "/\\\t\n"):
            raise TesseraInputError(
                f"{key} must be a non-empty string without slashes, tabs or newlines, got {value!r}"
            )
    shape = _check_shape(shape)
    spacing = normalize_spacing(spacing, 3)
    tile_size = _check_int(tile_size, "tile_size", low=8)
    if tile_size > min(shape[1], shape[2]):
        raise TesseraInputError(
            f"tile_size must not exceed the section size {shape[1:]}, got {tile_size}"
        )
    n_painted = _check_int(tiles_per_target, "tiles_per_target", low=1)
    n_heldout = _check_int(heldout_per_target, "heldout_per_target", low=0)

    out = render_dataset(
        seed=seed,
        shape=shape,
        spacing=spacing,
        mito_volume_scale=mito_volume_scale,
        defects=defects,
    )
    bad = set(out["defects"]["blank"]) | set(out["defects"]["blurred"])
    tiles = _choose_tiles(
        _streams(seed)["tiles"], out, bad, dataset, tile_size, n_painted, n_heldout
    )

    with atomic_path(out_dir) as tmp:
        tmp.mkdir()
        _write_tiff(tmp / "raw.tif", out["raw"], spacing)
        _write_tiff(tmp / "cells.tif", out["cells"], spacing)
        (tmp / "truth").mkdir()
        for target in TARGETS:
            _write_tiff(tmp / "truth" / f"{target}.tif", out[target], spacing)
        for target in TARGETS:
            (tmp / "tiles" / target).mkdir(parents=True)
        lines = ["\t".join(("tile_id", "dataset", "target", "z", "y", "x", "size", "set"))]
        half = tile_size // 2
        for t in tiles:
            z, y, x = t["z"], t["y"], t["x"]
            cut = out[t["target"]][
                z, y - half : y - half + tile_size, x - half : x - half + tile_size
            ]
            mask = np.where(cut > 0, 255, 0).astype(np.uint8)
            Image.fromarray(mask).save(tmp / "tiles" / t["target"] / f"{t['tile_id']}.png")
            lines.append(
                "\t".join(
                    str(v)
                    for v in (t["tile_id"], dataset, t["target"], z, y, x, tile_size, t["set"])
                )
            )
        (tmp / "tiles" / "points.tsv").write_text("\n".join(lines) + "\n", encoding="utf-8")
        truth = {
            "generator": "tessera.demo",
            "dataset": dataset,
            "condition": condition,
            "subject": subject,
            "seed": int(seed),
            "shape": [int(v) for v in shape],
            "spacing_nm": [float(v) for v in spacing],
            "axes": "zyx",
            "mito_volume_scale": float(mito_volume_scale),
            "tiles": {
                "size": tile_size,
                "painted_per_target": n_painted,
                "heldout_per_target": n_heldout,
                "min_heldout_distance_sections": 3,
            },
            "defects": out["defects"],
            "summary": out["summary"],
        }
        (tmp / "truth.json").write_text(
            json.dumps(truth, indent=2, sort_keys=True) + "\n", encoding="utf-8"
        )


# ---------------------------------------------------------------------------------------------
# input checks


def _check_int(value, name, *, low):
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)):
        raise TesseraInputError(f"{name} must be an integer >= {low}, got {value!r}")
    if value < low:
        raise TesseraInputError(f"{name} must be an integer >= {low}, got {value!r}")
    return int(value)


def _check_seed(seed, *, name="seed"):
    return _check_int(seed, name, low=0)


def _check_shape(shape):
    try:
        values = tuple(shape)
    except TypeError:
        raise TesseraInputError(f"shape must be 3 integers (z, y, x), got {shape!r}") from None
    if len(values) != 3:
        raise TesseraInputError(f"shape must be 3 integers (z, y, x), got {shape!r}")
    out = tuple(_check_int(v, "shape values", low=1) for v in values)
    if any(v < m for v, m in zip(out, _MIN_SHAPE)):
        raise TesseraInputError(f"shape must be at least {_MIN_SHAPE}, got {out}")
    return out


def _check_scale(value, *, name="mito_volume_scale"):
    try:
        f = float(value)
    except (TypeError, ValueError):
        raise TesseraInputError(f"{name} must be a number, got {value!r}") from None
    if not math.isfinite(f) or not 0.1 <= f <= 10.0:
        raise TesseraInputError(f"{name} must be between 0.1 and 10, got {value!r}")
    return f


def _streams(seed):
    """One independent random generator per rendering step, all derived from `seed`."""
    children = np.random.SeedSequence(_check_seed(seed)).spawn(len(_STREAMS))
    return {name: np.random.default_rng(c) for name, c in zip(_STREAMS, children)}


# ---------------------------------------------------------------------------------------------
# geometry helpers


class _Grid:
    """Voxel-centre coordinates (nm) of a volume; voxel (0, 0, 0) is at the origin."""

    def __init__(self, shape, spacing):
        self.shape = shape
        self.spacing = np.asarray(spacing, dtype=np.float64)
        self.axes = [np.arange(n, dtype=np.float32) * np.float32(s) for n, s in zip(shape, spacing)]
        self.extent = np.array([(n - 1) * s for n, s in zip(shape, spacing)])
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
        z, y, x = (self.axes[a][box[a]] for a in range(3))
        return z[:, None, None], y[None, :, None], x[None, None, :]


def _smooth_noise(rng, grid, corr_nm):
    """Gaussian noise with unit sd, correlated over about `corr_nm`, float32 on the grid."""
    steps = [max(1.0, corr_nm / 2.0 / s) for s in grid.spacing]
    coarse_shape = [int(math.ceil((n - 1) / st)) + 2 for n, st in zip(grid.shape, steps)]
    coarse = rng.standard_normal(coarse_shape, dtype=np.float32)
    coarse = ndimage.gaussian_filter(
        coarse,
        sigma=[1.0 if st > 1 else corr_nm / 2 / s for st, s in zip(steps, grid.spacing)],
        mode="wrap",
    )
    coarse /= max(float(coarse.std()), 1e-6)
    out = coarse
    for axis, (n, st) in enumerate(zip(grid.shape, steps)):
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


def _make_cells(rng, grid):
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
    labels[boundary < _MEMBRANE_HALF_NM] = 0
    return {
        "seeds": seeds,
        "owner": owner,
        "boundary": boundary,
        "labels": labels,
        "present": present,
    }


def _cell_clearance(cells, p):
    """(owner seed, distance from point p to its Voronoi cell boundary), exact."""
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


def _make_nuclei(rng, rng_texture, grid, cells):
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
    rough = _smooth_noise(rng_texture, grid, 400.0)
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
        inner = cells["boundary"][box] - (_MEMBRANE_HALF_NM + _NUCLEUS_MARGIN_NM * g)
        inside = (rho <= 1) & (cells["owner"][box] == i) & (inner > 0)
        if not inside.any():
            continue
        nid = len(params) + 1
        labels[box][inside] = nid
        d = np.minimum((1 - rho) * radii.min(), inner)
        depth[box][inside] = d[inside]
        params.append({"centre": c, "radii": radii, "theta": theta, "cell": i})
    return {"labels": labels, "depth": depth, "params": params}


def _nucleus_clearance(nuclei, p):
    """Lower bound of the distance from point p to every nucleus (inf if none)."""
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


def _make_lipids(rng, grid, cells, nuclei):
    g = grid.g
    area_um2 = grid.extent[1] * grid.extent[2] * 1e-6
    n = rng.poisson(_LIPID_PER_UM2 * area_um2)
    placed = []
    for _ in range(n):
        r = rng.uniform(*_LIPID_RADIUS_NM) * g
        for _try in range(50):
            p = rng.random(3) * grid.extent
            _, cd = _cell_clearance(cells, p)
            if cd < r + _MEMBRANE_HALF_NM + 40 * g:
                continue
            if _nucleus_clearance(nuclei, p) < r + 60 * g:
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
# mitochondria: tubes along smooth random paths, confined to the cytoplasm of one cell


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

    def ok(self, p, r, half_step, cell, bounds):
        lo, hi = bounds
        if np.any(p < lo - 1e-6) or np.any(p > hi + 1e-6):
            return False
        owner, cd = _cell_clearance(self.cells, p)
        if owner != cell or cd < r + _MEMBRANE_HALF_NM + _MITO_GAP_NM:
            return False
        pad = r + _MITO_GAP_NM + half_step
        if _nucleus_clearance(self.nuclei, p) < pad:
            return False
        for q, s in self.lipids:
            if np.linalg.norm(p - q) - s < pad:
                return False
        if len(self.points):
            d = np.sqrt(((self.points - p) ** 2).sum(axis=1))
            if np.any(d < self.reach + pad):
                return False
        return True

    def add(self, points, r, half_step):
        self.points = np.vstack([self.points, points])
        self.reach = np.concatenate([self.reach, np.full(len(points), r + half_step)])


def _walk(rng, space, start, direction, length, r, n_steps, cell, *, turn_sd=0.22):
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
            if space.ok(q, r, step / 2, cell, bounds):
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
        cell, _ = _cell_clearance(space.cells, p)
        hits += space.ok(p, r, 0.0, cell, bounds)
    return hits / n_points * float(np.prod(grid.extent)) * 1e-9


def _make_mitochondria(rng, grid, cells, nuclei, lipids, scale):
    # The count follows the room left by nuclei, lipid droplets and membranes, measured for a
    # fixed reference radius so that it does not depend on `scale`.
    space = _Space(grid, cells, nuclei, lipids)
    usable = _usable_um3(rng["mito_count"], grid, space)
    n = max(1, int(rng["mito_count"].poisson(_MITO_PER_UM3 * usable)))
    shape_rng = rng["mito_shape"]
    radius = _latin(shape_rng, n, *_MITO_RADIUS_NM)
    length = _latin(shape_rng, n, *_MITO_LENGTH_NM)
    branched = np.zeros(n, dtype=bool)
    branched[shape_rng.permutation(n)[: int(round(_MITO_BRANCHED * n))]] = True
    branch_at = shape_rng.uniform(0.3, 0.7, n)
    branch_len = shape_rng.uniform(0.3, 0.6, n)
    branch_angle = shape_rng.uniform(math.radians(50), math.radians(90), n)
    period = shape_rng.uniform(*_MITO_CRISTA_PERIOD_NM, n)
    nominal = math.pi * radius**2 * length + 4.0 / 3.0 * math.pi * radius**3
    order = np.argsort(-nominal, kind="stable")

    lin = scale ** (1.0 / 3.0)
    # One generator per mitochondrion, so renders that differ only in `scale` stay paired.
    place_rngs = rng["mito_place"].spawn(n)
    labels = np.zeros(grid.shape, dtype=np.uint16)
    depth = np.full(grid.shape, -1.0, dtype=np.float32)
    arc = np.zeros(grid.shape, dtype=np.float32)
    placed = []
    unplaced = 0
    for i in order:
        place = place_rngs[i]
        r = radius[i] * lin
        L = length[i] * lin
        n_steps = max(2, int(math.ceil(length[i] / _MITO_STEP_NM)))
        result = None
        for _try in range(_MITO_TRIES):
            bounds = space.bounds(r)
            start = bounds[0] + place.random(3) * (bounds[1] - bounds[0])
            cell, _ = _cell_clearance(cells, start)
            if not space.ok(start, r, L / n_steps / 2, cell, bounds):
                continue
            main = _walk(place, space, start, _random_direction(place), L, r, n_steps, cell)
            if main is None:
                continue
            parts = [(main, r, L / n_steps / 2)]
            if branched[i]:
                rb = 0.75 * r
                k = int(np.clip(round(branch_at[i] * n_steps), 1, n_steps - 1))
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
            result = parts
            break
        if result is None:
            unplaced += 1
            continue
        mid = len(placed) + 1
        for path, rr, half_step in result:
            _render_tube(grid, path, rr, mid, labels, depth, arc)
            space.add(path, rr, half_step)
        placed.append(
            {
                "id": mid,
                "branched": bool(branched[i]),
                "period": float(period[i]),
                "radius": float(r),
                "length": float(L),
                "cell": int(cell),
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


def _render_tube(grid, path, r, mid, labels, depth, arc):
    """Paint the union of capsules along `path` (radius r) into the label/depth/arc arrays."""
    s = 0.0
    for p0, p1 in zip(path[:-1], path[1:]):
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


# ---------------------------------------------------------------------------------------------
# vesicles (not a target): small dark-rimmed spheres in free cytoplasm


def _make_vesicles(rng, grid, free, cyto_um3):
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


# ---------------------------------------------------------------------------------------------
# image formation


def _paint(rng, grid, cells, nuclei, lipids, mitos, vesicles):
    img = np.float32(_GREY["cytoplasm"]) + np.float32(7.0) * _smooth_noise(rng, grid, 250.0)
    lip = lipids["mask"]
    img[lip] = _GREY["lipid"]
    img[lip & (lipids["depth"] < 12.0)] = _GREY["lipid_rim"]

    nuc = nuclei["labels"] > 0
    if nuc.any():
        chrom = _smooth_noise(rng, grid, 70.0)[nuc]
        nd = nuclei["depth"][nuc]
        val = np.float32(_GREY["nucleoplasm"]) + np.float32(6.0) * chrom
        # Chromatin clumps, denser under the envelope (peripheral heterochromatin).
        dark = (chrom > 0.6) | ((nd < 90.0) & (chrom > -0.3))
        val[dark] = np.float32(_GREY["chromatin"]) + np.float32(6.0) * chrom[dark]
        val[nd < _ENVELOPE_NM] = _GREY["envelope"]
        img[nuc] = val

    lab = mitos["labels"]
    mito = lab > 0
    if mito.any():
        period = np.zeros(len(mitos["params"]) + 1, dtype=np.float32)
        phase = np.zeros(len(mitos["params"]) + 1, dtype=np.float32)
        for p in mitos["params"]:
            period[p["id"]] = p["period"]
            phase[p["id"]] = (p["id"] * 0.618) % 1.0
        lm = lab[mito]
        dep = mitos["depth"][mito]
        wave = np.cos(2 * np.pi * (mitos["arc"][mito] / period[lm] + phase[lm]))
        val = np.where(
            (wave > 0.55) & (dep > _MITO_RIM_NM + 6), _GREY["crista"], _GREY["matrix"]
        ).astype(np.float32)
        val[dep < _MITO_RIM_NM] = _GREY["mito_rim"]
        img[mito] = val

    img[vesicles["rim"]] = _GREY["vesicle_rim"]
    img[cells["labels"] == 0] = _GREY["membrane"]
    return img


def _image(rng, grid, img):
    """In-plane blur, shot-noise-like noise and a linear drift along z, in place."""
    ndimage.gaussian_filter(img, sigma=(0, _PSF_SIGMA_PX, _PSF_SIGMA_PX), output=img)
    noise = rng.standard_normal(grid.shape, dtype=np.float32)
    noise *= np.sqrt(np.maximum(img, 1.0) * np.float32(_NOISE_GAIN))
    img += noise
    slope = rng.uniform(*_DRIFT_PER_10_SECTIONS) * (1 if rng.random() < 0.5 else -1)
    z = np.arange(grid.shape[0], dtype=np.float32)
    img += (np.float32(slope / 10.0) * (z - (grid.shape[0] - 1) / 2))[:, None, None]
    return float(slope)


def _plan_defects(rng, grid):
    """Where the lost (blank or torn) and the out-of-focus sections are, and how torn."""
    nz = grid.shape[0]
    allowed = list(range(2, nz - 2))
    lost = int(rng.choice(allowed))
    blurred = int(rng.choice([z for z in allowed if abs(z - lost) >= 2]))
    torn = bool(rng.random() < 0.5)
    plan = {"lost": lost, "blurred": blurred, "torn": torn}
    if torn:
        plan["fraction"] = rng.uniform(*_TORN_FRACTION)
        plan["theta"] = rng.uniform(0, 2 * math.pi)
    return plan


def _defocus(img, plan):
    # Out-of-focus blur happens in the optics, before the detector adds its noise.
    z = plan["blurred"]
    img[z] = ndimage.gaussian_filter(img[z], sigma=_DEFECT_BLUR_SIGMA_PX)


def _remove_material(grid, img, plan):
    lost = plan["lost"]
    if plan["torn"]:
        yy, xx = np.mgrid[0 : grid.shape[1], 0 : grid.shape[2]]
        proj = yy * math.cos(plan["theta"]) + xx * math.sin(plan["theta"])
        cut = np.quantile(proj, 1 - plan["fraction"])
        img[lost][proj > cut] = _MISSING_VALUE
    else:
        img[lost] = _MISSING_VALUE
    return {"blank": [lost], "torn": [lost] if plan["torn"] else [], "blurred": [plan["blurred"]]}


def _summary(grid, cells, nuclei, lipids, mitos, vesicles, cyto_um3, scale, drift):
    lab = mitos["labels"]
    n = len(mitos["params"])
    vols = np.bincount(lab.ravel(), minlength=n + 1)[1:].astype(np.float64) * grid.voxel_um3
    faces = [lab[0], lab[-1], lab[:, 0], lab[:, -1], lab[:, :, 0], lab[:, :, -1]]
    touching = set()
    for f in faces:
        touching.update(int(v) for v in np.unique(f) if v)
    return {
        "n_cells": int(len(np.unique(cells["labels"])) - (cells["labels"] == 0).any()),
        "n_nuclei": int(nuclei["labels"].max()),
        "n_lipid_droplets": int(len(lipids["params"])),
        "n_mitochondria": int(n),
        "n_mitochondria_branched": int(sum(p["branched"] for p in mitos["params"])),
        "n_mitochondria_unplaced": int(mitos["unplaced"]),
        "n_mitochondria_touching_volume_boundary": len(touching),
        "n_vesicles": int(vesicles["count"]),
        "mito_volume_scale": float(scale),
        "mito_linear_scale": float(mitos["linear_scale"]),
        "mean_mito_volume_um3": float(vols.mean()) if n else 0.0,
        "median_mito_volume_um3": float(np.median(vols)) if n else 0.0,
        "total_mito_volume_um3": float(vols.sum()),
        "cytoplasm_volume_um3": float(cyto_um3),
        "mito_volume_fraction_of_cytoplasm": float(vols.sum() / cyto_um3) if cyto_um3 else 0.0,
        "voxel_volume_um3": float(grid.voxel_um3),
        "drift_grey_per_10_sections": float(drift),
    }


# ---------------------------------------------------------------------------------------------
# annotation tiles and files


def _choose_tiles(rng, out, bad, dataset, size, n_painted, n_heldout):
    nz = out["raw"].shape[0]
    usable = [z for z in range(nz) if z not in bad]
    tiles = []
    for target in TARGETS:
        mask = out[target] > 0
        zs = usable if rng.random() < 0.5 else usable[::-1]
        if n_heldout:
            held = zs[: max(1, len(zs) // 3)]
            painted = [z for z in zs if all(abs(z - h) >= 3 for h in held)]
        else:
            held, painted = [], list(zs)
        if not painted:
            raise TesseraInputError(
                f"shape {out['raw'].shape} is too thin for painted and held-out tiles 3 "
                "sections apart"
            )
        chosen = []
        for kind, pool, count in (("painted", painted, n_painted), ("heldout", held, n_heldout)):
            for k in range(count):
                z, y, x = _pick_centre(rng, mask, pool, size, chosen)
                chosen.append((z, y, x))
                tiles.append(
                    {
                        "tile_id": f"{dataset}-{target[:4]}-{kind[0]}{k + 1:02d}",
                        "target": target,
                        "z": z,
                        "y": y,
                        "x": x,
                        "set": kind,
                    }
                )
    return tiles


def _pick_centre(rng, mask, pool, size, chosen, n_candidates=64):
    """A tile centre that shows both the target and background where possible."""
    _, ny, nx = mask.shape
    half = size // 2
    zc = rng.choice(pool, n_candidates)
    yc = rng.integers(half, ny - size + half + 1, n_candidates)
    xc = rng.integers(half, nx - size + half + 1, n_candidates)
    best, best_score = None, -1.0
    for z, y, x in zip(zc, yc, xc):
        z, y, x = int(z), int(y), int(x)
        frac = float(mask[z, y - half : y - half + size, x - half : x - half + size].mean())
        score = min(frac, 1 - frac)
        near = any(cz == z and abs(cy - y) < half and abs(cx - x) < half for cz, cy, cx in chosen)
        if near:
            score -= 1.0
        if score >= 0.1:
            return z, y, x
        if score > best_score:
            best, best_score = (z, y, x), score
    return best


def _write_tiff(path, array, spacing):
    tifffile.imwrite(
        path,
        array,
        photometric="minisblack",
        compression="zlib",
        metadata={"axes": "ZYX", "spacing_nm": [float(s) for s in spacing]},
    )
