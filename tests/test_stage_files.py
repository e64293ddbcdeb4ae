"""The one reader and writer of each file a stage writes and another reads (tessera.workflow.files)."""

import json
import zipfile

import numpy as np
import pandas as pd
import pytest

from tessera.errors import TesseraInputError
from tessera.workflow.files.scores import read_scores, validation_threshold, write_scores
from tessera.workflow.files.shard_plan import PLAN_FORMAT, read_plan, write_plan
from tessera.workflow.files.tile_probabilities import (
    read_tile_probabilities,
    write_tile_probabilities,
)


def test_shard_plan_is_plain_json_with_its_format_first(tmp_path):
    # Reference: the standard library's json module reads the file back unchanged.
    plan = {"shape": [3, 100, 60], "halo": 16, "blocks": [[0, 3, 0, 100, 0, 60]], "jobs": [[0]]}
    path = tmp_path / "plan.json"
    write_plan(path, plan)
    raw = json.loads(path.read_text(encoding="utf-8"))
    assert list(raw) == ["format", *plan] and raw["format"] == PLAN_FORMAT
    assert read_plan(path) == raw


@pytest.mark.parametrize(
    ("content", "message"),
    [
        (None, "shard plan not found \\(rule shard_plan writes it\\)"),
        ("{not json", "shard plan is damaged"),
        ('{"format": 99}', "not a shard plan of format 1"),
    ],
)
def test_bad_shard_plans_are_refused_naming_the_file(tmp_path, content, message):
    path = tmp_path / "plan.json"
    if content is not None:
        path.write_text(content, encoding="utf-8")
    with pytest.raises(TesseraInputError, match=message) as refused:
        read_plan(path)
    assert str(refused.value).startswith(str(path))


def test_scores_round_trip_and_the_validation_threshold(tmp_path):
    # Reference: pandas reads the table back with the same columns and values.
    table = pd.DataFrame(
        {
            "role": ["validation", "test"],
            "tiles": [6, 6],
            "threshold": [0.48, 0.48],
            "f1": [0.9, 0.8],
        }
    )
    path = tmp_path / "scores.tsv"
    write_scores(path, table)
    pd.testing.assert_frame_equal(read_scores(path), pd.read_csv(path, sep="\t"))
    pd.testing.assert_frame_equal(read_scores(path), table)
    assert validation_threshold(path) == 0.48
    write_scores(path, table[table["role"] == "test"])
    with pytest.raises(TesseraInputError, match="no validation threshold in the tile scores"):
        validation_threshold(path)


def test_tile_probabilities_are_float32_and_unreadable_files_are_named(tmp_path):
    # Reference: numpy's own .npz reader.
    path = tmp_path / "probabilities.npz"
    write_tile_probabilities(path, {"t1": np.array([[0.25, 1.0]]), "t2": np.zeros((2, 2))})
    with np.load(path) as data:
        assert sorted(data.files) == ["t1", "t2"] and data["t1"].dtype == np.float32
    read = read_tile_probabilities(path)
    np.testing.assert_array_equal(read["t1"], np.array([[0.25, 1.0]], np.float32))
    good = path.read_bytes()
    with zipfile.ZipFile(path) as archive:
        central = archive.start_dir
    # zip format (PKWARE APPNOTE): a central directory entry's flag field is at byte 8 (bit 0:
    # encrypted) and its compression method at byte 10 (8 = deflate; 9 = deflate64, which
    # Python's zipfile cannot read)
    for offset in (central + 8, central + 10):
        damaged = bytearray(good)
        damaged[offset] ^= 0x01
        path.write_bytes(bytes(damaged))
        with pytest.raises(TesseraInputError, match="cannot read the tile predictions"):
            read_tile_probabilities(path)
    path.write_bytes(b"not a zip file")
    with pytest.raises(TesseraInputError, match="cannot read the tile predictions"):
        read_tile_probabilities(path)
