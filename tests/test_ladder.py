"""The cascade ladder: which rungs and nodes it trains, how it picks a rung, that test tiles play
no part in the pick, and that the workflow plans it (and still plans the demo without it)."""

import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import tifffile
import yaml
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import ndimage
from sklearn.metrics import f1_score

from tessera.cascade.api import CascadeSpec, ancestors, node_inputs, node_settings
from tessera.errors import TesseraInputError
from tessera.ladder import (
    EXTRA_LIMITS,
    LADDER_DEFAULTS,
    MODES,
    TIE_TOLERANCE,
    choose_rung,
    ladder_nodes,
    ladder_rungs,
    rung_nodes,
    split_cascade_settings,
)
from tessera.train import pooled_pixels
from tessera.workflow.files.ladder import chosen_rung
from tessera.workflow.files.node_model import load_cascade
from tessera.workflow.files.pyramid import level_arrays
from tessera.workflow.files.tile_registry import read_annotation_set, write_annotation_set
from tessera.workflow.jobs.ingest import ingest_job
from tessera.workflow.jobs.ladder import choose_rung_job, score_rung_job
from tessera.workflow.jobs.methods import methods_job
from tessera.workflow.jobs.pyramid import pyramid_job
from tessera.workflow.jobs.train import predict_tiles_job, tile_probabilities, train_node_job

REPO = Path(__file__).resolve().parents[1]
SNAKEMAKE = Path(sys.executable).parent / "snakemake"
SCHEMA = REPO / "config" / "schemas" / "config.schema.yaml"

# --- rungs and nodes -------------------------------------------------------------------------


def test_rung_sizes_follow_the_cascade_definition():
    # A cascaded hierarchical model of S stages and L levels has L + 1 classifiers per stage
    # (L bottom-up levels and the top-down full-resolution one; Seyedhosseini, Sajjadi & Tasdizen,
    # ICCV 2013): S (L + 1) nodes. Counted by hand: 2x2 -> 6, 3x2 -> 9, 2x3 -> 8.
    assert ladder_rungs(2, 2) == [(2, 2), (3, 2), (2, 3)]
    assert [len(rung_nodes(*r)) for r in ladder_rungs(2, 2)] == [6, 9, 8]
    # 3x2 holds all six nodes of 2x2; 2x3 shares none (other `levels`): 6 + 3 + 8 distinct
    assert set(rung_nodes(2, 2)) <= set(rung_nodes(3, 2))
    assert not set(rung_nodes(2, 2)) & set(rung_nodes(2, 3))
    assert len(ladder_nodes(ladder_rungs(2, 2))) == 17


def test_one_more_level_changes_the_inputs_of_every_node_but_the_bottom_up_ones_of_stage_1():
    # Which nodes of S x L+1 read the same maps as in S x L, from node_inputs itself (this is why
    # only those could ever be shared); and even they record the number of levels they were
    # trained with, so their models are other models.
    small, large = CascadeSpec(stages=2, levels=2), CascadeSpec(stages=2, levels=3)

    def same_graph(node):
        # same inputs, each of them the same all the way up
        inputs = node_inputs(small, *node)
        return inputs == node_inputs(large, *node) and all(same_graph(i) for i in inputs)

    same = [n for n in rung_nodes(2, 2) if same_graph(n[1:])]
    assert [n[1:] for n in same] == [(1, 1), (1, 2)]
    assert node_settings(small)["levels"] != node_settings(large)["levels"]
    # one more stage leaves every earlier node's inputs and settings as they were
    deeper = CascadeSpec(stages=3, levels=2)
    assert all(node_inputs(small, *n[1:]) == node_inputs(deeper, *n[1:]) for n in rung_nodes(2, 2))
    assert node_settings(small) == node_settings(deeper)


def test_ladder_budget_is_checked_naming_the_key():
    with pytest.raises(TesseraInputError, match="ladder_extra_levels = 2 goes beyond 5 levels"):
        ladder_rungs(2, 4, extra_stages=1, extra_levels=2)
    with pytest.raises(
        TesseraInputError, match=r"ladder_extra_stages must be an integer >= 0 and <= 3, got 4"
    ):
        ladder_rungs(2, 2, extra_stages=4)
    assert ladder_rungs(2, 2, extra_stages=0, extra_levels=0) == [(2, 2)]


