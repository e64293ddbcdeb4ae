"""Hard-linking a folder tree into a new store, so two stores share files without a copy."""

import os
import shutil
from pathlib import Path


def link_tree(src, dst):
    """Hard-link every file of `src` into `dst` (copy where links are impossible).

    Level 0 of the pyramid is the ingested array itself; hard links make it part of the new
    multiscale store without duplicating terabytes and without touching the ingest output.
    No writer modifies a chunk file in place, so removing either store leaves the other intact.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> src, dst = (pathlib.Path(tempfile.mkdtemp()) for _ in range(2))
    >>> (src / "c" / "0").mkdir(parents=True); _ = (src / "c" / "0" / "1").write_bytes(b"x")
    >>> link_tree(src, dst / "copy")
    >>> (dst / "copy" / "c" / "0" / "1").read_bytes(), (src / "c" / "0" / "1").stat().st_nlink
    (b'x', 2)
    """
    for root, _, files in os.walk(src):
        target = Path(dst) / Path(root).relative_to(src)
        target.mkdir(parents=True, exist_ok=True)
        for f in files:
            try:
                os.link(Path(root) / f, target / f)
            except OSError:
                shutil.copy2(Path(root) / f, target / f)
