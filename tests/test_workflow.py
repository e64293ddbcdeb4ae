"""The Snakemake layer: lint, formatting, dry run of the demo, and a real run of a tiny study."""

import hashlib
import json
import os
import re
import shutil
import subprocess
import sys
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml

from tessera.io.omezarr import open_image

pytestmark = pytest.mark.workflow

BIN = Path(sys.executable).parent
REPO_ROOT = Path(__file__).resolve().parents[1]


def snakemake(*args, cwd, check=True):
    result = subprocess.run(
        [str(BIN / "snakemake"), *args], cwd=cwd, capture_output=True, text=True, timeout=900
    )
    if check and result.returncode != 0:
        raise AssertionError(
            f"snakemake {' '.join(args)} failed:\n{result.stdout}\n{result.stderr}"
        )
    return result


def test_lint_is_clean(repo):
    # `snakemake --lint` is Snakemake's own best-practice checker.
    result = snakemake("--lint", cwd=repo)
    assert "Lints for" not in result.stdout + result.stderr


def test_rule_files_are_formatted(repo):
    # snakefmt is the registry's formatter for Snakemake files (black style).
    result = subprocess.run(
        [str(BIN / "snakefmt"), "--check", "Snakefile", "rules"],
        cwd=repo,
        capture_output=True,
        text=True,
    )
    assert result.returncode == 0, result.stderr


def test_demo_dry_run_plans_every_dataset(repo, tmp_path):
    # A fresh working directory with the shipped demo config: nothing exists yet.
    shutil.copytree(repo / "config", tmp_path / "config")
    result = snakemake(
        "-n", "--quiet", "rules", "--snakefile", str(repo / "Snakefile"), cwd=tmp_path
    )
    counts = {}
    for line in result.stdout.splitlines():
        parts = line.split()
        if len(parts) == 2 and parts[1].isdigit():
            counts[parts[0]] = int(parts[1])
    sheet = pd.read_csv(repo / "config" / "datasets.tsv", sep="\t")
    for rule in ("demo_dataset", "ingest", "pyramid", "section_qc"):
        assert counts[rule] == len(sheet) == 6
    config = yaml.safe_load((repo / "config" / "config.yaml").read_text())
    pairs = len(sheet) * len(config["targets"])
    assert counts["stitch"] == counts["objects"] == counts["shard_plan"] == pairs
    assert counts["predict_shard"] == pairs * config["predict"]["shard_jobs"]
    assert counts["morphometry"] == pairs and counts["statistics"] == len(config["targets"])


TINY_SHEET = (
    "dataset\tcondition\tsubject\tpath\tformat\tvoxel_z_nm\tvoxel_y_nm\tvoxel_x_nm\troi_mask\n"
    "w1\twarm\tw1\tdemo/data/w1/raw.tif\ttiff_stack\t40\t8\t8\tdemo/data/w1/cells.tif\n"
    "c1\tcold\tc1\tdemo/data/c1/raw.tif\ttiff_stack\t40\t8\t8\t\n"
)


def tiny_config(stages=2, **pyramid):
    # Nuclei fill about a tenth of this small field; a 2-stage x 1-level cascade with a small
    # network keeps the whole study to well under a minute.
    cascade = {
        "stages": stages,
        "levels": 1,
        "classifier": "mlp",
        "folds": 2,
        "samples_per_tile": 400,
        "sigmas": [1.0, 2.0],
        "coarse_sigmas": [1.0],
        "stencil_radii": [1, 2, 4],
    }
    return {
        "study": {"name": "tiny test study"},
        "datasets": "config/datasets.tsv",
        "demo": {
            "seed": 5,
            "shape": [12, 192, 192],
            "mito_volume_scale": {"cold": 1.25},
            "tile_size": 32,
        },
        "ingest": {"chunks": [1, 64, 64]},
        "pyramid": {"levels": 2, **pyramid},
        "qc": {"shift_crop": 128},
        "targets": {
            "nuclei": {
                "downsample": 2,
                "annotations": {"labels": "demo/data/{dataset}/truth/nuclei.tif"},
                # nuclei are sparse here: tiles of background alone could leave a fold
                # without the target
                "tiles": {"size": 32, "per_dataset": 5, "min_target_fraction": 0.05},
                "split": {"fractions": [0.6, 0.2, 0.2], "guard_sections": 1},
                "cascade": cascade,
                "annotated_datasets": ["w1", "c1"],
            }
        },
    }


@pytest.fixture(scope="module")
def tiny_study(tmp_path_factory):
    root = tmp_path_factory.mktemp("study")
    (root / "config").mkdir()
    (root / "config" / "config.yaml").write_text(yaml.safe_dump(tiny_config()))
    (root / "config" / "datasets.tsv").write_text(TINY_SHEET)
    return root


@pytest.fixture(scope="module")
def finished_study(tiny_study, repo=REPO_ROOT):
    snakemake("--cores", "2", "--snakefile", str(repo / "Snakefile"), cwd=tiny_study)
    return tiny_study


def test_report_of_a_finished_study_renders_without_warnings(finished_study, tmp_path):
    # Snakemake's --report renders every caption with docutils, which prints "(WARNING/2)"
    # for rst it must guess at, e.g. a report category named like one of Snakemake's own
    # link targets (Workflow, Statistics): the report is written, but the log fills with noise;
    # "(ERROR/3)" for rst it cannot read, e.g. |x| taken as a substitution, and the report then
    # shows the error in place of the caption
    report = tmp_path / "report.html"
    result = snakemake(
        "--report", str(report), "--snakefile", str(REPO_ROOT / "Snakefile"), cwd=finished_study
    )
    assert report.stat().st_size > 0
    for level in ("(WARNING/", "(ERROR/", "(SEVERE/"):
        assert level not in result.stdout + result.stderr, level