def test_config_schema_states_the_ladder_keys_the_code_owns():
    # the configuration is validated before any job runs; a value the schema lets through must
    # be one the ladder accepts, and the other way round
    cascade = yaml.safe_load(SCHEMA.read_text(encoding="utf-8"))["properties"]["targets"][
        "additionalProperties"
    ]["properties"]["cascade"]["properties"]
    assert cascade["mode"]["enum"] == list(MODES)
    for key, default in LADDER_DEFAULTS.items():
        assert cascade[key]["default"] == default, key
    for key, (low, high) in EXTRA_LIMITS.items():
        assert (cascade[key]["minimum"], cascade[key]["maximum"]) == (low, high), key
    node, ladder = split_cascade_settings({"stages": 2, "mode": "ladder"})
    CascadeSpec.from_dict(node)  # the ladder's keys never reach a node's settings
    assert ladder["mode"] == "ladder"


# --- the pick --------------------------------------------------------------------------------


def reference_pick(rows, tolerance):
    """The rule as documented, by brute force: among rungs within `tolerance` of the best F1,
    the fewest nodes S (L + 1), then the fewest stages."""
    best = max(f1 for _, _, f1 in rows)
    ties = [(s * (lv + 1), s, lv) for s, lv, f1 in rows if f1 >= best - tolerance]
    _, s, lv = min(ties)
    return s, lv


@settings(max_examples=60, deadline=None)
@given(
    st.lists(
        st.tuples(st.integers(1, 4), st.integers(0, 3), st.sampled_from([0.5, 0.7, 0.70005, 0.9])),
        min_size=1,
        max_size=6,
        unique_by=lambda r: r[:2],
    )
)
def test_pick_is_the_best_validation_f1_with_ties_to_the_smaller_model(rows):
    table = choose_rung(pd.DataFrame(rows, columns=["stages", "levels", "f1"]))
    assert table["chosen"].sum() == 1
    picked = table[table["chosen"]].iloc[0]
    assert (picked["stages"], picked["levels"]) == reference_pick(rows, TIE_TOLERANCE)
    assert table["nodes"].tolist() == sorted(table["nodes"])


def test_a_clearly_better_larger_rung_wins_and_a_tie_goes_to_the_smaller():
    # by hand: 2x2 has 6 nodes, 3x2 9, 2x3 8
    better = pd.DataFrame({"stages": [2, 3, 2], "levels": [2, 2, 3], "f1": [0.80, 0.85, 0.82]})
    assert choose_rung(better).query("chosen")["rung"].item() == "3x2"
    tie = pd.DataFrame({"stages": [2, 3], "levels": [2, 2], "f1": [0.85, 0.85 + TIE_TOLERANCE / 2]})
    assert choose_rung(tie).query("chosen")["rung"].item() == "2x2"


def test_choice_table_must_name_one_rung(tmp_path):
    path = tmp_path / "choice.tsv"
    path.write_text("rung\tstages\tlevels\tchosen\n2x2\t2\t2\tTrue\n3x2\t3\t2\tTrue\n")
    with pytest.raises(
        TesseraInputError, match="column chosen: expected exactly one rung marked True, found 2"
    ) as err:
        chosen_rung(path)
    assert "rerun rule choose_rung" in str(err.value)


# --- a small study: train the ladder, score its rungs, corrupt the test tiles ---------------

TILE = 32
SETTINGS = {
    "sigmas": [1.0, 2.0],
    "coarse_sigmas": [1.0],
    "stencil_radii": [1, 2],
    "classifier": "mlp",
    "classifier_options": {"hidden_layer_sizes": [8], "max_iter": 15},
    "samples_per_tile": 300,
    "folds": 2,
    "seed": 5,
}
ROLE_OF_Z = {
    **{z: "train" for z in range(6)},
    7: "validation",
    8: "validation",
    10: "test",
    11: "test",
}


def blob_volume(shape=(12, 64, 64), seed=0):
    """Dark round 'organelles' on a textured background; labels = the blobs."""
    rng = np.random.default_rng(seed)
    zz, yy, xx = np.mgrid[: shape[0], : shape[1], : shape[2]]
    truth = np.zeros(shape, bool)
    for _ in range(40):
        cz, cy, cx = rng.uniform(0, shape[0]), rng.uniform(0, shape[1]), rng.uniform(0, shape[2])
        r = rng.uniform(4, 8)
        truth |= ((zz - cz) * 3) ** 2 + (yy - cy) ** 2 + (xx - cx) ** 2 < r**2
    texture = ndimage.gaussian_filter(rng.normal(size=shape), (0, 2, 2)) * 60
    image = 150 + texture - 60 * truth + rng.normal(0, 20, shape)
    return np.clip(image, 0, 255).astype(np.uint8), truth.astype(np.uint8)


