"""The stat identity of input stacks that the rules take as a rerun trigger."""

import os
import shutil

import numpy as np
import tifffile

from tessera.workflow.input_identity import input_identity

OLD = 1_600_000_000 * 10**9  # September 2020, in ns: older than anything the test writes


def _stack(path, seed):
    rng = np.random.default_rng(seed)
    tifffile.imwrite(
        path, rng.integers(0, 256, (4, 16, 16), dtype=np.uint8), photometric="minisblack"
    )


def test_a_file_replaced_by_one_made_earlier_changes_identity(tmp_path):
    # shutil.copy2 copies the modification time with the bytes, as `cp -p` and `rsync -a` do
    # (Python docs, shutil.copy2); the stack keeps its size (same shape and dtype) and inode.
    stack, corrected = tmp_path / "ds_a.tif", tmp_path / "corrected.tif"
    _stack(corrected, 1)
    os.utime(corrected, ns=(OLD, OLD))
    _stack(stack, 0)
    before = input_identity(stack)
    assert input_identity(stack) == before  # nothing changed, nothing to rerun
    inode = stack.stat().st_ino
    shutil.copy2(corrected, stack)
    assert stack.stat().st_ino == inode and stack.stat().st_mtime_ns == OLD
    assert input_identity(stack) != before


def test_data_moved_with_their_times_keep_their_identity(tmp_path):
    # `mv` to another disk, or `rsync -a`, writes a new file (a new inode) with the same bytes,
    # size and modification time (shutil.copy2, Python docs): the same data, nothing to rerun
    stack = tmp_path / "ds_a.tif"
    _stack(stack, 0)
    os.utime(stack, ns=(OLD, OLD))
    before, inode = input_identity(stack), stack.stat().st_ino
    moved = tmp_path / "moved.tif"
    shutil.copy2(stack, moved)
    stack.unlink()
    moved.rename(stack)
    assert stack.stat().st_ino != inode and input_identity(stack) == before


def test_a_slice_replaced_in_a_folder_changes_the_folder_identity(tmp_path):
    folder = tmp_path / "slices"
    folder.mkdir()
    for z in range(3):
        _stack(folder / f"s{z:03d}.tif", z)
    earlier = tmp_path / "earlier.tif"
    _stack(earlier, 9)
    os.utime(earlier, ns=(OLD, OLD))
    before, folder_time = input_identity(folder), folder.stat().st_mtime_ns
    assert before.startswith("folder 3 files ")
    shutil.copy2(earlier, folder / "s001.tif")  # written in place: the folder's time stays
    assert folder.stat().st_mtime_ns == folder_time
    assert input_identity(folder) != before
    # a file added below a sub-folder (a zarr chunk) counts too
    (folder / "sub").mkdir()
    after = input_identity(folder)
    (folder / "sub" / "c0").write_bytes(b"x")
    assert input_identity(folder) != after


def test_identity_reads_no_image_data(tmp_path, monkeypatch):
    # Planning computes it for every dataset each run: stat only, never open.
    stack = tmp_path / "ds_a.tif"
    _stack(stack, 0)

    def refuse(*args, **kwargs):
        raise AssertionError("opened a file")

    monkeypatch.setattr("builtins.open", refuse)
    monkeypatch.setattr(os, "open", refuse)
    assert input_identity(stack).startswith("file ")
    assert input_identity(tmp_path).startswith("folder 1 files ")
    assert input_identity(tmp_path / "gone.tif") == "missing"
