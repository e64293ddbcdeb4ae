"""SHA-256 of files and stores, streamed, for shard manifests, model records and the audit trail."""

import hashlib
from pathlib import Path

from tessera.errors import TesseraInputError


def file_sha256(path, *, chunk=1 << 22):
    """SHA-256 of a file or of every file below a folder (sorted by relative path), streamed.

    Parameters
    ----------
    path : str or Path
        A file, or a folder: then each file's relative path (and a NUL byte) precedes its bytes.
    chunk : int, optional
        Bytes read at a time.

    Returns
    -------
    str
        The hexadecimal digest.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "a.txt"; _ = p.write_bytes(b"abc")
    >>> file_sha256(p)[:16]
    'ba7816bf8f01cfea'
    """
    path = Path(path)
    files = sorted(p for p in path.rglob("*") if p.is_file()) if path.is_dir() else [path]
    if not files:
        raise TesseraInputError("nothing to checksum", source=path)
    digest = hashlib.sha256()
    for file in files:
        if path.is_dir():
            digest.update(str(file.relative_to(path)).encode() + b"\0")
        with open(file, "rb") as fh:
            for block in iter(lambda: fh.read(chunk), b""):
                digest.update(block)
    return digest.hexdigest()