def node_file(root, node):
    levels, stage, level = node
    return root / "cascade" / f"L{levels}" / f"stage{stage}_level{level}.npz"


@pytest.fixture(scope="module")
def ladder_study(tmp_path_factory):
    root = tmp_path_factory.mktemp("ladder")
    volume, truth = blob_volume()
    tifffile.imwrite(root / "v.tif", volume)
    ingest_job(
        root / "v.tif",
        root / "raw.ome.zarr",
        fmt="tiff_stack",
        spacing=(40, 8, 8),
        chunks=(1, 32, 32),
    )
    pyramid_job(root / "raw.ome.zarr", root / "pyr.ome.zarr", levels=1)
    rows, labels = [], {}
    for z, role in ROLE_OF_Z.items():
        for y0 in (0, TILE):
            for x0 in (0, TILE):
                tid = f"d_z{z}_{y0}_{x0}"
                rows.append(
                    {
                        "tile_id": tid,
                        "dataset": "d",
                        "target": "blob",
                        "level": 0,
                        "z": z,
                        "y0": y0,
                        "x0": x0,
                        "height": TILE,
                        "width": TILE,
                        "source": "labels",
                        "role": role,
                    }
                )
                labels[tid] = truth[z, y0 : y0 + TILE, x0 : x0 + TILE]
    write_annotation_set(root / "tiles", pd.DataFrame(rows), labels)
    rungs = ladder_rungs(1, 1, extra_stages=1, extra_levels=1)
    trained = []
    for node in ladder_nodes(rungs):  # training order of first use: ancestors come first
        levels, stage, level = node
        upstream = [node_file(root, (levels, *a)) for a in _ancestors(stage, level, levels)]
        train_node_job(
            root / "tiles",
            {"d": root / "pyr.ome.zarr"},
            upstream,
            node_file(root, node),
            target="blob",
            downsample=1,
            cascade={**SETTINGS, "levels": levels},
            stage=stage,
            level=level,
        )
        trained.append(node)
    return {"root": root, "rungs": rungs, "trained": trained}


def _ancestors(stage, level, levels):
    return ancestors(CascadeSpec(stages=stage, levels=levels), (stage, level))[:-1]


def score_ladder(root, tiles, pyramid, out):
    out.mkdir(exist_ok=True)
    paths = []
    for stages, levels in ladder_rungs(1, 1, extra_stages=1, extra_levels=1):
        path = out / f"rung_{stages}x{levels}.tsv"
        models = [node_file(root, n) for n in rung_nodes(stages, levels)]
        score_rung_job(
            tiles,
            {"d": pyramid},
            models,
            path,
            target="blob",
            downsample=1,
            stages=stages,
            levels=levels,
        )
        paths.append(path)
    choose_rung_job(paths, out / "choice.tsv", out / "curve.png", target="blob")
    return pd.read_csv(out / "choice.tsv", sep="\t")


def test_ladder_trains_each_node_once_and_larger_rungs_reuse_them(ladder_study):
    root, trained = ladder_study["root"], ladder_study["trained"]
    # 1x1: 2 nodes; 2x1: those 2 + 2; 1x2: 3 of its own (hand count, S (L + 1) per rung)
    assert len(trained) == len(set(trained)) == 2 + 2 + 3
    files = sorted(p.relative_to(root).as_posix() for p in (root / "cascade").rglob("*.npz"))
    assert len(files) == 7
    for stages, levels in ladder_study["rungs"]:
        models = load_cascade(
            [node_file(root, n) for n in rung_nodes(stages, levels)], target="blob"
        )
        assert {m.spec.levels for m in models.values()} == {levels}
        assert max(s for s, _ in models) == stages