def test_tiny_study_produces_every_output(finished_study):
    for dataset in ("w1", "c1"):
        group, info = open_image(finished_study / f"results/{dataset}/pyramid/raw.ome.zarr")
        assert info["factors"] == [(1, 1, 1), (1, 2, 2), (1, 4, 4)]
        assert info["levels"][0].shape == (12, 192, 192)
        assert info["spacing"] == (40.0, 8.0, 8.0)
        table = pd.read_csv(finished_study / f"results/{dataset}/qc/sections.tsv", sep="\t")
        assert len(table) == 12
        assert (finished_study / f"results/{dataset}/qc/sections.png").stat().st_size > 0
        assert (finished_study / f"logs/ingest/{dataset}.log").exists()
    for stage in (1, 2):
        for level in (0, 1):
            assert (
                finished_study / f"results/study/nuclei/cascade/stage{stage}_level{level}.npz"
            ).exists()
    scores = pd.read_csv(
        finished_study / "results/study/nuclei/tiles_predicted/scores.tsv", sep="\t"
    )
    assert list(scores["role"]) == ["validation", "test"]
    assert scores["f1"].between(0, 1).all()
    for dataset in ("w1", "c1"):
        group, info = open_image(
            finished_study / f"results/{dataset}/predicted/nuclei/probability.ome.zarr"
        )
        assert info["levels"][0].shape == (12, 96, 96) and info["levels"][0].dtype == np.uint8
        objects = pd.read_csv(finished_study / f"results/{dataset}/objects/nuclei.tsv", sep="\t")
        labels = open_image(finished_study / f"results/{dataset}/objects/nuclei.ome.zarr")[0][
            "labels/nuclei/0"
        ][:]
        assert labels.max() == len(objects) and objects["voxels"].sum() == (labels > 0).sum()
        measured = pd.read_csv(
            finished_study / f"results/{dataset}/morphometry/nuclei_objects.tsv", sep="\t"
        )
        assert list(measured["id"]) == list(objects["id"]) and "sphericity" in measured.columns
    comparison = pd.read_csv(
        finished_study / "results/study/nuclei/statistics/comparison.tsv",
        sep="\t",
        keep_default_na=False,
    )
    # one animal per condition in this tiny study: a warning, not a failure
    assert set(comparison["condition"]) == {"cold"} and set(comparison["reference"]) == {"warm"}
    assert (
        comparison["warning"]
        .str.contains(r"no comparison: no animal in|no interval: only 1 animal measured in")
        .all()
    )
    assert (finished_study / "results/study/nuclei/statistics/conditions.png").stat().st_size > 0
    from tessera.workflow.files.points import read_points

    suggested = read_points(
        finished_study / "results/study/nuclei/next_tiles/points.tsv",
        datasets=["w1", "c1"],
        targets=["nuclei"],
    )
    assert len(suggested) == 10  # the default count; a sheet the tile export accepts
    evaluation = pd.read_csv(
        finished_study / "results/study/nuclei/evaluation/summary.tsv", sep="\t"
    )
    assert list(evaluation["dataset"]) == ["all", "c1", "w1"]
    assert evaluation.loc[0, "f1"] == pytest.approx(
        scores.loc[scores["role"] == "test", "f1"].iloc[0]
    )
    manifest = pd.read_csv(finished_study / "results/study/audit/manifest.tsv", sep="\t")
    assert "study/methods.md" in set(manifest["path"])
    assert (finished_study / "results/ro-crate-metadata.json").exists()
    methods = (finished_study / "results/study/methods.md").read_text()
    test_f1 = scores.loc[scores["role"] == "test", "f1"].iloc[0]
    assert f"F1 {test_f1:.3f}" in methods and "demo/data/w1/raw.tif" in methods
    # one animal per condition in the tiny study: the missing interval is said in words, no nan
    assert "not compared" in methods or "no interval" in methods
    assert not re.search(r"\bnan\b", methods, re.IGNORECASE)


def test_tiny_study_segments_the_nuclei_far_better_than_trivial_models(finished_study):
    # An accuracy floor for the whole chain. The reference numbers come from outside the
    # project: scikit-learn's f1_score on the test tiles' own pixels and labels.
    from sklearn.metrics import f1_score

    from tessera.workflow.files.tile_registry import read_annotation_set

    study = finished_study / "results/study/nuclei"
    registry, labels = read_annotation_set(study / "tiles")
    scores = pd.read_csv(study / "tiles_predicted/scores.tsv", sep="\t").set_index("role")
    with np.load(study / "tiles_predicted/probabilities.npz") as data:
        probabilities = {key: data[key] for key in data.files}
    pixels, truth, predicted = [], [], []
    threshold = scores.loc["validation", "threshold"]  # chosen on the validation tiles
    for _, row in registry[registry["role"] == "test"].iterrows():
        image = open_image(finished_study / f"results/{row['dataset']}/pyramid/raw.ome.zarr")[1]
        y, x = int(row["y0"]), int(row["x0"])
        tile = np.asarray(
            image["levels"][int(row["level"])][
                int(row["z"]), y : y + int(row["height"]), x : x + int(row["width"])
            ]
        )
        keep = labels[row["tile_id"]] != 255
        pixels.append(tile[keep])
        truth.append(labels[row["tile_id"]][keep])
        predicted.append(probabilities[row["tile_id"]][keep] >= threshold)
    pixels, truth, predicted = map(np.concatenate, (pixels, truth, predicted))
    # the reported test F1 is the F1 of the test pixels at the validation threshold
    reported = scores.loc["test", "f1"]
    assert reported == pytest.approx(f1_score(truth, predicted), abs=1e-9)
    # Trivial models: all background scores 0, all foreground 2p/(1+p) (p = target fraction,
    # about 0.28 here, so about 0.44); the tiny study's cascade must do far better.
    assert reported > 0.9
    # The best single grey-value cut, chosen on the test tiles themselves (which favours it):
    # the cascade, chosen on validation tiles only, must come within 0.05 of it.
    best_cut = max(
        f1_score(truth, pixels < cut if darker else pixels >= cut)
        for cut in range(0, 256, 4)
        for darker in (True, False)
    )
    assert reported >= best_cut - 0.05, (reported, best_cut)


