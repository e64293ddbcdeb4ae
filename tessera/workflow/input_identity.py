"""What a stat of a user's input file or folder says about it: a rerun trigger for the rules.

Snakemake reruns a job when an input is newer than its outputs, so a stack replaced by a file
made earlier (``rsync -a`` or ``cp -p`` keep the old modification time) would go unnoticed, and
a slice replaced inside a folder does not change the folder's own time. The rules that read a
user's stack or region mask first take :func:`input_identity` of it as a ``params:`` value:
Snakemake reruns a job whose params changed, and everything downstream follows.

Only ``stat`` is called, never a byte of image data read, because the identity is computed for
every dataset each time the workflow is planned. It changes with the size or the modification
time (in ns) of the file, or of any file below a folder (a zarr or N5 store; of a slice folder,
any file its reader looks at, so a .DS_Store or a note beside the sections changes nothing); so
a file copied back with the same content but a new time changes it too, and its dataset reruns
(a rerun too many, never a changed stack missed). The inode is left out: data moved to another
disk with their times kept (``rsync -a``, ``mv``) are the same data, and a terabyte study should
not start again for it. A replacement is missed only if it has the very size and nanosecond
time of the file it replaces.
"""

import hashlib
import os
from pathlib import Path

__all__ = ["input_identity"]


def _stat_fields(stat):
    return f"{stat.st_size}:{stat.st_mtime_ns}"


def input_identity(path, *, files=None):
    """A short text that changes when the file or folder at `path` is replaced or edited.

    Parameters
    ----------
    path : str or Path
        An input file, or a folder (every file below it counts, links followed).
    files : sequence of path, optional
        For a folder: only these files below it count (those its reader looks at), so adding
        a file the reader ignores changes nothing.

    Returns
    -------
    str
        For a file ``file <size>:<mtime_ns>``; for a folder ``folder <files> files <digest>``,
        the digest the first 16 hexadecimal digits of SHA-256 over the sorted
        ``(relative path, size, mtime_ns)`` of its files; ``missing`` when nothing is
        there (the sheet's paths are checked before any rule is planned).

    Examples
    --------
    >>> import os, tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "a.tif"; _ = p.write_bytes(b"abc")
    >>> os.utime(p, ns=(10**18, 10**18))
    >>> input_identity(p)
    'file 3:1000000000000000000'
    >>> before = input_identity(p.parent)
    >>> before.startswith("folder 1 files ")
    True
    >>> os.utime(p, ns=(10**18, 10**18 - 1))  # an older time: still another identity
    >>> input_identity(p.parent) == before
    False
    >>> before = input_identity(p.parent, files=[p])
    >>> _ = (p.parent / ".DS_Store").write_bytes(b"x")  # a file its reader ignores
    >>> input_identity(p.parent, files=[p]) == before
    True
    """
    path = Path(path)
    try:
        stat = path.stat()
    except FileNotFoundError:
        return "missing"
    if not path.is_dir():
        return f"file {_stat_fields(stat)}"
    if files is None:
        files = [Path(d) / n for d, _, names in os.walk(path, followlinks=True) for n in names]
    entries = []
    for file in map(Path, files):
        try:
            fields = _stat_fields(file.stat())
        except FileNotFoundError:  # a broken link, or removed while walking
            fields = "missing"
        entries.append(f"{file.relative_to(path).as_posix()}\0{fields}")
    digest = hashlib.sha256("\n".join(sorted(entries)).encode()).hexdigest()[:16]
    return f"folder {len(entries)} files {digest}"
