"""Chunk checksums of the pipeline's OME-Zarr stores: recorded at write time, verified on read."""

import hashlib
import json
import os
import re
import shutil
import warnings

import numpy as np
import pytest
import tifffile
import zarr
from zarr.abc.store import RangeByteRequest, SuffixByteRequest
from zarr.core.buffer import default_buffer_prototype
from zarr.core.sync import sync

from tessera.errors import TesseraInputError
from tessera.io.omezarr import AXES, multiscale_attrs, open_image
from tessera.io.rebuild_hints import generic_rebuild_hint, set_rebuild_hints
from tessera.io.store_checksums import MANIFEST, checked_store, record_checksums
from tessera.workflow.jobs.ingest import ingest_job
from tessera.workflow.jobs.pyramid import pyramid_job
from tessera.workflow.paths import STORES, store_rule  # importing it registers the rebuild hints

SPACING = (40.0, 8.0, 8.0)


@pytest.fixture
def volume():
    rng = np.random.default_rng(3)
    return rng.integers(0, 256, size=(4, 40, 48), dtype=np.uint8)


@pytest.fixture
def ingested(tmp_path, volume):
    """An ingest store at the path the workflow gives it, chunks of 1 x 16 x 16 (4 x 3 x 3 files)."""
    tifffile.imwrite(tmp_path / "stack.tif", volume, photometric="minisblack")
    store = tmp_path / "results" / "d1" / "ingest" / "raw.ome.zarr"
    ingest_job(tmp_path / "stack.tif", store, fmt="tiff_stack", spacing=SPACING, chunks=(1, 16, 16))
    return store


def chunk(store, level, z, y, x):
    # zarr v3 default chunk key encoding: c/<z>/<y>/<x> below the array (zarr v3 specification)
    return store / str(level) / "c" / str(z) / str(y) / str(x)


