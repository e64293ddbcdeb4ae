"""What each imported mask was painted on, ``results/<dataset>/tiles_painted/<target>.painted_on.json``:
its one writer (rule import_tiles) and its one reader (rule check_masks, of the run before).

A painted mask matches the image it was painted on, not the tile id it is filed under. When a
dataset's stack is replaced or re-aligned after painting, the tiles are exported again under the
same ids, and the old masks would silently label the new pixels. The record holds, per tile id,
the SHA-256 of the mask file imported and of the exported tile's pixels it was paired with;
rule check_masks holds the next run's masks and tiles against it before anything is imported
again (Snakemake has not cleared it yet: it is an output of import_tiles, which runs after).
"""

from pathlib import Path

from tessera.workflow.files.json_records import read_record, write_record

RECORD_FORMAT = 1


def write_painted_on(path, tiles):
    """Write tile id → ``{"mask_sha256": ..., "tile_sha256": ...}`` as JSON (atomic)."""
    write_record(path, RECORD_FORMAT, {"tiles": tiles})


def read_painted_on(path):
    """The tiles of a record written by :func:`write_painted_on`; an empty dict when there is
    none yet (the first import).

    Examples
    --------
    >>> import tempfile
    >>> p = Path(tempfile.mkdtemp()) / "m.painted_on.json"
    >>> read_painted_on(p)
    {}
    >>> write_painted_on(p, {"t1": {"mask_sha256": "ab", "tile_sha256": "cd"}})
    >>> read_painted_on(p)["t1"]["tile_sha256"]
    'cd'
    """
    if not Path(path).is_file():
        return {}
    return read_record(path, RECORD_FORMAT, what="painted-on record", rule="import_tiles")["tiles"]
