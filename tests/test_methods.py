"""The methods paragraph reports the run's own figures; checksums match hashlib."""

import hashlib
import json
import re

import numpy as np
import pandas as pd
import tifffile

from tessera.cascade.api import (
    CascadeSpec,
    fit_cascade,
    prepare_tile,
    receptive_radius,
    z_halo,
)
from tessera.io.digests import file_sha256
from tessera.statistics import compare_conditions
from tessera.workflow.files.comparison_table import write_comparison_table
from tessera.workflow.files.node_model import write_node
from tessera.workflow.files.qc_table import write_qc_table
from tessera.workflow.jobs.audit import audit_job
from tessera.workflow.jobs.checksum_inputs import checksum_inputs_job
from tessera.workflow.jobs.ingest import ingest_job
from tessera.workflow.jobs.methods import methods_job
from tessera.workflow.provenance import _file_entry


def test_checksums_match_hashlib(tmp_path):
    # Reference: hashlib.sha256 of the file's bytes.
    data = bytes(range(256)) * 5000
    (tmp_path / "stack.tif").write_bytes(data)
    assert file_sha256(tmp_path / "stack.tif", chunk=1000) == hashlib.sha256(data).hexdigest()
    checksum_inputs_job([tmp_path / "stack.tif"], tmp_path / "inputs.sha256")
    assert (tmp_path / "inputs.sha256").read_text().startswith(hashlib.sha256(data).hexdigest())


def _methods_of_a_run(
    tmp_path, *, cascade_changes=None, first_nodes=None, unsure=None, sheet=None, **more
):
    """The methods text of a small run of one target, mitochondria, written from its files
    (`unsure`: the tile scores' unsure_fraction of validation and test; a table written before
    that column when None; `more`: further inputs of methods_job)."""
    scores = tmp_path / "scores.tsv"
    table = pd.DataFrame(
        {
            "role": ["validation", "test"],
            "tiles": [4, 5],
            "informative_tiles": [4, 5],
            "threshold": [0.42, 0.42],
            "precision": [0.9, 0.871],
            "recall": [0.9, 0.912],
            "f1": [0.9, 0.891],
            "jaccard": [0.8, 0.803],
        }
    )
    if unsure is not None:
        table["unsure_fraction"] = unsure
    table.to_csv(scores, sep="\t", index=False)
    settings = tmp_path / "objects.json"
    settings.write_text(
        json.dumps(
            {
                "high": 0.42,
                "low": 0.3,
                "open_radius_nm": 16,
                "close_radius_nm": 0,
                "fill_holes": True,
                "min_volume_um3": 0.002,
                "max_volume_um3": None,
                "connectivity": 26,
                "split": True,
                "split_min_depth_nm": 40,
                "split_min_depth_setting": "auto",
                "split_valley_probability": 0.9,
            }
        )
    )
    comparison = tmp_path / "comparison.tsv"
    pd.DataFrame(
        {
            "measure": ["volume_um3"],
            "condition": ["cold"],
            "reference": ["warm"],
            "scale": ["ratio"],
            "effect": [1.24],
            "ci_low": [1.1],
            "ci_high": [1.4],
            "confidence": [0.95],
            "animals": [3],
            "reference_animals": [3],
        }
    ).to_csv(comparison, sep="\t", index=False)
    qc = tmp_path / "qc.tsv"
    pd.DataFrame({"z": [0, 1, 2], "excluded": [False, True, False]}).to_csv(
        qc, sep="\t", index=False
    )
    sums = tmp_path / "inputs.sha256"
    sums.write_text("ab12  data/a.tif\n")
    cascade = {
        "stages": 2,
        "levels": 2,
        "classifier": "mlp",
        "sigmas": [0.7, 1.6],
        "coarse_sigmas": [0.7],
        "stencil_radii": [1, 2],
        "folds": 3,
        "samples_per_tile": 100,
        "seed": 0,
        **(cascade_changes or {}),
    }
    sections = {
        "ingest": {},
        "pyramid": {"levels": 3},
        "statistics": {"confidence": 0.95},
        "qc": {"sharpness_sigma": 1.5, "exclude_flagged": True},
        "targets": {
            "mitochondria": {
                "downsample": 2,
                "cascade": cascade,
                "tiles": {"size": 96},
                "split": {"guard_sections": 2},
                # the schema's defaults
                "output_smoothing_px": 2.0,
                "output_smoothing_sections": "auto",
            }
        },
    }
    out = tmp_path / "methods.md"
    methods_job(
        sections,
        sheet or {"a": {"condition": "warm", "subject": "a"}},
        {"mitochondria": scores},
        {"mitochondria": [settings]},
        {"mitochondria": comparison},
        [sums],
        [qc],
        out,
        first_nodes=first_nodes,
        **more,
    )
    return out.read_text()