def test_rung_scores_are_validation_f1_and_the_best_is_chosen(ladder_study, tmp_path):
    root = ladder_study["root"]
    table = score_ladder(root, root / "tiles", root / "pyr.ome.zarr", tmp_path)
    assert table["chosen"].sum() == 1
    rows = list(zip(table["stages"], table["levels"], table["f1"], strict=True))
    assert tuple(table.loc[table["chosen"], ["stages", "levels"]].iloc[0]) == reference_pick(
        rows, TIE_TOLERANCE
    )
    assert chosen_rung(tmp_path / "choice.tsv") == reference_pick(rows, TIE_TOLERANCE)
    # each rung's F1 is scikit-learn's F1 of its validation pixels at its recorded threshold
    registry, labels = read_annotation_set(root / "tiles", roles=["validation"])
    arrays = level_arrays({"d": root / "pyr.ome.zarr"}, registry, downsample=1)
    for row in table.itertuples():
        models = load_cascade(
            [node_file(root, n) for n in rung_nodes(row.stages, row.levels)], target="blob"
        )
        prob, truth = pooled_pixels(
            registry["tile_id"], labels, tile_probabilities(models, arrays, registry)
        )
        assert row.f1 == pytest.approx(f1_score(truth, prob >= row.threshold), abs=1e-12)
        # ... and the threshold is the best of the hundredths 0.01 .. 0.99 on these pixels
        # (the project's one threshold rule, recomputed with scikit-learn's F1)
        best = max(f1_score(truth, prob >= t) for t in np.arange(1, 100) / 100)
        assert row.f1 == pytest.approx(best, abs=1e-12)
        assert row.tiles == 8 and row.pixels == truth.size


def test_test_tiles_play_no_part_in_the_choice(ladder_study, tmp_path):
    root = ladder_study["root"]
    before = score_ladder(root, root / "tiles", root / "pyr.ome.zarr", tmp_path / "before")
    # Corrupt every test tile: its label image becomes garbage bytes and the image chunks of
    # its sections are overwritten (the store's checksums refuse them the moment they are read).
    tiles, pyramid = tmp_path / "tiles", tmp_path / "pyr.ome.zarr"
    shutil.copytree(root / "tiles", tiles)
    shutil.copytree(root / "pyr.ome.zarr", pyramid)
    test_ids = [f"d_z{z}_{y}_{x}" for z in (10, 11) for y in (0, TILE) for x in (0, TILE)]
    for tid in test_ids:
        (tiles / "labels" / f"{tid}.png").write_bytes(b"not an image")
    chunks = [p for z in (10, 11) for p in (pyramid / "0" / "c" / str(z)).rglob("*") if p.is_file()]
    assert chunks
    for chunk in chunks:
        chunk.write_bytes(b"\0" * chunk.stat().st_size)
    after = score_ladder(root, tiles, pyramid, tmp_path / "after")
    pd.testing.assert_frame_equal(before, after)
    # positive control: the final scoring, which does read the test tiles, notices
    with pytest.raises(TesseraInputError):
        predict_tiles_job(
            tiles,
            {"d": pyramid},
            [node_file(root, n) for n in rung_nodes(1, 1)],
            tmp_path / "p.npz",
            tmp_path / "s.tsv",
            target="blob",
            downsample=1,
        )


# --- the workflow ----------------------------------------------------------------------------


def dry_run(workdir, *, ok=True):
    result = subprocess.run(
        [str(SNAKEMAKE), "-n", "--snakefile", str(REPO / "Snakefile")],
        cwd=workdir,
        capture_output=True,
        text=True,
        check=False,
    )
    if not ok:
        assert result.returncode != 0
        return result.stdout + result.stderr
    assert result.returncode == 0, result.stderr[-2000:]
    return result.stdout


def planned_jobs(stdout, rule):
    """Output files of each planned job of `rule` in a dry run's listing."""
    outputs, current = [], None
    for line in stdout.splitlines():
        text = line.strip()
        if text.startswith("rule ") or text.startswith("checkpoint "):
            current = text.split()[1].rstrip(":")
        elif text.startswith("output:") and current == rule:
            outputs.append(text.removeprefix("output:").strip())
    return outputs


def ladder_config(workdir, **cascade):
    """The demo config with one target, mitochondria, in ladder mode (and `cascade` settings)."""
    shutil.copytree(REPO / "config", workdir / "config")
    path = workdir / "config" / "config.yaml"
    config = yaml.safe_load(path.read_text())
    mito = config["targets"]["mitochondria"]
    mito["cascade"].update(mode="ladder", **cascade)
    mito.pop("downsampling_study")
    config["targets"] = {"mitochondria": mito}
    path.write_text(yaml.safe_dump(config))


def test_ladder_beyond_the_cascade_limits_is_refused_before_anything_runs(tmp_path):
    ladder_config(tmp_path, levels=5)
    output = dry_run(tmp_path, ok=False)
    assert (
        "invalid input: config/config.yaml: key targets.mitochondria.cascade: ladder_extra_levels = 1 "
        "goes beyond 5 levels (the cascade has 5); lower ladder_extra_levels to at most 0"
    ) in output
    assert "Traceback" not in output


