"""Ingest of stacks in container files: throughput and peak memory per container and chunking.

Writes the same synthetic 8-bit stack (1 MiB sections, EM-like texture) as a multi-page TIFF (the
reference), an HDF5 dataset, zarr v2 and v3 arrays and an N5 dataset, and ingests each in a fresh
process. Sections are read one at a time, so a chunk that spans several sections is decoded once
per section it holds: the "deep chunks" rows show that cost.

Run from the repository root: .venv/bin/python benchmarks/container_ingest.py
"""

import gzip
import json
import struct
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import h5py
import numpy as np
import tifffile
import zarr
from scipy.ndimage import gaussian_filter

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import report  # noqa: E402

SECTION = (1024, 1024)
SECTIONS = 32
CHILD = """
import sys
from tessera.workflow.jobs.ingest import ingest_job
inner = sys.argv[4] or None
ingest_job(sys.argv[1], sys.argv[2], fmt=sys.argv[3], internal_path=inner, spacing=(40, 8, 8),
           chunks=(1, 512, 512))
# the process's own peak: ru_maxrss after fork + exec also counts the parent's high-water mark
print(next(l.split()[1] for l in open("/proc/self/status") if l.startswith("VmHWM:")))
"""


def make_volume(seed=5):
    rng = np.random.default_rng(seed)
    texture = gaussian_filter(rng.normal(0, 1, SECTION).astype(np.float32), 3)
    texture = texture / texture.std() * 30 + 128
    volume = np.empty((SECTIONS, *SECTION), np.uint8)
    for z in range(SECTIONS):
        noise = rng.normal(0, 12, SECTION).astype(np.float32)
        volume[z] = np.clip(texture + noise, 0, 255).astype(np.uint8)
    return volume


def run_child(*args):
    """Wall seconds and the child's own peak resident memory (MiB) of one ingest."""
    start = time.perf_counter()
    done = subprocess.run(
        [sys.executable, "-c", CHILD, *map(str, args)], check=True, capture_output=True, text=True
    )
    return time.perf_counter() - start, int(done.stdout.split()[-1]) / 1024.0  # kB


def write_n5(folder, volume, block):
    folder.mkdir(parents=True)
    meta = {
        "dimensions": list(volume.shape[::-1]),
        "blockSize": list(block[::-1]),
        "dataType": "uint8",
        "compression": {"type": "gzip"},
    }
    (folder / "attributes.json").write_text(json.dumps(meta))
    for z in range(0, volume.shape[0], block[0]):
        for y in range(0, volume.shape[1], block[1]):
            for x in range(0, volume.shape[2], block[2]):
                part = volume[z : z + block[0], y : y + block[1], x : x + block[2]]
                head = struct.pack(">HH", 0, 3) + struct.pack(">3I", *part.shape[::-1])
                where = folder / str(x // block[2]) / str(y // block[1])
                where.mkdir(parents=True, exist_ok=True)
                (where / str(z // block[0])).write_bytes(head + gzip.compress(part.tobytes(), 1))


def write_all(tmp, volume):
    """(label, path, format, internal_path) of every case."""
    tifffile.imwrite(tmp / "s.tif", volume)
    cases = [("TIFF (reference)", tmp / "s.tif", "tiff_stack", "")]
    for label, chunks in (
        ("HDF5 gzip, chunks 1x256x256", (1, 256, 256)),
        ("HDF5 gzip, deep chunks 8x256x256", (8, 256, 256)),
    ):
        path = tmp / f"{chunks[0]}.h5"
        with h5py.File(path, "w") as f:
            f.create_dataset(
                "raw", data=volume, chunks=chunks, compression="gzip", compression_opts=1
            )
        cases.append((label, path, "hdf5", "raw"))
    for label, version, chunks in (
        ("zarr v2, chunks 1x256x256", 2, (1, 256, 256)),
        ("zarr v3, chunks 1x256x256", 3, (1, 256, 256)),
        ("zarr v3, deep chunks 8x256x256", 3, (8, 256, 256)),
    ):
        path = tmp / f"v{version}_{chunks[0]}.zarr"
        arr = zarr.create_array(
            store=str(path), shape=volume.shape, chunks=chunks, dtype="uint8", zarr_format=version
        )
        arr[:] = volume
        cases.append((label, path, "zarr", ""))
    write_n5(tmp / "s.n5" / "raw", volume, (1, 256, 256))
    cases.append(("N5 gzip, blocks 1x256x256", tmp / "s.n5", "n5", "raw"))
    return cases


def main():
    volume = make_volume()
    megabytes = volume.size / 1e6
    rows, figures = [], {"megabytes": megabytes, "sections": SECTIONS, "cases": {}}
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        for label, path, fmt, inner in write_all(tmp, volume):
            seconds, rss = run_child(path, tmp / f"{path.stem}.ome.zarr", fmt, inner)
            figures["cases"][label] = {
                "seconds": seconds,
                "rss_mib": rss,
                "throughput_MBps": megabytes / seconds,
            }
            rows.append((f"{label}: throughput", megabytes / seconds, "MB/s"))
            rows.append((f"{label}: peak RSS", rss, "MiB"))
    report("container_ingest", rows, figures)


if __name__ == "__main__":
    main()