def test_methods_say_how_grey_values_were_mapped_and_which_datasets_gave_no_tiles(tmp_path):
    # A 16-bit stack is stretched between its own percentiles (ingest), so its grey values
    # depend on what it holds; a dataset without tiles has no held-out accuracy of its own.
    # Both are facts a reader of the methods needs (common practice in reporting).
    rng = np.random.default_rng(3)
    images = {}
    for dataset, dtype in (("a", np.uint16), ("b", np.uint8)):
        stack = tmp_path / f"{dataset}.tif"
        top = 30000 if dtype == np.uint16 else 255
        data = rng.integers(0, top, (3, 16, 16)).astype(dtype)
        tifffile.imwrite(stack, data, photometric="minisblack")
        images[dataset] = tmp_path / f"{dataset}.ome.zarr"
        ingest_job(stack, images[dataset], fmt="tiff_stack", spacing=(40, 8, 8))
    sheet = {d: {"condition": "warm", "subject": d} for d in ("a", "b", "c")}
    text = " ".join(
        _methods_of_a_run(
            tmp_path,
            sheet=sheet,
            ingest_images=images,
            annotated={"mitochondria": ["a"]},
        ).split()
    )
    assert (
        "1 of the 2 stacks (uint16) was mapped linearly to 8 bits between its own grey-value "
        "percentiles 0.1 and 99.9" in text
    )
    assert (
        "Datasets b and c gave no mitochondria tiles: they were predicted and measured with "
        "the model trained on the others, without a held-out accuracy of their own." in text
    )


def test_methods_text_is_written_from_the_run(tmp_path):
    text = _methods_of_a_run(tmp_path)
    for fact in (
        "a 2D Gaussian-derivative filter bank of each section (σ = 0.7, 1.6 px; 0.7 px in 2D at",
        "F1 0.891",
        "Jaccard index 0.803",
        "(0.42)",
        "2 stages × 2 levels",
        "multilayer perceptron",
        "hysteresis thresholds of 0.30 and 0.42",
        "opened with a 16 nm ball",
        "smaller than 0.002 µm³",
        "26-connected",
        "seeded watershed on the Euclidean distance",
        "at least 40 nm above their saddle (the larger of 30 nm and the coarsest voxel side)",
        "scaled by min(p / 0.9, 1) with p the probability",
        "1 of 3 sections",
        "ratio 1.24 (95% CI 1.1–1.4; 3 vs 3 animals)",
        "`data/a.tif`: `ab12`",
        "validated against held-out annotation",
    ):
        assert fact in text, fact


def test_methods_text_says_what_share_of_test_pixels_was_left_out_as_unsure(tmp_path):
    # Scores leave out the pixels an annotator marked unsure (the ignore value); a wide band of
    # them along every border raises the scores, so the share is stated beside them.
    text = _methods_of_a_run(tmp_path, unsure=[0.1, 0.125])
    assert (
        "Jaccard index 0.803 (12.5% of the test pixels, marked unsure by the annotator, were "
        "left out; scores over whole objects, borders included, are lower)." in text
    )
    assert "marked unsure" not in _methods_of_a_run(tmp_path, unsure=[0.0, 0.0])


def _first_node(tmp_path, spec, seed):
    """A one-node cascade of `spec` trained on a dark square in noise, saved; its path."""
    rng = np.random.default_rng(seed)
    reach, radius = z_halo(spec), receptive_radius(spec)
    truth = np.zeros((24, 24), np.uint8)
    truth[6:16, 8:18] = 1
    window = rng.normal(150, 10, (2 * reach + 1, 24 + 2 * radius, 24 + 2 * radius))
    window[:, radius : radius + 24, radius : radius + 24] -= 60 * truth
    tiles = [prepare_tile(spec, f"t{i}", window, truth, fold=i) for i in range(2)]
    node = tmp_path / "stage1_level0.npz"
    write_node(fit_cascade(spec, tiles, target="mitochondria")[(1, 0)], node)
    return node


