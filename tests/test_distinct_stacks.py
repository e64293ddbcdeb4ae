"""A stack listed twice in the sheet (a byte-identical copy under another dataset) is refused
before the statistics count animals."""

import hashlib
import shutil

import pytest

from tessera.errors import TesseraInputError
from tessera.workflow.files.distinct_stacks import read_distinct_stacks
from tessera.workflow.jobs.checksum_inputs import checksum_inputs_job
from tessera.workflow.jobs.distinct_stacks import check_distinct_stacks_job
from tessera.workflow.jobs.statistics import statistics_job

SHEET = "config/datasets.tsv"


@pytest.fixture
def study(tmp_path, monkeypatch):
    """Three invented stacks: ds_b a byte-identical copy of ds_a, ds_c its own."""
    monkeypatch.chdir(tmp_path)
    (tmp_path / "stacks").mkdir()
    (tmp_path / "stacks" / "ds_a.tif").write_bytes(b"II*\0 animal1 sections " * 50)
    shutil.copyfile(tmp_path / "stacks" / "ds_a.tif", tmp_path / "stacks" / "ds_b.tif")
    (tmp_path / "stacks" / "ds_c.tif").write_bytes(b"II*\0 animal3 sections " * 50)
    checksums = {}
    for dataset in ("ds_a", "ds_b", "ds_c"):
        checksums[dataset] = f"results/{dataset}/audit/inputs.sha256"
        checksum_inputs_job([f"stacks/{dataset}.tif"], checksums[dataset])
    return checksums


def _stacks(subjects, internal=(None, None, None)):
    return {
        d: {"path": f"stacks/{d}.tif", "internal_path": i, "subject": s}
        for d, s, i in zip(("ds_a", "ds_b", "ds_c"), subjects, internal, strict=True)
    }


def test_a_copy_of_a_stack_under_another_animal_is_refused(study, tmp_path):
    # the digest is hashlib's SHA-256 of the file (Python's reference implementation of FIPS 180-4)
    digest = hashlib.sha256((tmp_path / "stacks" / "ds_a.tif").read_bytes()).hexdigest()
    out = tmp_path / "results/study/distinct_stacks.json"
    with pytest.raises(TesseraInputError) as error:
        check_distinct_stacks_job(
            study, _stacks(["animal1", "animal2", "animal3"]), out, sheet=SHEET
        )
    message = str(error.value)
    assert "\n" not in message
    assert message.startswith("config/datasets.tsv: column path: datasets ds_a ")
    assert f"and ds_b ('stacks/ds_b.tif') hold the same stack (SHA-256 {digest[:12]}…)" in message
    assert "one animal would count twice (as 'animal1' and 'animal2')" in message
    assert "expected one stack per dataset" in message
    assert not out.exists()


def test_a_copy_under_the_same_animal_is_refused_as_measured_twice(study, tmp_path):
    out = tmp_path / "distinct_stacks.json"
    with pytest.raises(TesseraInputError) as error:
        check_distinct_stacks_job(
            study, _stacks(["animal1", "animal1", "animal3"]), out, sheet=SHEET
        )
    message = str(error.value)
    assert message.startswith("config/datasets.tsv: column path: datasets ds_a ")
    assert "hold the same stack (SHA-256 " in message
    assert "animal 'animal1' would be measured twice" in message
    assert not out.exists()


def test_one_file_holding_other_arrays_is_not_one_stack(study, tmp_path):
    # an HDF5 or zarr file copied, each copy read at another internal_path: other arrays
    out = tmp_path / "distinct_stacks.json"
    check_distinct_stacks_job(
        study,
        _stacks(["animal1", "animal2", "animal3"], internal=("raw_a", "raw_b", None)),
        out,
        sheet=SHEET,
    )
    recorded = read_distinct_stacks(out)
    for dataset in ("ds_a", "ds_b", "ds_c"):
        expected = hashlib.sha256((tmp_path / f"stacks/{dataset}.tif").read_bytes()).hexdigest()
        assert recorded[dataset] == expected


def test_a_checksum_record_without_the_stack_is_named(study, tmp_path):
    stacks = _stacks(["animal1", "animal2", "animal3"], internal=("raw_a", "raw_b", None))
    stacks["ds_c"]["path"] = "stacks/other.tif"
    with pytest.raises(TesseraInputError) as error:
        check_distinct_stacks_job(study, stacks, tmp_path / "d.json", sheet=SHEET)
    message = str(error.value)
    assert message.startswith("results/ds_c/audit/inputs.sha256: ")
    assert "lists no SHA-256 for the stack 'stacks/other.tif'" in message
    assert "expected a line for it (rerun rule checksum_inputs)" in message


def test_statistics_count_only_the_datasets_checked(study, tmp_path):
    out = tmp_path / "distinct_stacks.json"
    stacks = _stacks(["animal1", "animal2", "animal3"], internal=("raw_a", "raw_b", None))
    check_distinct_stacks_job(study, stacks, out, sheet=SHEET)
    datasets = {d: {"condition": "ctrl", "subject": s["subject"]} for d, s in stacks.items()}
    datasets["ds_d"] = {"condition": "ctrl", "subject": "animal4"}
    with pytest.raises(TesseraInputError) as error:
        statistics_job(
            {},
            {},
            datasets,
            "scores.tsv",
            "a.tsv",
            "c.tsv",
            "p.png",
            target="mito",
            measures=[],
            out_conditions="d.tsv",
            stacks_check=out,
        )
    message = str(error.value)
    assert message.startswith(f"{out}: checked datasets ['ds_a', 'ds_b', 'ds_c'], ")
    assert "the statistics count ['ds_a', 'ds_b', 'ds_c', 'ds_d']" in message
    assert "expected the same (rerun rule check_distinct_stacks)" in message