def test_every_job_leaves_a_provenance_record(finished_study):
    from tessera.workflow.provenance import is_run_specific

    records = [
        json.loads(p.read_text())
        for p in sorted((finished_study / "results/provenance").rglob("*.json"))
    ]
    written = set()
    for record in records:
        assert record["code_version"] == record["params"]["code"]
        assert isinstance(record["source"]["dirty"], (bool, type(None)))
        assert record["started"] <= record["finished"] and record["host"]
        for entry in record["inputs"] + record["outputs"]:
            path = finished_study / entry["path"]
            if path.is_file() and entry in record["outputs"]:
                # reference: hashlib's SHA-256 of the bytes the job left
                assert entry["sha256"] == hashlib.sha256(path.read_bytes()).hexdigest(), entry[
                    "path"
                ]
            written.update([entry["path"]] if entry in record["outputs"] else [])
    rules = {r["rule"] for r in records}
    assert {
        "demo_dataset",
        "ingest",
        "train_node",
        "predict_shard",
        "stitch",
        "objects",
        "morphometry",
        "statistics",
        "methods",
    } <= rules
    train = [r for r in records if r["rule"] == "train_node"]
    assert train and all(r["seeds"] for r in train)
    # every result comes from a job with a record (stores: the record names the store)
    results = finished_study / "results"
    for path in results.rglob("*"):
        relative = path.relative_to(results).as_posix()
        if not path.is_file() or is_run_specific(relative):
            continue
        owners = [
            w
            for w in written
            if (finished_study / w) == path or (finished_study / w) in path.parents
        ]
        assert owners, f"no provenance record lists {relative}"


def test_qc_finds_the_rendered_defects(finished_study):
    # The demo renders one blank/torn and one blurred section per dataset and records where.
    for dataset in ("w1", "c1"):
        truth = json.loads((finished_study / f"demo/data/{dataset}/truth.json").read_text())
        defects = {int(z) for zs in truth["defects"].values() for z in zs}
        table = pd.read_csv(
            finished_study / f"results/{dataset}/qc/sections.tsv", sep="\t", keep_default_na=False
        )
        assert set(table.loc[table["excluded"], "z"]) == defects


def test_second_run_has_nothing_to_do(finished_study, repo=REPO_ROOT):
    result = snakemake("-n", "--snakefile", str(repo / "Snakefile"), cwd=finished_study)
    assert "Nothing to be done" in result.stdout + result.stderr


def test_changed_pyramid_setting_reruns_only_the_pyramid(finished_study, repo=REPO_ROOT):
    config = finished_study / "config" / "config.yaml"
    original = config.read_text()
    try:
        config.write_text(yaml.safe_dump(tiny_config(levels=3)))
        result = snakemake(
            "-n", "--quiet", "rules", "--snakefile", str(repo / "Snakefile"), cwd=finished_study
        )
        planned = {line.split()[0] for line in result.stdout.splitlines() if line[:1].isalpha()}
        assert "pyramid" in planned
        assert not planned & {"ingest", "section_qc", "demo_dataset"}
    finally:
        config.write_text(original)


def test_adding_a_stage_trains_only_the_new_stage(finished_study, repo=REPO_ROOT):
    config = finished_study / "config" / "config.yaml"
    original = config.read_text()
    try:
        config.write_text(yaml.safe_dump(tiny_config(stages=3)))
        result = snakemake("-n", "--snakefile", str(repo / "Snakefile"), cwd=finished_study)
        trained = re.findall(r"stage(\d)_level(\d)\.npz\n\s+log:", result.stdout)
        # grouped jobs (shards) are printed indented under their group
        planned = {
            line.split()[1]
            for line in result.stdout.splitlines()
            if line.strip().startswith("rule ")
        }
        assert sorted(trained) == [("3", "0"), ("3", "1")]
        downstream = {
            "predict_tiles:",
            "evaluate:",
            "evaluate_objects:",
            "shard_plan:",
            "predict_shard:",
            "stitch:",
            "objects:",
            "morphometry:",
            "meshes:",
            "statistics:",
            "methods:",
            "next_tiles:",
            "audit:",
            "all:",
        }
        assert planned == {"train_node:"} | downstream
    finally:
        config.write_text(original)