def test_workflow_plans_each_shared_node_once_in_ladder_mode(tmp_path):
    ladder_config(tmp_path)
    stdout = dry_run(tmp_path)
    models = planned_jobs(stdout, "train_node")
    # 2x2 (6 nodes), 3x2 (its 6 + 3 new), 2x3 (8 of its own): 17 node jobs, each file once
    assert len(models) == len(set(models)) == 17
    assert sum("/cascade/levels3/" in m for m in models) == 8
    scored = planned_jobs(stdout, "score_rung")
    assert sorted(Path(s).name for s in scored) == ["rung_2x2.tsv", "rung_2x3.tsv", "rung_3x2.tsv"]
    assert planned_jobs(stdout, "choose_rung")


def test_demo_dry_run_still_plans_the_fixed_cascade(tmp_path):
    # the shipped demo keeps mode fixed: one node job per (stage, level) of each target, no ladder
    shutil.copytree(REPO / "config", tmp_path / "config")
    stdout = dry_run(tmp_path)
    config = yaml.safe_load((REPO / "config" / "config.yaml").read_text())
    per_target = {
        name: t["cascade"]["stages"] * (t["cascade"]["levels"] + 1)
        for name, t in config["targets"].items()
    }
    # a downsampling study adds one variant target per factor other than the target's own
    factors = {
        name: len(set(t["downsampling_study"]["factors"]) | {t["downsample"]})
        for name, t in config["targets"].items()
    }
    assert len(planned_jobs(stdout, "train_node")) == sum(
        per_target[t] * factors[t] for t in per_target
    )
    assert not planned_jobs(stdout, "score_rung") and not planned_jobs(stdout, "choose_rung")


@pytest.mark.parametrize(
    ("f1", "expected"),
    [([0.80, 0.85, 0.82], "3 stages × 2 levels"), ([0.80, 0.82, 0.85], "2 stages × 3 levels")],
)
def test_methods_text_states_the_chosen_rung_and_how_it_was_chosen(tmp_path, f1, expected):
    # a ladder target's methods paragraph names the cascade the predictions used, not the
    # configured one
    pd.DataFrame(
        {
            "role": ["validation", "test"],
            "tiles": [4, 5],
            "informative_tiles": [4, 5],
            "threshold": [0.4, 0.4],
        }
        | {k: [0.9, 0.8] for k in ("precision", "recall", "f1", "jaccard")}
    ).to_csv(tmp_path / "scores.tsv", sep="\t", index=False)
    (tmp_path / "objects.json").write_text(
        '{"high": 0.4, "low": 0.4, "open_radius_nm": 0, "close_radius_nm": 0, "fill_holes": false,'
        ' "min_volume_um3": 0, "max_volume_um3": null, "connectivity": 26}'
    )
    pd.DataFrame({"z": [0], "excluded": [False]}).to_csv(tmp_path / "qc.tsv", sep="\t", index=False)
    (tmp_path / "inputs.sha256").write_text("ab12  data/a.tif\n")
    choose_rung(pd.DataFrame({"stages": [2, 3, 2], "levels": [2, 2, 3], "f1": f1})).to_csv(
        tmp_path / "choice.tsv", sep="\t", index=False
    )
    cascade = {**CascadeSpec().to_dict(), "stages": 2, "levels": 2, "mode": "ladder"}
    target = {
        "downsample": 2,
        "cascade": cascade,
        "tiles": {"size": 96},
        "split": {"guard_sections": 2},
    }
    sections = {
        "ingest": {},
        "pyramid": {"levels": 3},
        "statistics": {"confidence": 0.95},
        "qc": {"sharpness_sigma": 1.5, "exclude_flagged": True},
        "targets": {"mito": target},
    }
    out = tmp_path / "methods.md"
    methods_job(
        sections,
        {"a": {"condition": "warm", "subject": "a"}},
        {"mito": tmp_path / "scores.tsv"},
        {"mito": [tmp_path / "objects.json"]},
        {},
        [tmp_path / "inputs.sha256"],
        [tmp_path / "qc.tsv"],
        out,
        ladder={"mito": tmp_path / "choice.tsv"},
    )
    text = out.read_text()
    assert f"{expected} (chosen among the configured size and larger ones" in text
    assert sections["targets"]["mito"]["cascade"]["stages"] == 2  # the caller's settings untouched
