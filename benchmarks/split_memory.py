"""Memory and time of splitting one object box (tessera.objects.split.split_touching).

Two balls of radius 1200 nm touching over a small contact, in a 64 x 256 x 512 box at
40 x 16 x 16 nm; peak RSS of a fresh interpreter with and without the split, so the difference
is what splitting one box of that many voxels needs. The objects job's limit on the box
(``tessera.objects.label.SPLIT_MAX_VOXELS``) rests on the bytes per voxel printed here.

Usage: python benchmarks/split_memory.py
"""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import report, run_measured  # noqa: E402

SHAPE = (64, 256, 512)
CODE = """
import sys
import numpy as np
from tessera.objects.split import split_touching
zz, yy, xx = np.ogrid[:64, :256, :512]
m = ((zz * 40 - 1280) ** 2 + (yy * 16 - 2048) ** 2 + (xx * 16 - 2000) ** 2 < 1200**2) | (
    (zz * 40 - 1280) ** 2 + (yy * 16 - 2048) ** 2 + (xx * 16 - 4300) ** 2 < 1200**2
)
if sys.argv[1] == "split":
    pieces = split_touching(m, spacing=(40, 16, 16), min_depth_nm=40, structure=np.ones((3, 3, 3), bool))
    assert pieces.max() == 2
"""


def main():
    voxels = SHAPE[0] * SHAPE[1] * SHAPE[2]
    base_s, base_mib = run_measured(CODE, "mask")
    split_s, split_mib = run_measured(CODE, "split")
    per_voxel = (split_mib - base_mib) * 2**20 / voxels
    rows = [
        ("box voxels", voxels, ""),
        ("peak RSS without split", base_mib, "MiB"),
        ("peak RSS with split", split_mib, "MiB"),
        ("split needs per voxel", per_voxel, "bytes"),
        ("split wall time", split_s - base_s, "s"),
    ]
    figures = {
        "voxels": voxels,
        "base_mib": base_mib,
        "split_mib": split_mib,
        "bytes_per_voxel": per_voxel,
        "split_seconds": split_s - base_s,
    }
    report("split_memory", rows, figures)


if __name__ == "__main__":
    main()
