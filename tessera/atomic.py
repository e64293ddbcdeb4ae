"""Write outputs under a temporary name and rename them into place.

A reader (or a resumed workflow) must never see a half-written store or table: every writer in
the package goes through these helpers, so an interrupted job leaves either the previous output
or nothing, plus a clearly named temporary that the next run removes.
"""

import contextlib
import os
import shutil
from pathlib import Path

_TMP_TAG = ".partial-"


def _temporary_sibling(path):
    path = Path(path)
    return path.with_name(f"{path.name}{_TMP_TAG}{os.getpid()}")


def _remove(path):
    if path.is_dir() and not path.is_symlink():
        shutil.rmtree(path)
    elif path.exists() or path.is_symlink():
        path.unlink()


@contextlib.contextmanager
def atomic_path(path):
    """Yield a temporary sibling of `path`; rename it to `path` when the block succeeds.

    Works for files and directories (zarr stores). On error the temporary is removed and any
    existing `path` is left untouched. Leftovers of killed runs (same name, other pid) are removed
    first.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> d = pathlib.Path(tempfile.mkdtemp())
    >>> with atomic_path(d / "table.tsv") as tmp:
    ...     _ = tmp.write_text("a\\n")
    >>> sorted(p.name for p in d.iterdir())
    ['table.tsv']
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    for stale in path.parent.glob(f"{path.name}{_TMP_TAG}*"):
        _remove(stale)
    tmp = _temporary_sibling(path)
    try:
        yield tmp
    except BaseException:
        _remove(tmp)
        raise
    if path.is_dir() and not path.is_symlink():
        # os.replace cannot replace a non-empty directory: move the old one aside first, so
        # that the previous output survives until the new one is in place.
        old = path.with_name(f"{path.name}{_TMP_TAG}old-{os.getpid()}")
        os.replace(path, old)
        os.replace(tmp, path)
        shutil.rmtree(old)
    else:
        os.replace(tmp, path)


def write_text(path, text):
    """Write `text` to `path` atomically (UTF-8)."""
    with atomic_path(path) as tmp:
        tmp.write_text(text, encoding="utf-8")


def write_table(path, table):
    """Write a pandas DataFrame as TSV atomically, without the index."""
    with atomic_path(path) as tmp:
        table.to_csv(tmp, sep="\t", index=False)