def flip_byte(path, offset=None):
    data = bytearray(path.read_bytes())
    data[len(data) // 2 if offset is None else offset] ^= 0x01
    path.write_bytes(bytes(data))


def test_every_file_is_recorded_with_its_sha256(ingested):
    manifest = json.loads((ingested / "0" / MANIFEST).read_text())
    files = sorted(p for p in (ingested / "0").rglob("*") if p.is_file() and p.name != MANIFEST)
    assert (
        len(files) == 1 + 4 * 3 * 3
    )  # zarr.json and every chunk (random data: none is all fill value)
    assert sorted(manifest["files"]) == sorted(
        p.relative_to(ingested / "0").as_posix() for p in files
    )
    for path in files:
        entry = manifest["files"][path.relative_to(ingested / "0").as_posix()]
        # reference: hashlib's SHA-256 of the whole file and the size os.stat reports
        assert entry == {
            "bytes": os.stat(path).st_size,
            "sha256": hashlib.sha256(path.read_bytes()).hexdigest(),
        }
    assert manifest["groups"] == {
        "zarr.json": {
            "bytes": os.stat(ingested / "zarr.json").st_size,
            "sha256": hashlib.sha256((ingested / "zarr.json").read_bytes()).hexdigest(),
        }
    }


def test_intact_store_reads_back_unchanged(ingested, volume):
    _, info = open_image(ingested)
    np.testing.assert_array_equal(info["levels"][0][:], volume)


def test_manifests_are_invisible_to_zarr(ingested):
    # zarr-python warns about files it cannot place in the hierarchy when it lists a group; the
    # manifest lives inside the array folder, which zarr never lists (it computes chunk keys).
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        members = dict(zarr.open_group(str(ingested), mode="r").members(max_depth=None))
    assert sorted(members) == ["0"]
    assert [
        str(w.message)
        for w in caught
        if issubclass(w.category, zarr.errors.ZarrUserWarning) and MANIFEST in str(w.message)
    ] == []


@pytest.mark.parametrize(
    ("damage", "message"),
    [
        (flip_byte, r"file does not match its recorded SHA-256 \(altered or damaged\)"),
        (
            lambda p: p.write_bytes(p.read_bytes()[:-3]),
            r"file has \d+ bytes, \d+ were recorded \(truncated or damaged\)",
        ),
        (os.remove, "file recorded when the store was written is missing"),
    ],
    ids=["bit-flip", "truncated", "deleted"],
)
def test_damaged_chunk_is_refused_naming_file_and_rule(ingested, damage, message):
    damaged = chunk(ingested, 0, 2, 1, 1)
    damage(damaged)
    _, info = open_image(ingested)
    with pytest.raises(TesseraInputError, match=message) as error:
        info["levels"][0][:]
    text = str(error.value)
    assert text.startswith(f"{damaged}: ")
    assert text.endswith(
        f"rerun rule ingest to rebuild {ingested} (delete it, or snakemake --forcerun ingest)"
    )


def test_a_region_read_verifies_only_the_chunks_it_touches(ingested, volume):
    # damage every chunk except the one under the region: the region still reads, the rest fail
    for path in (ingested / "0" / "c").rglob("*"):
        if path.is_file() and path != chunk(ingested, 0, 1, 2, 0):
            flip_byte(path)
    _, info = open_image(ingested)
    np.testing.assert_array_equal(info["levels"][0][1, 33:40, 2:9], volume[1, 33:40, 2:9])
    with pytest.raises(TesseraInputError, match="recorded SHA-256"):
        info["levels"][0][1, 30:40, 2:9]  # reaches into chunk (1, 1, 0)


def test_a_chunk_added_after_writing_is_refused(tmp_path):
    store = tmp_path / "results" / "d1" / "pyramid" / "raw.ome.zarr"
    group = zarr.open_group(str(store), mode="w", zarr_format=3)
    group.attrs["ome"] = multiscale_attrs(name="raw", spacing=SPACING, factors=[(1, 1, 1)])
    data = np.zeros((2, 8, 8), np.uint8)
    data[0] = 9
    group.create_array("0", data=data, chunks=(1, 8, 8), dimension_names=AXES)
    record_checksums(store)
    assert not chunk(store, 0, 1, 0, 0).exists()  # zarr does not write a chunk of fill values only
    chunk(store, 0, 1, 0, 0).parent.mkdir(parents=True)
    shutil.copy(chunk(store, 0, 0, 0, 0), chunk(store, 0, 1, 0, 0))
    _, info = open_image(store)
    np.testing.assert_array_equal(info["levels"][0][0], data[0])
    with pytest.raises(
        TesseraInputError,
        match=r"file was not recorded when the store was written \(added later\?\); rerun rule pyramid",
    ):
        info["levels"][0][1]


def test_altered_metadata_is_refused_when_the_image_opens(ingested):
    meta = ingested / "zarr.json"
    meta.write_text(meta.read_text().replace("40.0", "50.0"))  # another z spacing, still valid JSON
    with pytest.raises(
        TesseraInputError, match=r"zarr\.json: file does not match its recorded SHA-256"
    ):
        open_image(ingested)


def test_a_labels_image_opened_at_its_own_group_is_verified_against_its_own_records(
    tmp_path, volume
):
    # An image with an NGFF labels image below it (labels/cells, as the objects step writes),
    # recorded once at the root. Opened at labels/cells, its zarr.json must be checked against
    # the record of labels/cells/zarr.json, not the root's (which differs in size and content).
    store = tmp_path / "image.ome.zarr"
    root = zarr.open_group(str(store), mode="w", zarr_format=3)
    root.attrs["ome"] = multiscale_attrs(name="raw", spacing=SPACING, factors=[(1, 1, 1)])
    root.create_array("0", data=volume, chunks=(1, 16, 16), dimension_names=AXES)
    cells = root.create_group("labels").create_group("cells")
    cells.attrs["ome"] = multiscale_attrs(name="cells", spacing=SPACING, factors=[(1, 1, 1)])
    labels = (volume > 128).astype(np.uint32)
    cells.create_array("0", data=labels, chunks=(1, 16, 16), dimension_names=AXES)
    record_checksums(store)
    _, info = open_image(store / "labels" / "cells")
    np.testing.assert_array_equal(info["levels"][0][:], labels)
    np.testing.assert_array_equal(open_image(store)[1]["levels"][0][:], volume)
    meta = store / "labels" / "cells" / "zarr.json"
    meta.write_text(meta.read_text().replace('"cells"', '"cellz"'))  # same size, other bytes
    with pytest.raises(
        TesseraInputError,
        match=r"labels/cells/zarr\.json: file does not match its recorded SHA-256",
    ):
        open_image(store / "labels" / "cells")


def test_damaged_manifest_is_refused(ingested):
    (ingested / "0" / MANIFEST).write_text("{not json")
    with pytest.raises(
        TesseraInputError, match=r"tessera-checksums\.json: checksum manifest is damaged"
    ):
        open_image(ingested)[1]["levels"][0][0]


def test_store_without_manifest_is_refused_unless_given_as_input(tmp_path, volume):
    store = tmp_path / "results" / "d1" / "predicted" / "mito" / "probability.ome.zarr"
    group = zarr.open_group(str(store), mode="w", zarr_format=3)
    group.attrs["ome"] = multiscale_attrs(name="p", spacing=SPACING, factors=[(1, 1, 1)])
    group.create_array("0", data=volume, chunks=(1, 16, 16), dimension_names=AXES)
    with pytest.raises(
        TesseraInputError,
        match=r"zarr\.json: no checksum manifest \(tessera-checksums\.json\) covers this file: the "
        r"store was written by an older tessera version or by hand; rerun rule stitch to rebuild",
    ):
        open_image(store)
    # an image given as input (the sheet's zarr format) is read; records are checked where present
    np.testing.assert_array_equal(
        open_image(store, checksums="if-present")[1]["levels"][0][:], volume
    )


def test_pyramid_keeps_the_ingest_records_of_its_hard_linked_level0(ingested, tmp_path):
    pyramid = tmp_path / "results" / "d1" / "pyramid" / "raw.ome.zarr"
    pyramid_job(ingested, pyramid, levels=2)
    level0 = json.loads((pyramid / "0" / MANIFEST).read_text())
    assert level0["files"] == json.loads((ingested / "0" / MANIFEST).read_text())["files"]
    assert level0["linked_from"] == {"store": str(ingested), "rule": "ingest"}
    # a bit flip on disk damages both stores (one file): the pyramid's reader says where it came from
    flip_byte(chunk(pyramid, 0, 0, 0, 0))
    _, info = open_image(pyramid)
    with pytest.raises(
        TesseraInputError,
        match=r"rerun rule pyramid .*; its files are hard-linked from .*ingest/raw\.ome\.zarr: "
        r"if that store is damaged too, rerun rule ingest first",
    ):
        info["levels"][0][0]
    assert info["levels"][2][:].shape == (4, 10, 12)  # other levels are unaffected


def test_pyramid_refuses_a_damaged_ingest_store_and_keeps_its_previous_output(ingested, tmp_path):
    pyramid = tmp_path / "results" / "d1" / "pyramid" / "raw.ome.zarr"
    pyramid_job(ingested, pyramid, levels=1)
    before = sorted(p.relative_to(pyramid) for p in pyramid.rglob("*"))
    os.replace(
        chunk(ingested, 0, 3, 2, 2), tmp_path / "moved"
    )  # a new inode: the old pyramid is intact
    with pytest.raises(
        TesseraInputError,
        match=r"ingest/raw\.ome\.zarr/0/c/3/2/2: file recorded when the store was written is missing",
    ):
        pyramid_job(ingested, pyramid, levels=1)
    assert sorted(p.relative_to(pyramid) for p in pyramid.rglob("*")) == before
    assert [p.name for p in pyramid.parent.iterdir()] == [
        "raw.ome.zarr"
    ]  # no temporary left behind


def test_record_checksums_refuses_a_linked_array_without_records(tmp_path, volume):
    source = tmp_path / "source.zarr"
    zarr.open_group(str(source), mode="w", zarr_format=3).create_array(
        "0", data=volume, chunks=(1, 16, 16)
    )
    copy = tmp_path / "copy.zarr"
    shutil.copytree(source, copy)
    with pytest.raises(
        TesseraInputError, match=r"source\.zarr/0/tessera-checksums\.json: no checksum manifest"
    ):
        record_checksums(copy, linked={"0": source})


def test_checked_store_serves_byte_ranges_of_verified_files(ingested):
    # zarr asks for byte ranges when it reads shards; the whole file is verified, the range returned
    store = checked_store(ingested)
    whole = (ingested / "0" / "zarr.json").read_bytes()
    part = sync(store.get("0/zarr.json", default_buffer_prototype(), RangeByteRequest(2, 9)))
    tail = sync(store.get("0/zarr.json", default_buffer_prototype(), SuffixByteRequest(4)))
    assert (part.to_bytes(), tail.to_bytes()) == (whole[2:9], whole[-4:])


def rule_store_outputs(repo):
    """Output pattern -> rule of every OME-Zarr store a rule in rules/*.smk declares."""
    found = {}
    for smk in sorted((repo / "rules").glob("*.smk")):
        for name, body in re.findall(
            r"^rule (\w+):\n((?:[ \t]+.*\n|\n)*)", smk.read_text(), flags=re.M
        ):
            output = body.split("output:", 1)[1] if "output:" in body else ""
            for path in re.findall(r'directory\("([^"]+\.ome\.zarr)"\)', output):
                found[path] = name
    return found


def test_store_rule_names_the_rule_whose_output_the_store_is(repo):
    # reference: the rules themselves; every OME-Zarr store a rule outputs maps back to that rule
    found = rule_store_outputs(repo)
    assert sorted(found.values()) == ["ingest", "objects", "pyramid", "stitch"]
    for pattern, rule in found.items():
        assert store_rule(pattern.format(dataset="d1", target="mito.s3")) == rule
    assert store_rule("somewhere/raw.ome.zarr") is None


def test_the_path_grammar_holds_the_store_patterns_the_rules_declare(repo):
    # reference: the rules' own output declarations, which Snakemake writes to
    assert {pattern: rule for rule, pattern in STORES.items()} == rule_store_outputs(repo)


def test_without_the_workflow_a_damaged_store_names_no_rule(ingested):
    # the io layer alone does not know the results grammar: its message names the store only
    previous = set_rebuild_hints(writer=lambda store: None, hint=generic_rebuild_hint)
    try:
        flip_byte(chunk(ingested, 0, 0, 0, 0))
        with pytest.raises(TesseraInputError) as error:
            open_image(ingested)[1]["levels"][0][0]
    finally:
        set_rebuild_hints(**previous)
    assert str(error.value).endswith(f"rebuild {ingested} with the step that wrote it")