def test_changed_feature_sigma_retrains_every_node_and_what_follows(finished_study, repo=REPO_ROOT):
    config = finished_study / "config" / "config.yaml"
    original = config.read_text()
    try:
        changed = tiny_config()
        changed["targets"]["nuclei"]["cascade"]["sigmas"] = [1.0, 2.5]
        config.write_text(yaml.safe_dump(changed))
        result = snakemake("-n", "--snakefile", str(repo / "Snakefile"), cwd=finished_study)
        trained = re.findall(r"stage(\d)_level(\d)\.npz\n\s+log:", result.stdout)
        planned = {
            line.split()[1]
            for line in result.stdout.splitlines()
            if line.strip().startswith("rule ")
        }
        # every node computes features with the changed sigmas; images, tiles and QC do not
        assert sorted(trained) == [("1", "0"), ("1", "1"), ("2", "0"), ("2", "1")]
        assert {
            "train_node:",
            "predict_tiles:",
            "predict_shard:",
            "stitch:",
            "objects:",
            "morphometry:",
            "statistics:",
            "audit:",
        } <= planned
        assert not planned & {
            "demo_dataset:",
            "ingest:",
            "pyramid:",
            "section_qc:",
            "sample_tiles:",
            "split_tiles:",
        }
    finally:
        config.write_text(original)


def test_changed_object_filter_reruns_only_the_objects(finished_study, repo=REPO_ROOT):
    config = finished_study / "config" / "config.yaml"
    original = config.read_text()
    try:
        changed = tiny_config()
        changed["targets"]["nuclei"]["objects"] = {"min_volume_um3": 0.01}
        config.write_text(yaml.safe_dump(changed))
        result = snakemake(
            "-n", "--quiet", "rules", "--snakefile", str(repo / "Snakefile"), cwd=finished_study
        )
        planned = {line.split()[0] for line in result.stdout.splitlines() if line[:1].isalpha()}
        assert planned >= {
            "objects",
            "morphometry",
            "statistics",
            "meshes",
            "methods",
            "audit",
            "all",
        }
        assert not planned & {"stitch", "predict_shard", "shard_plan", "train_node", "pyramid"}
    finally:
        config.write_text(original)


def test_a_new_variant_runs_only_its_own_jobs(finished_study, repo=REPO_ROOT):
    config = finished_study / "config" / "config.yaml"
    original = config.read_text()
    try:
        changed = tiny_config()
        changed["targets"]["nuclei"]["variants"] = {"single": {"cascade": {"stages": 1}}}
        config.write_text(yaml.safe_dump(changed))
        result = snakemake("-n", "--snakefile", str(repo / "Snakefile"), cwd=finished_study)
        outputs = re.findall(r"^\s+output: (\S+)", result.stdout, flags=re.M)
        # the variant's own jobs, and the study manifest that lists every result
        others = [o for o in outputs if "nuclei.single" not in o]
        assert outputs and others == ["results/study/audit/manifest.tsv,"], others
        assert any(
            o.endswith("results/study/nuclei.single/evaluation/summary.tsv") or "evaluation" in o
            for o in outputs
        )
    finally:
        config.write_text(original)


def _workflow_copy(repo, folder):
    """A copy of the workflow's code (mtimes kept, so Snakemake sees its scripts unchanged)."""
    parts = (
        "Snakefile",
        "rules",
        "scripts",
        "tessera",
        "tessera_demo",
        "config/schemas",
        "envs",
        "report",
    )
    for part in parts:
        source = repo / part
        if not source.exists():
            continue
        (folder / part).parent.mkdir(parents=True, exist_ok=True)
        if source.is_dir():
            shutil.copytree(source, folder / part, ignore=shutil.ignore_patterns("__pycache__"))
        else:
            shutil.copy2(source, folder / part)
    return folder


def _rule_graph(snakefile, study):
    """Rules of the study's plan and, for each, the rules that consume its outputs."""
    dot = snakemake("--rulegraph", "-F", "--snakefile", str(snakefile), cwd=study).stdout
    names = dict(re.findall(r"^\s*(\d+)\[label = \"(\w+)\"", dot, flags=re.M))
    consumers = {name: set() for name in names.values()}
    for source, sink in re.findall(r"^\s*(\d+) -> (\d+)", dot, flags=re.M):
        consumers[names[source]].add(names[sink])
    return consumers


def _planned_rules(snakefile, study):
    result = snakemake("-n", "--quiet", "rules", "--snakefile", str(snakefile), cwd=study)
    rows = (line.split() for line in result.stdout.splitlines())
    return {row[0] for row in rows if len(row) == 2 and row[1].isdigit() and row[0] != "total"}


def test_editing_any_module_reruns_exactly_the_rules_that_run_it(finished_study, tmp_path, repo):
    # Snakemake's code trigger sees only rule scripts, so each rule's `code` param must carry the
    # modules its script runs. For every module of the package: one comment line added in a copy
    # of the workflow must plan the rules whose script imports the module (from the source,
    # tessera.workflow.code_identity) and what consumes their outputs (Snakemake's own rule
    # graph) - nothing more, nothing less.
    from tessera.workflow.code_identity import rerun_table

    copies = [_workflow_copy(repo, tmp_path / f"workflow{i}") for i in range(2)]
    assert not _planned_rules(copies[0] / "Snakefile", finished_study)
    consumers = _rule_graph(copies[0] / "Snakefile", finished_study)
    table = rerun_table(repo / "scripts")

    def expected(module):
        todo, seen = [r for r in table[module] if r in consumers], set()
        while todo:
            rule = todo.pop()
            if rule not in seen:
                seen.add(rule)
                todo.extend(consumers[rule])
        return seen

    def check(copy, modules):
        wrong = {}
        for module in modules:
            path = copy / Path(*module.split("."))
            path = path / "__init__.py" if path.is_dir() else path.with_suffix(".py")
            original = path.read_bytes()
            path.write_bytes(original + b"\n# edited\n")
            try:
                planned = _planned_rules(copy / "Snakefile", finished_study)
            finally:
                path.write_bytes(original)
            if planned != expected(module):
                wrong[module] = (sorted(planned), sorted(expected(module)))
        return wrong

    modules = sorted(table)
    with ThreadPoolExecutor(max_workers=2) as pool:
        results = list(pool.map(check, copies, [modules[0::2], modules[1::2]]))
    wrong = {k: v for part in results for k, v in part.items()}
    assert not wrong, f"module: (planned, expected) {wrong}"
    # the methods text is written by one rule: editing it reruns that rule and the audit only
    assert expected("tessera.methods") <= {"methods", "audit", "all"}


