"""A disk that fills up part-way through a write: the previous output stays byte for byte, no
temporary is left behind, and the error says the disk is full and names the file.

POSIX write(2): a write that finds no room left on the device fails with ENOSPC ("No space left on
device"), after writing what fitted. The tests below give the package's writers a filesystem with
a fixed number of free bytes by wrapping ``open`` (so every Python-level writer, pandas, numpy,
zarr and pathlib alike, hits the same wall), and, where the system allows unprivileged mount
namespaces, a real tmpfs of a few kilobytes.
"""

import builtins
import errno
import hashlib
import io
import json
import os
import shutil
import subprocess
import sys
import textwrap
import threading
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import tifffile

from tessera.cascade.api import (
    CascadeSpec,
    fit_cascade,
    mirrored_window,
    prepare_tile,
    receptive_radius,
    save_node,
)
from tessera.errors import TesseraResourceError
from tessera.io.atomic import write_table, write_text
from tessera.workflow.jobs.ingest import ingest_job

REPO = Path(__file__).resolve().parents[1]


class _LimitedFile:
    """A writable file on a disk with `budget.free` bytes left: write(2) semantics on overflow."""

    def __init__(self, handle, budget, name):
        self._handle, self._budget, self._name = handle, budget, name

    def write(self, data):
        size = len(data.encode("utf-8")) if isinstance(data, str) else memoryview(data).nbytes
        with self._budget.lock:
            fits = min(size, self._budget.free)
            self._budget.free -= fits
            self._budget.written += fits
        if fits < size:
            # what fitted is written, then the device is full (POSIX write(2), ENOSPC)
            part = data[:fits] if isinstance(data, str) else memoryview(data).cast("B")[:fits]
            self._handle.write(part)
            self._budget.failures += 1
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), self._name)
        return self._handle.write(data)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self._handle.close()
        return False

    def __iter__(self):
        return iter(self._handle)

    def __getattr__(self, name):
        return getattr(self._handle, name)


class _Budget:
    def __init__(self, free):
        self.free, self.written, self.failures = free, 0, 0
        self.lock = threading.Lock()


@pytest.fixture
def full_disk(monkeypatch):
    """Call with (folder, free bytes): from then on, writes below `folder` share that many bytes."""
    real_open = io.open

    def limit(folder, free):
        budget = _Budget(free)
        root = Path(folder).resolve()

        def limited_open(file, mode="r", *args, **kwargs):
            handle = real_open(file, mode, *args, **kwargs)
            if isinstance(file, (str, os.PathLike)) and any(c in mode for c in "wax+"):
                if root in Path(file).resolve().parents:
                    return _LimitedFile(handle, budget, os.fspath(file))
            return handle

        monkeypatch.setattr(builtins, "open", limited_open)
        monkeypatch.setattr(io, "open", limited_open)
        return budget

    return limit


def snapshot(folder):
    """Every entry below `folder` with the sha256 of each file: equal snapshots mean equal trees."""
    out = {}
    for path in sorted(Path(folder).rglob("*")):
        key = path.relative_to(folder).as_posix()
        out[key] = hashlib.sha256(path.read_bytes()).hexdigest() if path.is_file() else "dir"
    return out


def size_of(path):
    path = Path(path)
    return (
        path.stat().st_size
        if path.is_file()
        else sum(p.stat().st_size for p in path.rglob("*") if p.is_file())
    )


