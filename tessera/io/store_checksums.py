"""SHA-256 of every file of the OME-Zarr stores the pipeline writes, checked whenever they are read.

Each *array* directory of a store holds ``tessera-checksums.json`` beside its ``zarr.json``.
zarr never lists the inside of an array (it computes chunk keys), so the file is invisible to
zarr and to NGFF tools; a file at the root of a group would show up as an unknown member.

::

    {"format": 1, "algorithm": "sha256",
     "files":  {"zarr.json": {"bytes": 512, "sha256": "…"}, "c/0/0/0": {…}, …},   # the array's own
     "groups": {"zarr.json": {…}, "labels/zarr.json": {…}},                       # its ancestor groups
     "linked_from": {"store": "results/d1/ingest/raw.ome.zarr", "rule": "ingest"}}  # optional

``files`` are relative to the array, ``groups`` to the store. A chunk that zarr never wrote (all
fill value) is simply not listed. An array hard-linked from another store (pyramid level 0 from
the ingest store, probability levels in the objects store) keeps the digests recorded when its
files were first written, so linking never re-hashes and never blesses a damaged file;
``linked_from`` names the source store and the step that writes it, as the application names it
(:func:`tessera.io.rebuild_hints.store_writer`).

Reading goes through :func:`checked_store`: a zarr store that hashes each file it hands to zarr
and compares it with the record, so a job verifies exactly the chunks it decodes (a prediction
shard the chunks under its window, a whole-volume job every chunk) with no second read. A
recorded file that is missing, shorter, longer or altered, and a chunk file that was not
recorded, are refused with a message naming the file and how to rebuild the store, in the words
the application registered (:mod:`tessera.io.rebuild_hints`; the workflow names the rule).

A store without records (written by an older tessera or by hand) is refused by the pipeline's
readers: every stage's code version changes with this module, so Snakemake rebuilds such stores
anyway. Images given as *input* (the ``zarr`` format of the datasets sheet) are checked only
where they carry records.
"""

import asyncio
import hashlib
import json
import os
from pathlib import Path

from zarr.abc.store import OffsetByteRequest, RangeByteRequest, SuffixByteRequest
from zarr.storage import LocalStore, WrapperStore

from tessera.errors import TesseraInputError
from tessera.io.digests import file_sha256
from tessera.io.rebuild_hints import rebuild_hint, store_writer

MANIFEST = "tessera-checksums.json"
FORMAT = 1
_META = "zarr.json"


# ----------------------------------------------------------------------------------------------
# writing


def _entry(path):
    return {"bytes": path.stat().st_size, "sha256": file_sha256(path)}


def _node_type(folder):
    try:
        return json.loads((folder / _META).read_text(encoding="utf-8")).get("node_type")
    except (FileNotFoundError, json.JSONDecodeError, UnicodeDecodeError, AttributeError):
        return None


def _arrays_and_groups(store):
    """Store-relative folders of every array and every group ('' is the root), arrays not descended."""
    arrays, groups, todo = [], [], [Path(store)]
    while todo:
        folder = todo.pop()
        rel = folder.relative_to(store).as_posix()
        rel = "" if rel == "." else rel
        kind = _node_type(folder)
        if kind == "array":
            arrays.append(rel)
        elif kind == "group":
            groups.append(rel)
            todo.extend(sorted((p for p in folder.iterdir() if p.is_dir()), reverse=True))
    return sorted(arrays), sorted(groups)


def _array_files(folder):
    return sorted(p for p in folder.rglob("*") if p.is_file() and p.name != MANIFEST)