def test_developers_guide_carries_the_generated_rerun_table(repo):
    from tessera.workflow.code_identity import rerun_markdown

    guide = (repo / "DEVELOPERS.md").read_text()
    start, end = "<!-- rerun table: start -->\n", "<!-- rerun table: end -->"
    assert start in guide and end in guide
    shown = guide[guide.index(start) + len(start) : guide.index(end)]
    assert shown == rerun_markdown(repo / "scripts"), (
        "regenerate it: .venv/bin/python -m tessera.workflow.code_identity"
    )


def test_every_rule_runs_the_script_named_after_it(repo):
    # rules/<stage>.smk <-> scripts/<rule>.py: the rerun table and each code param rely on it
    rules_text = "\n".join(p.read_text() for p in sorted((repo / "rules").glob("*.smk")))
    pairs = re.findall(
        r"^\s*(?:rule|checkpoint) (\w+):(?:(?!^\s*(?:rule|checkpoint) ).)*?\"\.\./scripts/(\w+)\.py\"",
        rules_text,
        flags=re.M | re.S,
    )
    assert pairs and all(rule == script for rule, script in pairs), pairs
    codes = re.findall(
        r"^\s*(?:rule|checkpoint) (\w+):(?:(?!^\s*(?:rule|checkpoint) ).)*?code=script_code\(\"(\w+)\"\)",
        rules_text,
        flags=re.M | re.S,
    )
    assert sorted(codes) == sorted(pairs)
    assert {p.stem for p in (repo / "scripts").glob("*.py")} == {rule for rule, _ in pairs}


def test_a_new_sheet_row_runs_its_own_jobs_and_the_study_aggregates(finished_study, repo=REPO_ROOT):
    sheet = finished_study / "config" / "datasets.tsv"
    original = sheet.read_text()
    try:
        sheet.write_text(original + "c2\tcold\tc2\tdemo/data/c2/raw.tif\ttiff_stack\t40\t8\t8\t\n")
        result = snakemake("-n", "--snakefile", str(repo / "Snakefile"), cwd=finished_study)
        outputs = re.findall(r"^\s+output: (\S+)", result.stdout, flags=re.M)
        per_dataset = [
            o for o in outputs if o.startswith("results/") and not o.startswith("results/study/")
        ]
        assert per_dataset and all(o.startswith("results/c2/") for o in per_dataset), per_dataset
        assert any(o.startswith("demo/data/c2") for o in outputs)
        # no training (c2 is not among the annotated datasets), but the study summaries rerun
        assert "results/study/nuclei/statistics/comparison.tsv" in result.stdout
        assert not any("/cascade/" in o or "/tiles" in o for o in outputs)
        assert not any(o.startswith(("results/w1/", "results/c1/")) for o in outputs)
    finally:
        sheet.write_text(original)


def test_bad_sheet_stops_before_anything_runs(tmp_path, repo):
    (tmp_path / "config").mkdir()
    (tmp_path / "config" / "config.yaml").write_text(yaml.safe_dump(tiny_config()))
    lines = TINY_SHEET.splitlines()
    (tmp_path / "config" / "datasets.tsv").write_text("\n".join([*lines, lines[1]]) + "\n")
    result = snakemake(
        "--cores", "1", "--snakefile", str(repo / "Snakefile"), cwd=tmp_path, check=False
    )
    assert result.returncode != 0
    assert "config/datasets.tsv: dataset ids must be unique; repeated: w1" in result.stderr
    assert sorted(p.name for p in tmp_path.iterdir() if p.name != ".snakemake") == ["config"]


def test_an_instance_volume_for_one_dataset_only_is_the_only_one_planned(tmp_path, repo):
    # w1 has an instance volume, c1 none: the plan must not ask for c1's (no rule makes it)
    config = tiny_config()
    config["targets"]["nuclei"]["annotations"]["instances"] = "truth/{dataset}_ids.tif"
    (tmp_path / "config").mkdir()
    (tmp_path / "truth").mkdir()
    (tmp_path / "truth" / "w1_ids.tif").write_bytes(b"")
    (tmp_path / "config" / "config.yaml").write_text(yaml.safe_dump(config))
    (tmp_path / "config" / "datasets.tsv").write_text(TINY_SHEET)
    target = "results/study/nuclei/evaluation/objects_3d.tsv"
    result = snakemake(
        "-n", "--cores", "1", "--snakefile", str(repo / "Snakefile"), target, cwd=tmp_path
    )
    planned = result.stdout + result.stderr
    assert "truth/w1_ids.tif" in planned
    assert "c1_ids.tif" not in planned


def _tiny_study_with(tmp_path, config, earlier):
    """`config` and the tiny sheet in `tmp_path`, and `earlier`: relative path → bytes of the
    results a run before left (invented); returns the folder's files."""
    (tmp_path / "config").mkdir()
    (tmp_path / "config" / "config.yaml").write_text(yaml.safe_dump(config))
    (tmp_path / "config" / "datasets.tsv").write_text(TINY_SHEET)
    for path, data in earlier.items():
        (tmp_path / path).parent.mkdir(parents=True, exist_ok=True)
        (tmp_path / path).write_bytes(data)
    return _files_below(tmp_path)