def assert_refused_cleanly(write, out, full_disk, *, new_size):
    """Write `out` again with room for half the new version: refused, old version intact."""
    before = snapshot(out.parent)
    budget = full_disk(out.parent, new_size // 2)
    with pytest.raises(TesseraResourceError) as caught:
        write()
    message = str(caught.value)
    assert message.startswith(f"{out}: the disk is full (no space left on device)"), message
    assert "\n" not in message
    assert (
        budget.failures >= 1 and budget.written > 0
    )  # the write got part-way before the disk filled
    assert snapshot(out.parent) == before
    assert not [p for p in out.parent.rglob("*") if ".partial" in p.name]
    return message


def test_table_write_on_full_disk_keeps_the_previous_table(tmp_path, full_disk):
    out = tmp_path / "results" / "objects.tsv"
    write_table(out, pd.DataFrame({"id": [1, 2], "volume_um3": [0.5, 0.25]}))
    new = pd.DataFrame({"id": np.arange(5000), "volume_um3": np.linspace(0, 1, 5000)})
    write_table(tmp_path / "probe.tsv", new)
    message = assert_refused_cleanly(
        lambda: write_table(out, new), out, full_disk, new_size=size_of(tmp_path / "probe.tsv")
    )
    assert message.startswith(f"{out}: the disk is full (no space left on device)")


def test_zarr_store_write_on_full_disk_keeps_the_previous_store(tmp_path, full_disk):
    rng = np.random.default_rng(3)
    for name, shape in (("old.tif", (2, 32, 32)), ("new.tif", (6, 64, 64))):
        tifffile.imwrite(tmp_path / name, rng.integers(0, 256, shape, dtype=np.uint8))
    out = tmp_path / "results" / "raw.ome.zarr"

    def ingest(source, target=out):
        return ingest_job(
            tmp_path / source, target, fmt="tiff_stack", spacing=(40, 8, 8), chunks=(1, 32, 32)
        )

    ingest("old.tif")
    ingest("new.tif", tmp_path / "probe.ome.zarr")
    assert_refused_cleanly(
        lambda: ingest("new.tif"), out, full_disk, new_size=size_of(tmp_path / "probe.ome.zarr")
    )


def _small_model(seed):
    spec = CascadeSpec(stages=1, levels=0, sigmas=(1.0,), folds=2, samples_per_tile=100, seed=seed)
    radius = receptive_radius(spec)
    rng = np.random.default_rng(seed)
    tiles = []
    for i in range(2):
        truth = np.zeros((24, 24), np.uint8)
        truth[6:18, 6:18] = 1
        image = (100 + 80 * truth + rng.normal(0, 10, truth.shape)).astype(np.float32)
        window = mirrored_window(image[np.newaxis], 0, -radius, 24 + radius, -radius, 24 + radius)
        tiles.append(prepare_tile(spec, f"t{i}", window, truth, fold=i))
    return fit_cascade(spec, tiles, target="blobs")[(1, 0)]


def test_model_write_on_full_disk_keeps_the_previous_model(tmp_path, full_disk):
    out = tmp_path / "results" / "stage1_level0.npz"
    save_node(_small_model(1), out)
    new = _small_model(2)
    save_node(new, tmp_path / "probe.npz")
    assert_refused_cleanly(
        lambda: save_node(new, out), out, full_disk, new_size=size_of(tmp_path / "probe.npz")
    )


def test_quota_exceeded_is_reported_like_a_full_disk(tmp_path, monkeypatch):
    # EDQUOT (POSIX write(2): "the user's quota of disk blocks ... has been exhausted")
    out = tmp_path / "methods.md"
    write_text(out, "old\n")

    def over_quota(self, *args, **kwargs):
        raise OSError(errno.EDQUOT, os.strerror(errno.EDQUOT), str(self))

    monkeypatch.setattr(Path, "write_text", over_quota)
    with pytest.raises(TesseraResourceError, match=rf"^{out}: the disk quota is exceeded"):
        write_text(out, "new\n")
    monkeypatch.undo()
    assert out.read_text() == "old\n" and sorted(p.name for p in tmp_path.iterdir()) == [
        "methods.md"
    ]


@pytest.fixture
def mount_namespace(tmp_path):
    """Skip unless this user may mount a tmpfs in a private mount namespace (unshare -r -m);
    with TESSERA_NAMESPACES_REQUIRED=1 (as in CI) fail instead, so the real full-disk tests
    cannot silently drop out."""
    give_up = pytest.fail if os.environ.get("TESSERA_NAMESPACES_REQUIRED") == "1" else pytest.skip
    if not shutil.which("unshare") or not shutil.which("mount"):
        give_up("unshare(1) or mount(8) not installed")
    probe = tmp_path / "probe"
    probe.mkdir()
    result = subprocess.run(
        ["unshare", "-r", "-m", "mount", "-t", "tmpfs", "-o", "size=64k", "tmpfs", str(probe)],
        capture_output=True,
        text=True,
        timeout=30,
    )
    if result.returncode != 0:
        give_up(f"no unprivileged mount namespaces here: {result.stderr.strip()}")


_ON_TMPFS = textwrap.dedent("""
    import json, os, sys
    from pathlib import Path
    import numpy as np, pandas as pd, tifffile
    sys.path.insert(0, sys.argv[2])
    from test_disk_full import _small_model, snapshot
    from tessera.io.atomic import write_table
    from tessera.cascade.api import save_node
    from tessera.errors import TesseraResourceError
    from tessera.workflow.jobs.ingest import ingest_job

    disk, sources = Path(sys.argv[1]), Path(sys.argv[3])
    outs = {"table": disk / "t" / "objects.tsv", "store": disk / "s" / "raw.ome.zarr", "model": disk / "m" / "node.npz"}
    write_table(outs["table"], pd.DataFrame({"id": [1, 2]}))
    ingest_job(sources / "old.tif", outs["store"], fmt="tiff_stack", spacing=(40, 8, 8), chunks=(1, 32, 32))
    save_node(_small_model(1), outs["model"])
    before = {k: snapshot(p.parent) for k, p in outs.items()}
    # fill the disk, leaving 8 KiB
    free = os.statvfs(disk).f_bavail * os.statvfs(disk).f_frsize
    with open(disk / "filler", "wb") as fh:
        fh.write(b"\\0" * (free - 8192))
    writes = {
        "table": lambda: write_table(outs["table"], pd.DataFrame({"id": np.arange(20000)})),
        "store": lambda: ingest_job(sources / "new.tif", outs["store"], fmt="tiff_stack", spacing=(40, 8, 8),
                                      chunks=(1, 32, 32)),
        "model": lambda: save_node(_small_model(2), outs["model"]),
    }
    report = {}
    for key, write in writes.items():
        try:
            write()
            report[key] = {"error": None}
        except TesseraResourceError as error:
            report[key] = {"error": str(error)}
        report[key]["unchanged"] = snapshot(outs[key].parent) == before[key]
        report[key]["leftovers"] = [p.name for p in outs[key].parent.rglob("*") if ".partial" in p.name]
    print(json.dumps(report))
""")


def test_real_full_tmpfs(tmp_path, mount_namespace):
    # A real filesystem that runs out of room: a 1 MiB tmpfs in a private mount namespace
    # (Linux user namespaces, unshare(1)); the kernel itself returns ENOSPC.
    disk, sources = tmp_path / "disk", tmp_path / "sources"
    disk.mkdir()
    sources.mkdir()
    rng = np.random.default_rng(4)
    tifffile.imwrite(sources / "old.tif", rng.integers(0, 256, (2, 32, 32), dtype=np.uint8))
    tifffile.imwrite(sources / "new.tif", rng.integers(0, 256, (6, 64, 64), dtype=np.uint8))
    (tmp_path / "script.py").write_text(_ON_TMPFS)
    command = (
        f"mount -t tmpfs -o size=1m tmpfs {disk} && "
        f"{sys.executable} {tmp_path / 'script.py'} {disk} {Path(__file__).parent} {sources}"
    )
    result = subprocess.run(
        ["unshare", "-r", "-m", "sh", "-c", command],
        capture_output=True,
        text=True,
        timeout=300,
        env={**os.environ, "PYTHONPATH": str(REPO)},
    )
    assert result.returncode == 0, result.stderr
    report = json.loads(result.stdout.splitlines()[-1])
    for key, name in (("table", "objects.tsv"), ("store", "raw.ome.zarr"), ("model", "node.npz")):
        error = report[key]["error"]
        assert (
            error is not None and f"{name}: the disk is full (no space left on device)" in error
        ), report
        assert report[key]["unchanged"] and report[key]["leftovers"] == [], report
