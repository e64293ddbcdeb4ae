"""One synthetic SBEM-like volume with its true labels.

Rendering order: cells (3D Voronoi with membranes), nuclei, lipid droplets, mitochondria
(tubes along smooth random paths, some branched), vesicles, then imaging (in-plane blur,
shot-noise-like noise, drift along z) and finally the section defects. Every step draws from
its own random stream (:func:`tessera_demo.study.streams`).
"""

import numpy as np
from scipy import ndimage

from tessera.errors import TesseraInputError
from tessera.spacing import normalize_spacing
from tessera_demo.checks import check_scale, check_seed, check_shape
from tessera_demo.defects import defocus, plan_defects, remove_material
from tessera_demo.geometry import (
    Grid,
    make_cells,
    make_lipids,
    make_nuclei,
    make_vesicles,
    smooth_noise,
)
from tessera_demo.mitochondria import make_mitochondria
from tessera_demo.study import streams

__all__ = ["render_dataset"]

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
# Thickness (nm) drawn in the darker grey of a nuclear envelope and of a mitochondrion's rim.
_ENVELOPE_NM = 25.0
_MITO_RIM_NM = 18.0

# Imaging.
_PSF_SIGMA_PX = 0.8
_NOISE_GAIN = 0.5
_DRIFT_PER_10_SECTIONS = (2.0, 4.0)


def render_dataset(*, seed, shape, spacing, mito_volume_scale=1.0, defects=True):
    """Render one synthetic SBEM-like volume with its true labels.

    Parameters
    ----------
    seed : int
        Non-negative seed; the same seed and options give the same bytes.
    shape : tuple of 3 int
        ``(P, M, N)`` voxels in z, y, x; at least ``(8, 64, 64)`` (the demo study's is the
        config's ``demo: shape``).
    spacing : float or sequence of 3 float
        Voxel size in nm per axis (z, y, x) (the demo study's is in its datasets sheet).
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
    >>> out = render_dataset(seed=3, shape=(10, 96, 96), spacing=(40.0, 8.0, 8.0))
    >>> out["raw"].dtype, out["mitochondria"].dtype, out["raw"].shape
    (dtype('uint8'), dtype('uint16'), (10, 96, 96))
    """
    seed = check_seed(seed)
    shape = check_shape(shape)
    spacing = normalize_spacing(spacing, 3)
    scale = check_scale(mito_volume_scale)
    if not isinstance(defects, (bool, np.bool_)):
        raise TesseraInputError(f"defects must be true or false, got {defects!r}")
    rng = streams(seed)
    grid = Grid(shape, spacing)

    cells = make_cells(rng["cells"], grid)
    nuclei = make_nuclei(rng["nuclei"], rng["texture"], grid, cells)
    lipids = make_lipids(rng["lipids"], grid, cells, nuclei)
    free = (cells["labels"] > 0) & (nuclei["labels"] == 0) & ~lipids["mask"]
    cyto_um3 = float(np.count_nonzero(free)) * grid.voxel_um3
    mitos = make_mitochondria(rng, grid, cells, nuclei, lipids, scale)
    # Safety net: the placement keeps clearances, so this removes nothing in practice.
    mitos["labels"][~free] = 0
    free &= mitos["labels"] == 0
    vesicles = make_vesicles(rng["vesicles"], grid, free, cyto_um3)

    image = _paint(rng["texture"], grid, cells, nuclei, lipids, mitos, vesicles)
    plan = plan_defects(rng["defects"], grid) if defects else None
    if plan:
        defocus(image, plan)
    drift = _image(rng["noise"], grid, image)
    if plan:
        defect_record = remove_material(grid, image, plan)
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


def _paint(rng, grid, cells, nuclei, lipids, mitos, vesicles):
    """Grey levels of every compartment, with texture, before blur, noise and drift."""
    img = np.float32(_GREY["cytoplasm"]) + np.float32(7.0) * smooth_noise(rng, grid, 250.0)
    lip = lipids["mask"]
    img[lip] = _GREY["lipid"]
    img[lip & (lipids["depth"] < 12.0)] = _GREY["lipid_rim"]

    nuc = nuclei["labels"] > 0
    if nuc.any():
        chrom = smooth_noise(rng, grid, 70.0)[nuc]
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


def _touching_another(lab):
    """Ids of the instances that share a face with another instance (clustered ones)."""
    ids = set()
    for axis in range(3):
        a = np.moveaxis(lab, axis, 0)
        here, there = a[:-1], a[1:]
        touch = (here > 0) & (there > 0) & (here != there)
        ids.update(int(v) for v in np.unique(here[touch]))
        ids.update(int(v) for v in np.unique(there[touch]))
    return ids


def _summary(grid, cells, nuclei, lipids, mitos, vesicles, cyto_um3, scale, drift):
    """Plain Python numbers recorded in ``truth.json``: counts, volumes, drift."""
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
        "n_mitochondria_touching_another": len(_touching_another(lab)),
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