def _files_below(folder):
    return {
        p.relative_to(folder): p.read_bytes()
        for p in folder.rglob("*")
        if p.is_file() and ".snakemake" not in p.parts
    }


def test_a_prediction_block_below_the_halo_stops_before_the_earlier_plan_is_cleared(
    tmp_path, repo=REPO_ROOT
):
    config = tiny_config()
    config["predict"] = {"block": [4, 16, 16]}
    plan = "results/w1/predicted/nuclei/plan.json"
    before = _tiny_study_with(tmp_path, config, {plan: b'{"made": "by a run before"}'})
    result = snakemake(
        "--cores", "1", "--snakefile", str(repo / "Snakefile"), plan, cwd=tmp_path, check=False
    )
    assert result.returncode != 0
    told = result.stderr
    assert "invalid input: config/config.yaml: predict.block [4, 16, 16] is smaller in y" in told
    assert "; the halo of target nuclei, from its cascade settings and output_smoothing_px" in told
    assert _files_below(tmp_path) == before


def test_stage_code_version_follows_the_import_graph():
    from tessera.workflow.code_identity import module_closure

    # pyramid reads images through omezarr and writes through atomic; it must not depend on qc,
    # so editing the section QC modules does not rerun the pyramid of a large stack.
    closure = module_closure("tessera.workflow.jobs.pyramid")
    assert {"tessera.io.omezarr", "tessera.io.atomic", "tessera.errors"} <= closure
    assert "tessera.section_qc.metrics" not in closure
    assert "tessera.workflow.jobs.section_qc" not in closure
    assert "tessera.workflow.jobs.ingest" not in closure
    assert "tessera.io.omezarr" in module_closure("tessera.workflow.jobs.section_qc")


def test_painted_route_exports_waits_for_masks_then_registers_them(tmp_path, repo, file_digests):
    import tifffile
    from PIL import Image

    from tessera.tiles.sampling import labels_to_target_mask
    from tessera.workflow.files.tile_registry import read_annotation_set

    config = tiny_config()
    # Tiles with no nucleus are useful background examples: declare them allowed.
    painted = {"points": "config/points.tsv", "masks": "painted/nuclei", "allow_single_class": True}
    config["targets"]["nuclei"]["annotations"] = {"painted": painted}
    (tmp_path / "config").mkdir()
    (tmp_path / "config" / "config.yaml").write_text(yaml.safe_dump(config))
    (tmp_path / "config" / "datasets.tsv").write_text(TINY_SHEET)
    points = ["dataset\ttarget\tz\ty\tx"]
    points += [f"{d}\tnuclei\t{z}\t96\t96" for d in ("w1", "c1") for z in (0, 2, 6, 10)]
    (tmp_path / "config" / "points.tsv").write_text("\n".join(points) + "\n")
    run = ["--cores", "2", "--snakefile", str(repo / "Snakefile")]
    snakemake(*run, "results/w1/to_paint/nuclei", "results/c1/to_paint/nuclei", cwd=tmp_path)
    exported = pd.read_csv(tmp_path / "results/w1/to_paint/nuclei/tiles.tsv", sep="\t")
    assert (
        len(exported) == 4
        and (
            tmp_path / "results/w1/to_paint/nuclei" / f"{exported.tile_id[0]}.preview.png"
        ).exists()
    )

    result = snakemake(*run, "results/study/nuclei/tiles", cwd=tmp_path, check=False)
    assert result.returncode != 0
    assert "no painted masks yet" in result.stderr + result.stdout

    # Paint: every tile's mask from the demo truth, as 0/255 PNGs.
    masks = tmp_path / "painted" / "nuclei"
    masks.mkdir(parents=True)
    for dataset in ("w1", "c1"):
        truth = tifffile.imread(tmp_path / f"demo/data/{dataset}/truth/nuclei.tif")
        table = pd.read_csv(tmp_path / f"results/{dataset}/to_paint/nuclei/tiles.tsv", sep="\t")
        for row in table.itertuples():
            crop = truth[
                row.z, 2 * row.y0 : 2 * (row.y0 + row.height), 2 * row.x0 : 2 * (row.x0 + row.width)
            ]
            mask = labels_to_target_mask(crop[np.newaxis], factors=(1, 2, 2))[0]
            Image.fromarray((mask * 255).astype(np.uint8)).save(masks / f"{row.tile_id}.png")
    snakemake(*run, "results/study/nuclei/tiles", cwd=tmp_path)
    registry, labels = read_annotation_set(tmp_path / "results/study/nuclei/tiles")
    assert len(registry) == 8 and set(registry["source"]) == {"painted"}
    assert set(registry["role"]) <= {"train", "validation", "test", "guard"}
    assert all(set(np.unique(v)) <= {0, 1} for v in labels.values())

    # A mask painted again in place (the folder's own time does not change) is imported again.
    tile_id = pd.read_csv(tmp_path / "results/w1/to_paint/nuclei/tiles.tsv", sep="\t").tile_id[0]
    repainted = np.asarray(Image.open(masks / f"{tile_id}.png")) == 0
    Image.fromarray(repainted.astype(np.uint8) * 255).save(masks / f"{tile_id}.png")
    snakemake(*run, "results/study/nuclei/tiles", cwd=tmp_path)
    _, labels = read_annotation_set(tmp_path / "results/study/nuclei/tiles")
    assert np.array_equal(labels[tile_id], repainted.astype(np.uint8))

    # A mask saved wrongly later (another size) stops at rule check_masks, before any import,
    # so the tiles imported earlier stay as they were (Snakemake clears a job's outputs when
    # the job starts).
    imported = [tmp_path / f"results/{d}/tiles_painted/nuclei" for d in ("w1", "c1")]
    before = [file_digests(folder) for folder in imported]
    Image.fromarray(np.zeros((8, 8), np.uint8)).save(masks / f"{tile_id}.png")
    result = snakemake(*run, "results/study/nuclei/tiles", cwd=tmp_path, check=False)
    assert result.returncode != 0
    assert "expected a mask of shape" in result.stderr + result.stdout
    assert [file_digests(folder) for folder in imported] == before


