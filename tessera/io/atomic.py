"""Write outputs under a temporary name and rename them into place.

A reader (or a resumed workflow) must never see a half-written store or table: every writer in
the package goes through these helpers, so an interrupted job leaves either the previous output
or nothing, plus a clearly named temporary that the next run removes. A write that fails because
the disk is full (or the quota is used up) removes its temporary, keeps the previous output and
raises one :class:`~tessera.errors.TesseraResourceError` naming the file.
"""

import contextlib
import errno
import os
import shutil
import time
from pathlib import Path

from tessera.errors import TesseraResourceError

_TMP_TAG = ".partial-"
_NO_SPACE = {
    errno.ENOSPC: "the disk is full (no space left on device)",
    errno.EDQUOT: "the disk quota is exceeded",
}


def _temporary_sibling(path):
    path = Path(path)
    return path.with_name(f"{path.name}{_TMP_TAG}{os.getpid()}")


def _remove(path):
    if path.is_dir() and not path.is_symlink():
        shutil.rmtree(path)
    elif path.exists() or path.is_symlink():
        path.unlink()


def _discard(tmp, *, quiet=0.25, patience=30.0):
    """Remove the temporary of a failed write, again if late writes bring it back.

    A library that stores from background threads (zarr writes chunks concurrently) can still be
    writing into a temporary folder when the first failure reaches us, and recreates folders as
    it goes; so a folder is removed until it has stayed gone for `quiet` seconds.
    """
    if not (tmp.is_dir() and not tmp.is_symlink()):
        _remove(tmp)
        return
    deadline = time.monotonic() + patience
    while tmp.exists():
        shutil.rmtree(tmp, ignore_errors=True)
        time.sleep(quiet)
        if time.monotonic() > deadline:
            _remove(tmp)  # still busy after `patience`: fail with the real error


def _no_space(error):
    """The ENOSPC/EDQUOT OSError behind `error` (itself or what it was raised from), if any."""
    for _ in range(8):  # libraries may wrap the OSError; its chain is short
        if isinstance(error, OSError) and error.errno in _NO_SPACE:
            return error
        if error is None:
            return None
        error = error.__cause__ or error.__context__
    return None


def _disk_full(error, path):
    reason = _NO_SPACE[error.errno]
    return TesseraResourceError(
        f"{reason} while writing this output; the previous version (if any) is unchanged and the temporary "
        "was removed. Free space on that filesystem and rerun (a new output is written beside the old one "
        "before it replaces it, so both must fit)",
        source=path,
    )


def _install(tmp, path):
    """Rename `tmp` to `path`; on failure the previous `path` is back in place."""
    if path.is_dir() and not path.is_symlink():
        # os.replace cannot replace a non-empty directory: move the old one aside first, so
        # that the previous output survives until the new one is in place.
        old = path.with_name(f"{path.name}{_TMP_TAG}old-{os.getpid()}")
        os.replace(path, old)
        try:
            os.replace(tmp, path)
        except BaseException:
            os.replace(old, path)
            raise
        shutil.rmtree(old)
    else:
        os.replace(tmp, path)


@contextlib.contextmanager
def atomic_path(path):
    """Yield a temporary sibling of `path`; rename it to `path` when the block succeeds.

    Works for files and directories (zarr stores). On error the temporary is removed and any
    existing `path` is left untouched; a full disk or quota raises
    :class:`~tessera.errors.TesseraResourceError` naming `path`. Leftovers of killed runs (same
    name, other pid) are removed first.

    Parameters
    ----------
    path : str or Path
        The output (file or folder); its parent folder is created if needed.

    Yields
    ------
    Path
        The temporary sibling to write; it does not exist yet.

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
        _install(tmp, path)
    except BaseException as error:
        _discard(tmp)
        full = _no_space(error)
        if full is not None:
            raise _disk_full(full, path) from error
        raise


def write_text(path, text):
    """Write `text` to `path` atomically (UTF-8).

    Parameters
    ----------
    path : str or Path
        The file to write; its folder is created if needed.
    text : str

    Examples
    --------
    >>> import tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "notes" / "a.txt"
    >>> write_text(p, "tessera\\n")
    >>> p.read_text(encoding="utf-8")
    'tessera\\n'
    """
    with atomic_path(path) as tmp:
        tmp.write_text(text, encoding="utf-8")


def write_table(path, table):
    """Write a pandas DataFrame as TSV atomically, without the index.

    Parameters
    ----------
    path : str or Path
        The file to write; its folder is created if needed.
    table : pandas.DataFrame

    Examples
    --------
    >>> import tempfile, pathlib, pandas as pd
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "t.tsv"
    >>> write_table(p, pd.DataFrame({"z": [0, 1], "excluded": [False, True]}))
    >>> p.read_text().splitlines()
    ['z\\texcluded', '0\\tFalse', '1\\tTrue']
    """
    with atomic_path(path) as tmp:
        table.to_csv(tmp, sep="\t", index=False)
