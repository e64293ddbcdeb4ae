"""Ingest throughput and memory: does peak memory stay flat when the stack grows 8x?

Writes a synthetic 8-bit multi-page TIFF (1 MiB sections, EM-like texture) of N sections and one of 8N sections (same section
size), ingests each in a fresh process, and reports throughput (MB of voxels per second) and the
ratio of peak resident memory of the large run over the small one (1.0 = fully streamed).

Run from the repository root: .venv/bin/python benchmarks/ingest.py
"""

import sys
import tempfile
from pathlib import Path

import numpy as np
import tifffile
from scipy.ndimage import gaussian_filter

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import report, run_measured  # noqa: E402

SECTION = (1024, 1024)
SECTIONS_1X = 64
CHILD = """
import sys
from tessera.workflow.jobs.ingest import ingest_job
ingest_job(sys.argv[1], sys.argv[2], fmt="tiff_stack", spacing=(40, 8, 8), chunks=(1, 512, 512))
"""


def write_stack(path, sections, seed):
    # EM-like sections: smooth texture plus shot-like noise (pure noise would not compress at all).
    rng = np.random.default_rng(seed)
    texture = gaussian_filter(rng.normal(0, 1, SECTION).astype(np.float32), 3)
    texture = texture / texture.std() * 30 + 128
    with tifffile.TiffWriter(path) as tif:
        for _ in range(sections):
            section = np.clip(texture + rng.normal(0, 12, SECTION), 0, 255).astype(np.uint8)
            tif.write(section, contiguous=True)


def main():
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        results = {}
        for label, sections in (("1x", SECTIONS_1X), ("8x", 8 * SECTIONS_1X)):
            src = tmp / f"{label}.tif"
            write_stack(src, sections, seed=sections)
            seconds, rss = run_measured(CHILD, src, tmp / f"{label}.ome.zarr")
            megabytes = sections * SECTION[0] * SECTION[1] / 1e6
            results[label] = {"seconds": seconds, "rss_mib": rss, "megabytes": megabytes}
    big, small = results["8x"], results["1x"]
    figures = {
        "throughput_MBps": big["megabytes"] / big["seconds"],
        "peak_rss_ratio_8x": big["rss_mib"] / small["rss_mib"],
        "peak_rss_mib_1x": small["rss_mib"],
        "peak_rss_mib_8x": big["rss_mib"],
        "megabytes_8x": big["megabytes"],
        "seconds_8x": big["seconds"],
    }
    report(
        "ingest",
        [
            ("throughput (8x stack, incl. start-up)", figures["throughput_MBps"], "MB/s"),
            ("peak RSS, 1x stack", figures["peak_rss_mib_1x"], "MiB"),
            ("peak RSS, 8x stack", figures["peak_rss_mib_8x"], "MiB"),
            ("peak RSS ratio 8x / 1x", figures["peak_rss_ratio_8x"], ""),
        ],
        figures,
    )


if __name__ == "__main__":
    main()