def _one_stack_study(tmp_path):
    """The config and sheet of a one-dataset study (d1, `stacks/d1.tif`), with a blank label
    volume, in `tmp_path` (its folders config, stacks and labels made by the caller)."""
    import tifffile

    tifffile.imwrite(tmp_path / "labels" / "d1.tif", np.zeros((6, 64, 64), np.uint8))
    config = tiny_config()
    config["targets"]["nuclei"]["annotations"]["labels"] = "labels/{dataset}.tif"
    config["targets"]["nuclei"]["annotated_datasets"] = ["d1"]
    (tmp_path / "config" / "config.yaml").write_text(yaml.safe_dump(config))
    (tmp_path / "config" / "datasets.tsv").write_text(
        TINY_SHEET.splitlines()[0] + "\nd1\twarm\td1\tstacks/d1.tif\ttiff_stack\t40\t8\t8\t\n"
    )


@pytest.mark.parametrize("damage", ["cut short", "compressed page"])
def test_a_damaged_replacement_of_a_stack_leaves_the_earlier_image(
    tmp_path, damage, damage_tiff_page, repo=REPO_ROOT
):
    # Snakemake removes a job's outputs when the job starts (its documented rerun behaviour).
    # The stack is checked by a job of its own before ingest, so a stack replaced by a damaged
    # file is refused there, in one line naming it, and the dataset's earlier image stays.
    # A deflate page with one changed byte is laid out like a sound one: only decoding it
    # finds the damage, which the check does because an earlier image exists.
    import tifffile

    rng = np.random.default_rng(4)
    (tmp_path / "config").mkdir()
    (tmp_path / "stacks").mkdir()
    (tmp_path / "labels").mkdir()
    stack = tmp_path / "stacks" / "d1.tif"
    compression = "zlib" if damage == "compressed page" else None
    tifffile.imwrite(
        stack,
        rng.integers(0, 256, (6, 64, 64), dtype=np.uint8),
        photometric="minisblack",
        compression=compression,
    )
    _one_stack_study(tmp_path)
    image = "results/d1/ingest/raw.ome.zarr"
    args = ("--cores", "1", "--snakefile", str(repo / "Snakefile"), image)
    snakemake(*args, cwd=tmp_path)
    written = {
        p.relative_to(tmp_path): p.read_bytes()
        for p in sorted((tmp_path / image).rglob("*"))
        if p.is_file()
    }
    assert written
    if damage == "cut short":
        stack.write_bytes(stack.read_bytes()[: stack.stat().st_size // 2])
        expected = "truncated or damaged"
    else:
        damage_tiff_page(stack, 3)
        expected = "cannot read page 3: "
    result = snakemake(*args, cwd=tmp_path, check=False)
    assert result.returncode != 0
    told = result.stderr + result.stdout
    assert "stacks/d1.tif: " in told and expected in told
    kept = {
        p.relative_to(tmp_path): p.read_bytes()
        for p in sorted((tmp_path / image).rglob("*"))
        if p.is_file()
    }
    assert kept == written


def test_a_damaged_region_mask_leaves_the_earlier_morphometry(finished_study, repo=REPO_ROOT):
    # Snakemake removes a job's outputs when the job starts; the region mask is checked by a
    # job of its own (check_roi) before morphometry, so a mask cut short after a run is refused
    # there, in one line naming it, and the morphometry tables of the run before stay.
    mask = finished_study / "demo/data/w1/cells.tif"
    tables = sorted((finished_study / "results/w1/morphometry").glob("*.tsv"))
    assert tables and (finished_study / "results/w1/roi_check/regions.json").exists()
    before = {p: p.read_bytes() for p in tables}
    sound, times = mask.read_bytes(), (mask.stat().st_atime_ns, mask.stat().st_mtime_ns)
    try:
        mask.write_bytes(sound[: len(sound) // 2])
        result = snakemake(
            "--cores",
            "1",
            "--snakefile",
            str(repo / "Snakefile"),
            *(str(p.relative_to(finished_study)) for p in tables),
            cwd=finished_study,
            check=False,
        )
        assert result.returncode != 0
        told = result.stderr + result.stdout
        assert "demo/data/w1/cells.tif: " in told and "rule check_roi" in told
        assert {p: p.read_bytes() for p in tables} == before
    finally:
        mask.write_bytes(sound)
        os.utime(mask, ns=times)


def test_a_stack_replaced_by_an_older_file_reruns_its_dataset(tmp_path, repo=REPO_ROOT):
    # Snakemake reruns a job when an input is newer than its outputs; `cp -p` and `rsync -a`
    # keep the replacement's own, older time (coreutils cp manual; Python's shutil.copy2 does
    # the same). check_stack takes the stack's stat identity as a param, and Snakemake reruns a
    # job whose params changed: the dataset's check, image and checksums follow.
    import tifffile

    rng = np.random.default_rng(7)
    (tmp_path / "config").mkdir()
    (tmp_path / "stacks").mkdir()
    (tmp_path / "labels").mkdir()
    stack, corrected = tmp_path / "stacks" / "d1.tif", tmp_path / "corrected.tif"
    for path in (corrected, stack):  # the corrected file is made first: it is the older
        tifffile.imwrite(
            path, rng.integers(0, 256, (6, 64, 64), dtype=np.uint8), photometric="minisblack"
        )
    old = stack.stat().st_mtime_ns - 3600 * 10**9
    os.utime(corrected, ns=(old, old))
    _one_stack_study(tmp_path)
    image, sums = "results/d1/ingest/raw.ome.zarr", "results/d1/audit/inputs.sha256"
    args = ("--cores", "1", "--snakefile", str(repo / "Snakefile"), image, sums)
    sums = tmp_path / sums
    snakemake(*args, cwd=tmp_path)
    first = sums.read_text()
    assert hashlib.sha256(stack.read_bytes()).hexdigest() in first  # hashlib: the reference
    unchanged = snakemake("-n", *args, cwd=tmp_path)
    assert "Nothing to be done" in unchanged.stdout + unchanged.stderr
    chunks = [p for p in sorted((tmp_path / image).rglob("*")) if p.is_file()]
    before = {p: p.read_bytes() for p in chunks}
    assert len(before) > 3
    shutil.copy2(corrected, stack)  # same size, same inode, an older time
    assert stack.stat().st_mtime_ns == old
    planned = snakemake("-n", "--quiet", "rules", *args, cwd=tmp_path).stdout
    assert {"check_stack", "ingest", "checksum_inputs"} <= {
        line.split()[0] for line in planned.splitlines() if line[:1].isalpha()
    }
    snakemake(*args, cwd=tmp_path)
    assert (
        sums.read_text() == f"{hashlib.sha256(corrected.read_bytes()).hexdigest()}  stacks/d1.tif\n"
    )
    after = {p: p.read_bytes() for p in chunks}
    assert after != before  # the image is the corrected stack's
    again = snakemake("-n", *args, cwd=tmp_path)
    assert "Nothing to be done" in again.stdout + again.stderr


def test_files_a_slice_folder_reader_ignores_rerun_nothing(tmp_path, repo=REPO_ROOT):
    # A folder's own time changes when any file is added beside the sections (POSIX: adding a
    # directory entry updates the directory's modification time), e.g. the .DS_Store macOS
    # leaves; the sections are read from the TIFF and PNG files only, so such a file reruns
    # nothing, while a section edited in place (the folder's time unchanged) reruns the dataset.
    import tifffile

    rng = np.random.default_rng(8)
    (tmp_path / "config").mkdir()
    (tmp_path / "labels").mkdir()
    folder = tmp_path / "stacks" / "d1"
    folder.mkdir(parents=True)
    for z in range(6):
        section = rng.integers(0, 256, (64, 64), dtype=np.uint8)
        tifffile.imwrite(folder / f"s{z:02d}.tif", section, photometric="minisblack")
    _one_stack_study(tmp_path)
    sheet = tmp_path / "config" / "datasets.tsv"
    sheet.write_text(
        sheet.read_text().replace("stacks/d1.tif\ttiff_stack", "stacks/d1\tslice_folder")
    )
    image, sums = "results/d1/ingest/raw.ome.zarr", "results/d1/audit/inputs.sha256"
    args = ("--cores", "1", "--snakefile", str(repo / "Snakefile"), image, sums)
    snakemake(*args, cwd=tmp_path)
    (folder / ".DS_Store").write_bytes(b"\0" * 10)
    (folder / "notes.txt").write_text("imaged on the second day\n")
    unchanged = snakemake("-n", *args, cwd=tmp_path)
    assert "Nothing to be done" in unchanged.stdout + unchanged.stderr
    folder_time = folder.stat().st_mtime_ns
    time.sleep(0.01)
    tifffile.imwrite(folder / "s03.tif", np.zeros((64, 64), np.uint8), photometric="minisblack")
    assert folder.stat().st_mtime_ns == folder_time  # edited in place: the folder's time stays
    planned = snakemake("-n", "--quiet", "rules", *args, cwd=tmp_path).stdout
    assert {"check_stack", "ingest", "checksum_inputs"} <= {
        line.split()[0] for line in planned.splitlines() if line[:1].isalpha()
    }


def test_a_copy_of_a_stack_as_another_animal_stops_before_the_statistics(
    finished_study, repo=REPO_ROOT
):
    # Snakemake removes a job's outputs when the job starts; the stacks' SHA-256 are compared
    # by a job of its own (check_distinct_stacks) before statistics, so a sheet listing a copy
    # of a stack as another animal is refused in one line and the earlier statistics stay.
    sheet = finished_study / "config" / "datasets.tsv"
    original = sheet.read_text()
    copy = finished_study / "copies" / "c2.tif"
    copy.parent.mkdir()
    shutil.copyfile(finished_study / "demo/data/c1/raw.tif", copy)
    tables = sorted((finished_study / "results/study/nuclei/statistics").glob("*"))
    before = {p: p.read_bytes() for p in tables}
    try:
        sheet.write_text(original + "c2\tcold\tc2\tcopies/c2.tif\ttiff_stack\t40\t8\t8\t\n")
        result = snakemake(
            "--cores", "1", "--snakefile", str(repo / "Snakefile"), cwd=finished_study, check=False
        )
        assert result.returncode != 0
        told = result.stderr + result.stdout
        assert (
            "config/datasets.tsv: column path: datasets c1 ('demo/data/c1/raw.tif') and c2 " in told
        )
        assert "one animal would count twice (as 'c1' and 'c2')" in told
        assert {p: p.read_bytes() for p in tables} == before
    finally:
        sheet.write_text(original)
        shutil.rmtree(copy.parent)
        shutil.rmtree(finished_study / "results" / "c2", ignore_errors=True)