def _inherited_files(folder, rel, source):
    """The records of an array hard-linked (or copied) from `source`, checked against the files."""
    source_manifest = Path(source) / rel / MANIFEST
    hint = rebuild_hint(source)
    try:
        recorded = _parse_manifest(source_manifest)["files"]
    except FileNotFoundError:
        raise TesseraInputError(
            f"no checksum manifest to inherit; {hint}", source=source_manifest
        ) from None
    except (ValueError, UnicodeDecodeError) as exc:  # json.JSONDecodeError is a ValueError
        raise TesseraInputError(
            f"checksum manifest is damaged ({exc}); {hint}", source=source_manifest
        ) from None
    present = {p.relative_to(folder).as_posix(): p for p in _array_files(folder)}
    for name in present:
        if name not in recorded:
            raise TesseraInputError(
                f"file was not recorded when the store was written; {hint}",
                source=Path(source) / rel / name,
            )
    for name, entry in recorded.items():
        if name not in present or present[name].stat().st_size != entry["bytes"]:
            raise TesseraInputError(
                f"recorded file is missing or has another size; {hint}",
                source=Path(source) / rel / name,
            )
    return dict(recorded)


def _write_json(path, data):
    # replace, never rewrite in place: the old manifest may be a hard link into another store
    tmp = path.with_name(f"{path.name}.partial-{os.getpid()}")
    tmp.write_text(json.dumps(data, indent=0, sort_keys=True) + "\n", encoding="utf-8")
    os.replace(tmp, path)


def record_checksums(store, *, linked=None):
    """Write the checksum manifest of every array of a finished store (before it is renamed into place).

    Parameters
    ----------
    store : str or Path
        A zarr v3 store on the local file system (typically the temporary of ``atomic_path``).
    linked : dict, optional
        Array path → the store its files were hard-linked (or copied) from, with the same array
        path there. Those arrays keep the source's records: each linked file must be recorded
        there with the size it has, and nothing is hashed again.

    Returns
    -------
    int
        Number of files recorded.

    Examples
    --------
    >>> import tempfile, zarr, json
    >>> d = Path(tempfile.mkdtemp()) / "s.zarr"
    >>> g = zarr.open_group(str(d), mode="w", zarr_format=3)
    >>> g.create_array("0", shape=(2, 2), dtype="uint8")[:] = 7
    >>> record_checksums(d)  # zarr.json of the group and the array, 1 chunk
    3
    >>> sorted(json.loads((d / "0" / MANIFEST).read_text())["files"])
    ['c/0/0', 'zarr.json']
    """
    store = Path(store)
    linked = {str(k): v for k, v in (linked or {}).items()}
    arrays, groups = _arrays_and_groups(store)
    if not arrays:
        raise TesseraInputError("no zarr arrays to record checksums of", source=store)
    group_entries = {(f"{g}/{_META}" if g else _META): _entry(store / g / _META) for g in groups}
    count = len(group_entries)
    for rel in arrays:
        folder = store / rel
        if rel in linked:
            files = _inherited_files(folder, rel, linked[rel])
            origin = {"store": str(linked[rel]), "rule": store_writer(linked[rel])}
        else:
            files = {p.relative_to(folder).as_posix(): _entry(p) for p in _array_files(folder)}
            origin = None
        ancestors = {k: v for k, v in group_entries.items() if _is_ancestor_meta(k, rel)}
        manifest = {"format": FORMAT, "algorithm": "sha256", "files": files, "groups": ancestors}
        if origin:
            manifest["linked_from"] = origin
        _write_json(folder / MANIFEST, manifest)
        count += len(files)
    return count


def _is_ancestor_meta(meta_key, array):
    group = meta_key[: -len(_META)].rstrip("/")
    return group == "" or array.startswith(group + "/")


# ----------------------------------------------------------------------------------------------
# reading


def _parse_manifest(path):
    text = Path(path).read_text(encoding="utf-8")  # FileNotFoundError is the caller's to word
    data = json.loads(text)
    if not (
        isinstance(data, dict)
        and data.get("format") == FORMAT
        and data.get("algorithm") == "sha256"
        and isinstance(data.get("files"), dict)
        and isinstance(data.get("groups", {}), dict)
    ):
        raise ValueError(f"not a checksum manifest of format {FORMAT}")
    for entry in [*data["files"].values(), *data.get("groups", {}).values()]:
        if not (
            isinstance(entry, dict)
            and isinstance(entry.get("bytes"), int)
            and isinstance(entry.get("sha256"), str)
        ):
            raise ValueError("an entry lacks its size or digest")
    return data