def test_methods_state_the_features_the_trained_model_used(tmp_path):
    # dims auto and unset sigmas are decided when a node is trained: the text reads the model
    spec = CascadeSpec(
        stages=1, levels=0, dims=3, voxel_aspect=1.0, samples_per_tile=60, folds=2, seed=0
    )
    text = _methods_of_a_run(
        tmp_path,
        cascade_changes={"dims": "auto", "sigmas": None},
        first_nodes={"mitochondria": _first_node(tmp_path, spec, 1)},
    )
    # the 3D default scales (tessera.cascade.features.DEFAULT_SIGMAS_3D), not the config's
    assert "a 3D Gaussian-derivative filter bank, round in nm (σ = 0.7, 1.6, 3.5, 5, 10 px;" in text
    # a 3D model reads no neighbouring sections as channels, whatever neighbours auto says
    assert "intensity of the section above" not in text
    # output_smoothing_sections auto, as applied to a 3D model: none (not the rule for both)
    assert "no smoothing across sections." in text
    assert "for a cascade working section by section" not in text


def test_methods_state_the_sections_a_2d_model_read(tmp_path):
    # neighbours auto is decided when a node is trained (1 in 2D): the text reads the model
    spec = CascadeSpec(stages=1, levels=0, neighbours=1, samples_per_tile=60, folds=2, seed=0)
    text = _methods_of_a_run(
        tmp_path,
        cascade_changes={"dims": "auto", "neighbours": "auto", "sigmas": None},
        first_nodes={"mitochondria": _first_node(tmp_path, spec, 2)},
    )
    assert "coarser levels, plus the intensity of the section above and below)" in text
    # output_smoothing_sections auto, as applied to a 2D model
    assert "across sections a Gaussian of σ 0.6 sections." in text


def test_audit_manifest_and_ro_crate(tmp_path):
    results = tmp_path / "results"
    (results / "a").mkdir(parents=True)
    (results / "a" / "table.tsv").write_text("x\n1\n")
    store = results / "a" / "image.ome.zarr"
    (store / "0").mkdir(parents=True)
    (store / "zarr.json").write_text("{}")
    (store / "0" / "c").write_bytes(b"\x00\x01")
    source = tmp_path / "stack.tif"
    source.write_bytes(b"raw")
    record = results / "provenance" / "tabulate" / "dataset=a.json"
    record.parent.mkdir(parents=True)
    record.write_text(
        json.dumps(
            {
                "rule": "tabulate",
                "wildcards": {"dataset": "a"},
                "host": "h",
                "started": "s",
                "finished": "f",
                "duration_s": 1.0,
                "code_version": "v",
                "source": {"commit": "c", "dirty": False},
                "outputs": [{"path": str(results / "a" / "table.tsv")}],
            }
        )
    )
    audit_job(
        [results / "a" / "table.tsv", store],
        [source],
        results / "study" / "manifest.tsv",
        results / "ro-crate-metadata.json",
        results / "study" / "provenance.tsv",
        study_name="s",
        root=results,
        records_root=results / "provenance",
    )
    table = pd.read_csv(results / "study" / "manifest.tsv", sep="\t", keep_default_na=False)
    assert table["path"].tolist() == ["a/image.ome.zarr", "a/table.tsv"]
    # each result links the record of the job that wrote it; the store's job left none here
    assert table["provenance"].tolist() == ["", str(record)]
    assert table.loc[1, "sha256"] == hashlib.sha256(b"x\n1\n").hexdigest()
    crate = json.loads((results / "ro-crate-metadata.json").read_text())
    graph = {e["@id"]: e for e in crate["@graph"]}
    # RO-Crate 1.1: a metadata descriptor about the root dataset, which lists its parts
    assert graph["ro-crate-metadata.json"]["about"] == {"@id": "./"}
    assert {p["@id"] for p in graph["./"]["hasPart"]} == {
        "a/image.ome.zarr/",
        "a/table.tsv",
        "provenance/tabulate/dataset=a.json",
    }
    assert graph["provenance/tabulate/dataset=a.json"]["about"] == [{"@id": "a/table.tsv"}]
    assert graph["#run"]["@type"] == "CreateAction" and graph["#run"]["object"] == [
        {"@id": str(source)}
    ]


