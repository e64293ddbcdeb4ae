"""Time per 512 x 512 section of the image features: 2D bank against the 3D bank of one section.

For each spacing the 3D features of the centre section of a stack of 2 z_reach + 1 sections are
computed by ``section_filter_bank_3d``; the 2D ``filter_bank`` (``mirror_edges=False``) of the
same section is the baseline. For scale, the full 3D ``filter_bank`` of the whole stack is timed
on a 64 x 64 crop of it and its time per centre section is scaled to 512 x 512 (its cost grows
with the pixels filtered; this is what computing the whole stack to keep its centre would cost).
The closed-form 3 x 3 eigenvalues are timed beside numpy.linalg.eigvalsh on 512 x 512 matrices.

Default sigmas, one thread (BLAS and OpenMP pools limited to one). Seconds are process CPU time
(steadier than wall time on a shared machine), best of a few runs; wall time is written too.
Input is float32 noise: filter cost does not depend on the values.

Run from the repository root: .venv/bin/python benchmarks/section_features.py
"""

import os
import sys
import time
from pathlib import Path

for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[var] = "1"  # one core: the figures are per core

import numpy as np  # noqa: E402
from threadpoolctl import threadpool_limits  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import report  # noqa: E402

from tessera.cascade.features import DEFAULT_SIGMAS, feature_names, filter_bank  # noqa: E402
from tessera.cascade.section_features import (  # noqa: E402
    section_bank_z_reach,
    section_filter_bank_3d,
    symmetric_eigenvalues_3x3,
)

SIDE, CROP, REPEATS, SEED = 512, 64, 3, 0
SPACINGS = {"10x10x10": (10.0, 10.0, 10.0), "20x10x10": (20.0, 10.0, 10.0)}


def timed(function, *args, repeats=REPEATS, **kwargs):
    """Best (CPU seconds, wall seconds) of `repeats` calls of ``function(*args, **kwargs)``."""
    best = (float("inf"), float("inf"))
    for _ in range(repeats):
        cpu, wall = time.process_time(), time.perf_counter()
        function(*args, **kwargs)
        best = min(best, (time.process_time() - cpu, time.perf_counter() - wall))
    return best


def main():
    rng = np.random.default_rng(SEED)
    sigmas = DEFAULT_SIGMAS
    rows, figures = [], {"section_px": SIDE, "threads": 1, "sigmas": list(sigmas), "spacings": {}}
    section = rng.random((SIDE, SIDE), dtype=np.float32)
    cpu, wall = timed(filter_bank, section, sigmas=sigmas, mirror_edges=False)
    figures["filter_bank_2d"] = {
        "cpu_s": round(cpu, 3),
        "wall_s": round(wall, 3),
        "channels": len(feature_names(sigmas)),
    }
    rows.append(("2D filter_bank", cpu, "s CPU"))
    for label, spacing in SPACINGS.items():
        reach = section_bank_z_reach(sigmas, spacing=spacing)
        stack = rng.random((2 * reach + 1, SIDE, SIDE), dtype=np.float32)
        cpu3, wall3 = timed(section_filter_bank_3d, stack, sigmas=sigmas, spacing=spacing)
        crop = np.ascontiguousarray(stack[:, :CROP, :CROP])
        full_cpu, _ = timed(
            filter_bank, crop, sigmas=sigmas, spacing=spacing, mirror_edges=False, repeats=1
        )
        per_section = full_cpu * (SIDE / CROP) ** 2
        figures["spacings"][label] = {
            "z_reach": reach,
            "sections": 2 * reach + 1,
            "section_bank_3d_cpu_s": round(cpu3, 3),
            "section_bank_3d_wall_s": round(wall3, 3),
            "ratio_to_2d": round(cpu3 / cpu, 2),
            "full_3d_bank_per_section_cpu_s_scaled": round(per_section, 1),
            "full_3d_bank_crop_px": CROP,
            "channels": len(feature_names(sigmas, ndim=3)),
        }
        rows += [
            (f"3D section bank, {label} nm ({2 * reach + 1} sections)", cpu3, "s CPU"),
            (f"  ratio to 2D, {label} nm", cpu3 / cpu, "x"),
            (f"  full 3D bank of the stack, {label} nm (scaled)", per_section, "s CPU"),
        ]
    entries = [rng.normal(size=(SIDE, SIDE)).astype(np.float32) for _ in range(6)]
    closed, _ = timed(symmetric_eigenvalues_3x3, *entries)
    a00, a01, a02, a11, a12, a22 = entries
    matrices = np.stack(
        [
            np.stack([a00, a01, a02], -1),
            np.stack([a01, a11, a12], -1),
            np.stack([a02, a12, a22], -1),
        ],
        -2,
    ).astype(np.float64)
    lapack, _ = timed(np.linalg.eigvalsh, matrices)
    figures["eigenvalues_512x512"] = {
        "closed_form_cpu_s": round(closed, 3),
        "eigvalsh_cpu_s": round(lapack, 3),
    }
    rows += [
        ("3x3 eigenvalues, closed form", closed, "s CPU"),
        ("3x3 eigenvalues, numpy eigvalsh", lapack, "s CPU"),
    ]
    report("section_features", rows, figures)


if __name__ == "__main__":
    with threadpool_limits(limits=1):
        main()