def _opened_at(folder, manifest):
    """Where a store opened at one of its groups sits in the store the records were written for:
    the prefix of its keys there ('' when opened at the root).

    A manifest's ``groups`` are keyed from the root of the store it was written in, and hold
    every ancestor group of its array, so the deepest of them is the array's parent there; the
    array's `folder` in the store as opened ends with that parent's tail.

    Examples
    --------
    >>> groups = {"zarr.json": {}, "labels/zarr.json": {}, "labels/cells/zarr.json": {}}
    >>> _opened_at("0", {"groups": groups}), _opened_at("labels/cells/0", {"groups": groups})
    ('labels/cells/', '')
    """
    groups = [key[: -len(_META)].rstrip("/") for key in manifest.get("groups", {})]
    deepest = max(groups, key=lambda g: (g.count("/") + bool(g), g), default="")
    parent = folder.rpartition("/")[0]
    if deepest == parent:
        return ""
    if not parent:
        return deepest + "/"
    if deepest.endswith("/" + parent):
        return deepest[: -len(parent)]
    return ""


class _Checker:
    """Finds the record of a store key and compares a file's bytes with it (synchronous)."""

    def __init__(self, store, *, required):
        self.store = Path(store)
        self.required = required
        self._manifests = {}  # array folder → parsed manifest or None
        # group folder → (manifest of the smallest array below it, key prefix of its groups), or None
        self._group_manifest = {}

    def _manifest(self, rel):
        if rel not in self._manifests:
            path = self.store / rel / MANIFEST
            try:
                self._manifests[rel] = _parse_manifest(path) if path.is_file() else None
            except (ValueError, UnicodeDecodeError) as exc:  # json.JSONDecodeError is a ValueError
                raise TesseraInputError(
                    f"checksum manifest is damaged ({exc}); {rebuild_hint(self.store)}", source=path
                ) from None
        return self._manifests[rel]

    def _below(self, group):
        """Manifest of the smallest array below `group` (the cheapest to read), or None."""
        if group not in self._group_manifest:
            found, todo = [], [self.store / group]
            while todo:
                folder = todo.pop()
                for child in (p for p in folder.iterdir() if p.is_dir()) if folder.is_dir() else ():
                    if (child / MANIFEST).is_file():
                        found.append(child)
                    elif (child / _META).is_file():
                        todo.append(child)
            smallest = min(found, key=lambda p: (p / MANIFEST).stat().st_size, default=None)
            if smallest is None:
                self._group_manifest[group] = None
            else:
                folder = smallest.relative_to(self.store).as_posix()
                manifest = self._manifest(folder)
                self._group_manifest[group] = (manifest, _opened_at(folder, manifest))
        return self._group_manifest[group]

    def record(self, key):
        """(entry or None, manifest or None) for a store key."""
        parts = key.split("/")
        for i in range(1, len(parts)):
            folder = "/".join(parts[:i])
            manifest = self._manifest(folder)
            if manifest is not None:
                return manifest["files"].get("/".join(parts[i:])), manifest
        if parts[-1] == _META:
            below = self._below("/".join(parts[:-1]))
            if below is None:
                return None, None
            manifest, prefix = below
            return manifest["groups"].get(prefix + key), manifest
        return None, None

    def check(self, key, data):
        """Refuse `data` (bytes, or None for an absent file) unless it is what was recorded for `key`."""
        entry, manifest = self.record(key)
        path = self.store / key
        if manifest is None:
            if data is not None and self.required:
                raise TesseraInputError(
                    f"no checksum manifest ({MANIFEST}) covers this file: the store was written by an older "
                    f"tessera version or by hand; {rebuild_hint(self.store)}",
                    source=path,
                )
            return
        hint = rebuild_hint(self.store, linked_from=manifest.get("linked_from"))
        if entry is None:
            if data is not None:
                raise TesseraInputError(
                    f"file was not recorded when the store was written (added later?); {hint}",
                    source=path,
                )
            return
        if data is None:
            raise TesseraInputError(
                f"file recorded when the store was written is missing; {hint}", source=path
            )
        if len(data) != entry["bytes"]:
            raise TesseraInputError(
                f"file has {len(data)} bytes, {entry['bytes']} were recorded (truncated or damaged); {hint}",
                source=path,
            )
        if hashlib.sha256(data).hexdigest() != entry["sha256"]:
            raise TesseraInputError(
                f"file does not match its recorded SHA-256 (altered or damaged); {hint}",
                source=path,
            )