def test_provenance_entries_hash_small_files_and_identify_large_stores_by_their_manifests(tmp_path):
    # Reference: hashlib.sha256. Small inputs are hashed whole; a store above the limit is named
    # by the SHA-256 of its checksum manifests, so a job never rereads a terabyte input for its record.
    table = tmp_path / "t.tsv"
    table.write_bytes(b"a\tb\n1\t2\n")
    assert (
        _file_entry({"name": "t", "path": str(table)})["sha256"]
        == hashlib.sha256(b"a\tb\n1\t2\n").hexdigest()
    )
    store = tmp_path / "s.ome.zarr"
    (store / "0" / "c").mkdir(parents=True)
    (store / "0" / "c" / "0").write_bytes(bytes(1000))
    (store / "0" / "tessera-checksums.json").write_text('{"files": {}}')
    big = _file_entry({"name": "s", "path": str(store)}, full_hash_bytes=100)
    expected = hashlib.sha256(b"0/tessera-checksums.json\0" + b'{"files": {}}').hexdigest()
    assert (
        big["sha256"] is None
        and big["checksum_manifests_sha256"] == expected
        and big["bytes"] == 1013
    )
    (store / "0" / "tessera-checksums.json").unlink()
    assert "not_hashed" in _file_entry({"name": "s", "path": str(store)}, full_hash_bytes=100)


# --- the paragraph for every study shape: words where numbers are missing, never nan ---


def methods_inputs(tmp_path, comparison_table, sheet, *, reference=None, qc_rows=None):
    """Everything methods_job reads, written to tmp_path; the comparison as given."""
    scores = tmp_path / "scores.tsv"
    pd.DataFrame(
        {
            "role": ["validation", "test"],
            "tiles": [4, 5],
            "informative_tiles": [4, 5],
            "threshold": [0.5, 0.5],
            "precision": [0.9, 0.9],
            "recall": [0.9, 0.9],
            "f1": [0.9, 0.9],
            "jaccard": [0.8, 0.8],
        }
    ).to_csv(scores, sep="\t", index=False)
    settings = tmp_path / "objects.json"
    settings.write_text(
        json.dumps(
            {
                "high": 0.5,
                "low": 0.5,
                "open_radius_nm": 0,
                "close_radius_nm": 0,
                "fill_holes": False,
                "min_volume_um3": 0,
                "max_volume_um3": None,
                "connectivity": 26,
            }
        )
    )
    comparison = tmp_path / "comparison.tsv"
    write_comparison_table(comparison, comparison_table)
    qc = tmp_path / "qc.tsv"
    write_qc_table(
        pd.DataFrame(qc_rows or {"z": [0, 1], "reason": ["", ""], "excluded": [False, False]}),
        qc,
    )
    sums = tmp_path / "inputs.sha256"
    sums.write_text("ab12  data/a.tif\n")
    cascade = {
        "stages": 1,
        "levels": 1,
        "classifier": "mlp",
        "sigmas": [1.0],
        "coarse_sigmas": [1.0],
        "stencil_radii": [1],
        "folds": 2,
        "samples_per_tile": 10,
        "seed": 0,
    }
    sections = {
        "ingest": {},
        "pyramid": {"levels": 2},
        "statistics": {"confidence": 0.95, "reference_condition": reference},
        "qc": {"sharpness_sigma": 1.5, "exclude_flagged": True},
        "targets": {
            "nuclei": {
                "downsample": 8,
                "cascade": cascade,
                "tiles": {"size": 64},
                "split": {"guard_sections": 1},
            }
        },
    }
    out = tmp_path / "methods.md"
    methods_job(
        sections,
        sheet,
        {"nuclei": scores},
        {"nuclei": [settings]},
        {"nuclei": comparison},
        [sums],
        [qc],
        out,
    )
    text = out.read_text()
    assert not re.search(r"\bnan\b", text, re.IGNORECASE)  # no number a reader cannot use
    return " ".join(text.split())  # sentences may wrap


def comparison_of(animals, reference="warm", conditions=None):
    table = compare_conditions(
        animals,
        measures=["volume_um3", "region_objects"],
        reference=reference,
        conditions=conditions,
    )
    table.insert(0, "target", "nuclei")
    return table


def sheet_of(conditions):
    return {f"d{k}": {"condition": c, "subject": f"m{k}"} for k, c in enumerate(conditions)}


