"""How often the split of touching organelles cuts a single tubular organelle whose width varies.

Mitochondria in neurites are tubes whose width swells and narrows along their length. By shape
alone such a tube looks like a chain of touching organelles, so the split
(tessera.objects.split.split_touching) can cut it where it narrows. This benchmark renders
single tubes on a near-isotropic grid (10 nm on every axis, a FIB-SEM stack at ``downsample:
2``): a capsule of length 600-1500 nm along a random direction whose radius is r0 (1 + m sin(2 pi
s / w)) at distance s along its axis, r0 40-90 nm, wavelength w 250-500 nm, for modulations m of
10, 20 and 30 %. Each true mask (no prediction noise, which only deepens the narrowings) is split
at several depths, with the default minimum object volume, and the tubes cut into more than one
piece are counted. A cut is always wrong here: every mask is one organelle.

Figures: ``cut_fraction[depth][modulation]`` (tubes cut / tubes), and ``default_depth_nm``, the
depth ``auto`` gives at this voxel size.

Usage: python benchmarks/split_tubes.py
"""

import numpy as np
from _common import objects_default, report

from tessera.objects.depth_limit import split_depth_nm
from tessera.objects.split import split_touching

SPACING_NM = 10.0
DEPTHS_NM = (20, 30, 40, 50)
MODULATIONS = (0.1, 0.2, 0.3)
TUBES = 12  # per modulation; the same tubes at every depth
SEED = 0


def tube(rng, modulation):
    """One varicose capsule's mask, with a margin of background on every side."""
    r0, length, wave = rng.uniform(40, 90), rng.uniform(600, 1500), rng.uniform(250, 500)
    n = int((length + 4 * r0) / SPACING_NM) + 6
    zz, yy, xx = (np.indices((n, n, n)).astype(np.float32) - n / 2) * SPACING_NM
    axis = rng.normal(size=3)
    axis /= np.linalg.norm(axis)
    along = zz * axis[0] + yy * axis[1] + xx * axis[2]
    on_axis = np.clip(along, -length / 2, length / 2)
    radius = r0 * (1 + modulation * np.sin(2 * np.pi * on_axis / wave))
    squared = zz**2 + yy**2 + xx**2 - along**2 + (along - on_axis) ** 2
    return squared < radius**2


def main():
    rng = np.random.default_rng(SEED)
    spacing = (SPACING_NM,) * 3
    structure = np.ones((3, 3, 3), bool)
    min_volume = objects_default("min_volume_um3")
    masks = {m: [tube(rng, m) for _ in range(TUBES)] for m in MODULATIONS}
    cut = {}
    for depth in DEPTHS_NM:
        cut[depth] = {}
        for m, tubes in masks.items():
            pieces = [
                split_touching(
                    mask,
                    spacing=spacing,
                    min_depth_nm=depth,
                    structure=structure,
                    min_volume_um3=min_volume,
                ).max()
                for mask in tubes
            ]
            cut[depth][m] = sum(int(k) > 1 for k in pieces) / len(tubes)
    default = split_depth_nm(objects_default("split_min_depth_nm"), spacing)
    rows = [
        (f"depth {depth} nm, width ±{m:.0%}: single tubes cut", cut[depth][m], "of 1")
        for depth in DEPTHS_NM
        for m in MODULATIONS
    ]
    rows.append(("depth auto gives at 10 nm voxels", float(default), "nm"))
    report(
        "split_tubes",
        rows,
        {
            "spacing_nm": list(spacing),
            "tubes_per_modulation": TUBES,
            "cut_fraction": {str(d): {str(m): v for m, v in c.items()} for d, c in cut.items()},
            "default_depth_nm": float(default),
        },
    )


if __name__ == "__main__":
    main()