def _byte_slice(size, byte_range):
    """The slice of a `size`-byte file that a zarr byte-range request asks for."""
    if isinstance(byte_range, RangeByteRequest):
        return slice(byte_range.start, byte_range.end)
    if isinstance(byte_range, OffsetByteRequest):
        return slice(byte_range.offset, size)
    if isinstance(byte_range, SuffixByteRequest):
        return slice(max(size - byte_range.suffix, 0), size)
    raise TypeError(f"unknown byte range {byte_range!r}")


class _CheckedStore(WrapperStore):
    """A read-only local store that verifies every whole file before zarr sees a byte of it."""

    def __init__(self, store, checker):
        super().__init__(store)
        self._checker = checker

    def _with_store(self, store):
        return type(self)(store, self._checker)

    async def get(self, key, prototype=None, byte_range=None):
        buffer = await self._store.get(
            key, prototype, None
        )  # whole file: only that can be verified
        data = None if buffer is None else buffer.to_bytes()
        await asyncio.to_thread(self._checker.check, key, data)  # hashlib releases the GIL
        if buffer is None or byte_range is None:
            return buffer
        return buffer[_byte_slice(len(data), byte_range)]

    async def get_partial_values(self, prototype, key_ranges):
        return [await self.get(key, prototype, byte_range) for key, byte_range in key_ranges]


def checked_store(path, *, required=True):
    """A read-only zarr store of the local folder `path` that verifies every file it serves.

    Parameters
    ----------
    path : str or Path
        The store folder.
    required : bool, optional
        Refuse files no manifest covers (the pipeline's own stores). False: verify only what
        carries records (images given as input).

    Examples
    --------
    >>> import tempfile, zarr
    >>> d = Path(tempfile.mkdtemp()) / "s.zarr"
    >>> zarr.open_group(str(d), mode="w", zarr_format=3).create_array("0", shape=(2,), dtype="uint8")[:] = 3
    >>> _ = record_checksums(d)
    >>> zarr.open_group(checked_store(d), mode="r", zarr_format=3)["0"][:].tolist()
    [3, 3]
    """
    return _CheckedStore(LocalStore(str(path), read_only=True), _Checker(path, required=required))


def verified_bytes(store, key, *, required=True):
    """The bytes of one file of a store, checked against its record.

    Parameters
    ----------
    store : str or Path
        The store folder.
    key : str
        The file's path in the store, ``/``-separated (a zarr store key).
    required : bool, optional
        Refuse a file no manifest covers (see :func:`checked_store`).

    Returns
    -------
    bytes

    Examples
    --------
    >>> import tempfile, zarr
    >>> d = Path(tempfile.mkdtemp()) / "s.zarr"
    >>> zarr.open_group(str(d), mode="w", zarr_format=3).create_array("0", shape=(2,), dtype="uint8")[:] = 3
    >>> _ = record_checksums(d)
    >>> json.loads(verified_bytes(d, "0/zarr.json"))["node_type"]
    'array'
    """
    path = Path(store) / key
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        data = None
    _Checker(store, required=required).check(key, data)
    if data is None:
        raise TesseraInputError("file not found", source=path)
    return data