def test_methods_for_one_condition_says_nothing_was_compared(tmp_path):
    animals = pd.DataFrame(
        {"subject": ["m0", "m1"], "condition": "warm", "volume_um3": [1.0, 2.0]}
    ).assign(region_objects=[3.0, 4.0])
    text = methods_inputs(tmp_path, comparison_of(animals), sheet_of(["warm", "warm"]))
    assert "2 datasets from 2 animals in 1 condition (warm) were converted" in text
    assert "The study has one condition, so nothing was compared" in text
    assert "With one condition (warm) nothing was compared" in text


def test_methods_without_whole_objects_and_one_animal_per_condition_say_why_in_words(tmp_path):
    # The demo's nuclei: every object touches the volume border, one animal per condition.
    animals = pd.DataFrame(
        {
            "subject": ["m0", "m1"],
            "condition": ["warm", "cold"],
            "volume_um3": [float("nan")] * 2,
            "region_objects": [2.0, 3.0],
        }
    )
    text = methods_inputs(tmp_path, comparison_of(animals), sheet_of(["warm", "cold"]))
    assert (
        "volume_um3 cold vs warm: not compared (no animal in 'cold' or 'warm' has a whole object "
        "to measure)" in text
    )
    assert (
        "region_objects cold vs warm: difference 1 (1 vs 1 animals; no interval: only 1 animal "
        "measured in 'cold' and 'warm', and an interval needs 2 per condition)" in text
    )


def test_methods_name_the_reference_for_three_conditions(tmp_path):
    animals = pd.DataFrame(
        {
            "subject": [f"m{k}" for k in range(7)],
            "condition": ["warm", "warm", "warm", "cold", "cold", "hot", "hot"],
            "volume_um3": [1.0, 1.1, 0.9, 1.3, 1.4, 1.2, 1.1],
            "region_objects": [3.0, 4.0, 5.0, 6.0, 7.0, 4.0, 4.5],
        }
    )
    # the sheet lists cold first: warm is the reference only because the config says so
    sheet = sheet_of(["cold", "warm", "warm", "warm", "cold", "hot", "hot"])
    table = comparison_of(animals, reference="warm", conditions=["warm", "cold", "hot"])
    text = methods_inputs(tmp_path, table, sheet, reference="warm")
    assert (
        "Each other condition (cold, hot) was compared with the reference condition, warm "
        "(set in the config), on" in text
    )
    assert "volume_um3 cold vs warm: ratio" in text and "volume_um3 hot vs warm: ratio" in text
    assert "interval unreliable: only 2 animals measured in 'cold'" in text


def test_methods_count_qc_flags_per_reason(tmp_path):
    # Reasons are quoted as the QC table holds them, including kinds the text does not know,
    # most frequent first.
    rows = {
        "z": list(range(6)),
        "reason": ["", "flat", "flat", "blurred;shift", "missing", ""],
        "excluded": [False, True, True, True, True, False],
    }
    animals = pd.DataFrame(
        {"subject": ["m0"], "condition": ["warm"], "volume_um3": [1.0], "region_objects": [1.0]}
    )
    text = methods_inputs(tmp_path, comparison_of(animals), sheet_of(["warm"]), qc_rows=rows)
    assert (
        "QC flagged 4 of 6 sections (2 flat, 1 blurred, 1 missing, 1 shift; a section can have "
        "several reasons), which were excluded from training" in text
    )
    assert "1 dataset from 1 animal in 1 condition (warm) was converted" in text


def test_methods_say_flagged_sections_were_kept_when_exclusion_is_off(tmp_path):
    # qc.exclude_flagged false: the QC table still names reasons, but excludes nothing
    rows = {
        "z": list(range(4)),
        "reason": ["", "blurred", "", "intensity"],
        "excluded": [False, False, False, False],
    }
    animals = pd.DataFrame(
        {"subject": ["m0"], "condition": ["warm"], "volume_um3": [1.0], "region_objects": [1.0]}
    )
    text = methods_inputs(tmp_path, comparison_of(animals), sheet_of(["warm"]), qc_rows=rows)
    assert (
        "QC flagged 2 of 4 sections (1 blurred, 1 intensity), which were kept (exclusion "
        "switched off)." in text
    )


def test_methods_say_when_tiles_were_trained_in_several_orientations(tmp_path):
    assert "orientations" not in _methods_of_a_run(tmp_path)
    text = " ".join(_methods_of_a_run(tmp_path, cascade_changes={"orientations": 4}).split())
    assert "(100 class-balanced pixels per tile shared among 4 orientations of the tile" in text
