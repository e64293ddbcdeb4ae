# Validation of config and sheet (before any rule runs) and the input functions rules share.
import functools
import re
import sys
from pathlib import Path

# Import the package from the workflow folder when it is not pip-installed (conda deploys).
sys.path.insert(0, workflow.basedir)

from snakemake.exceptions import WorkflowError

from tessera.cascade.api import ancestors, node_settings, nodes, spec_from_settings
from tessera.ladder import ladder_rungs, split_cascade_settings
from tessera.workflow.config import (
    check_annotated_datasets,
    check_reference_condition,
    check_test_datasets,
    expand_variants,
    load_config,
    load_datasets,
    sheet_spacing,
    unusual_voxel_sizes,
)
from tessera.errors import TesseraInputError
from tessera.workflow.config_paths import (
    check_annotation_files,
    check_config_paths,
    instance_volumes,
)
from tessera.workflow.load_time_checks import (
    check_prediction_block,
    check_tiles_fit_checked_stacks,
)
from tessera.workflow.code_identity import script_code as code_version_of_script
from tessera.workflow.files.ladder import chosen_rung
from tessera.workflow.files.points import check_points_in_annotated, read_points
from tessera.workflow.files.to_paint import mask_files
from tessera.io.stacks import slice_folder_files
from tessera.workflow.input_identity import input_identity

# Where the demo rule writes; sheet paths below it need not exist yet.
DEMO_DIR = "demo/data"

try:
    config = load_config(
        config,
        f"{workflow.basedir}/config/schemas/config.schema.yaml",
        source=CONFIG_FILE,
    )
    # variants become targets of their own, checked like any other
    VARIANT_BASE = expand_variants(config)
    config = load_config(
        config,
        f"{workflow.basedir}/config/schemas/config.schema.yaml",
        source=CONFIG_FILE,
    )
    DATASETS = load_datasets(
        config["datasets"],
        f"{workflow.basedir}/config/schemas/datasets.schema.yaml",
        generated_dir=DEMO_DIR if "demo" in config else None,
        data_roots=config["data_roots"],
    )
    # label volumes, points sheets and painted masks are held to the same roots
    check_config_paths(config, DATASETS.index)
    check_annotation_files(
        config, DATASETS.index, generated_dir=DEMO_DIR if "demo" in config else None
    )
    check_reference_condition(
        config["statistics"]["reference_condition"], list(DATASETS["condition"])
    )
    check_annotated_datasets(config["targets"], DATASETS.index)
    check_test_datasets(config["targets"], DATASETS.index)
    # before rule sample_tiles could clear a dataset's earlier tiles
    check_tiles_fit_checked_stacks(
        config["targets"],
        DATASETS.index,
        source=CONFIG_FILE,
        stacks={
            d: (row["path"], row["format"], row.get("internal_path"))
            for d, row in DATASETS.iterrows()
        },
    )
except TesseraInputError as error:
    raise WorkflowError(f"invalid input: {error}") from None

# a voxel size far from the rest of the study: named, not refused (a study may mix instruments)
for warning in unusual_voxel_sizes(DATASETS, sheet_path=config["datasets"]):
    print(f"tessera: warning: {warning}", file=sys.stderr)


def script_code(rule):
    """The `code` param of a rule: version + source hash of every tessera module its script
    (scripts/<rule>.py) imports, so editing a module reruns exactly the jobs that run it.
    """
    return code_version_of_script(f"{workflow.basedir}/scripts/{rule}.py")


wildcard_constraints:
    dataset="|".join(DATASETS.index),


def dataset_path(wildcards):
    return DATASETS.loc[wildcards.dataset, "path"]


def dataset_format(wildcards):
    return DATASETS.loc[wildcards.dataset, "format"]


def dataset_internal_path(wildcards):
    return DATASETS.loc[wildcards.dataset].get("internal_path")


def dataset_condition(wildcards):
    return DATASETS.loc[wildcards.dataset, "condition"]


def dataset_subject(wildcards):
    return DATASETS.loc[wildcards.dataset, "subject"]


def user_input_identity(path, files=None):
    """The stat identity of a user's file or folder (tessera.workflow.input_identity), a param
    of the jobs reading it first, so that one replaced by a file with an older time still
    reruns them. The demo's stacks are outputs of demo_dataset, which Snakemake follows itself.
    """
    demo = Path(DEMO_DIR).resolve()
    if "demo" in config and Path(path).resolve().is_relative_to(demo):
        return "made by rule demo_dataset"
    return input_identity(path, files=files)


def stack_identity(dataset):
    """The identity of a dataset's stack; of a slice folder, over the files its reader looks
    at (a .DS_Store or a note added beside the sections reruns nothing)."""
    path = DATASETS.loc[dataset, "path"]
    if DATASETS.loc[dataset, "format"] == "slice_folder" and Path(path).is_dir():
        return user_input_identity(path, files=slice_folder_files(path))
    return user_input_identity(path)


def dataset_stack_identity(wildcards):
    return stack_identity(wildcards.dataset)


def user_input(path):
    """A user's file or folder as a rule input. A folder's own time changes whenever a file is
    added or removed in it (and not when one is edited in place), so it is left out of
    Snakemake's time check: the folder's identity, a param of the rule, decides."""
    return ancient(path) if Path(path).is_dir() else path


def dataset_stack_input(wildcards):
    return user_input(dataset_path(wildcards))


def dataset_spacing(wildcards):
    return list(sheet_spacing(DATASETS.loc[wildcards.dataset]))


def demo_volume_scale(wildcards):
    return config["demo"]["mito_volume_scale"].get(dataset_condition(wildcards), 1.0)


def scaled_by_attempt(base):
    """A resource that grows with each retry (`--retries`), e.g. memory after an OOM kill."""

    def resource(wildcards, attempt):
        return base * attempt

    return resource


# Targets of the study proper (variants are trained and scored only).
BASE_TARGETS = [t for t in config["targets"] if VARIANT_BASE[t] == t]


wildcard_constraints:
    target="|".join(re.escape(t) for t in config["targets"]),
    stage=r"\d+",
    level=r"\d+",


def target_settings(wildcards):
    return config["targets"][wildcards.target]


def target_labels(wildcards):
    pattern = target_settings(wildcards)["annotations"]["labels"]
    return pattern.format(dataset=wildcards.dataset)


def instance_volumes_of(target, dataset_ids):
    """Dataset → instance volume, for the datasets that have one; the others are scored
    against the connected components of their labels (never a missing file as an input).
    """
    return instance_volumes(
        config["targets"][target]["annotations"].get("instances"),
        dataset_ids,
        generated_dir=DEMO_DIR if "demo" in config else None,
    )


def target_instances(wildcards):
    return list(instance_volumes_of(wildcards.target, [wildcards.dataset]).values())


def target_labels_identity(wildcards):
    """The stat identities of a dataset's label volume and instance volume (if any): a param of
    check_labels, so that one replaced by an older file reruns the tiles and scores."""
    return [
        user_input_identity(p)
        for p in [target_labels(wildcards), *target_instances(wildcards)]
    ]


def target_annotated_sections(wildcards):
    """Which sections of the target's label volumes count as annotated: all (the default) or
    labelled (those holding a target voxel)."""
    return target_settings(wildcards)["annotations"].get("sections", "all")


def target_labels_check(wildcards):
    """The label check a target's tiles rest on: one per label file, made under the
    first target that reads it and shared by the others (variants read its file)."""
    pattern = target_settings(wildcards)["annotations"]["labels"]
    owner = next(
        name
        for name, settings in config["targets"].items()
        if settings["annotations"].get("labels") == pattern
    )
    return f"results/{wildcards.dataset}/labels_check/{owner}.json"


def _painted(target):
    return config["targets"][target]["annotations"].get("painted")


def _points_by_target():
    """Datasets with points per painted target, read (and validated) before anything runs, and
    the tile ids of the points marked to be trained on (``role: train``)."""
    out, train = {}, {}
    for target in config["targets"]:
        painted = _painted(target)
        if painted:
            base = VARIANT_BASE[target]
            try:
                points = read_points(
                    painted["points"],
                    datasets=DATASETS.index,
                    targets=config["targets"],
                )
                check_points_in_annotated(
                    points,
                    target=base,
                    annotated=config["targets"][target]["annotated_datasets"],
                )
            except TesseraInputError as error:
                raise WorkflowError(f"invalid input: {error}") from None
            mine = points[points["target"] == base]
            out[target] = sorted(set(mine["dataset"]))
            train[target] = sorted(mine.loc[mine["role"] == "train", "tile_id"])
    return out, train


POINTS, POINTS_TO_TRAIN = _points_by_target()


def points_to_train(wildcards):
    """Tile ids of a painted target's points marked ``role: train`` (none for label volumes)."""
    return POINTS_TO_TRAIN.get(wildcards.target, [])


def annotated_ids_of(target):
    """The datasets that give a target's tiles (and so its training and scoring images)."""
    if _painted(target):
        return POINTS[target]
    annotated = config["targets"][target]["annotated_datasets"]
    return [d for d in DATASETS.index if annotated is None or d in annotated]


def annotated_ids(wildcards):
    return annotated_ids_of(wildcards.target)


def annotated_pyramids(wildcards):
    return [f"results/{d}/pyramid/raw.ome.zarr" for d in annotated_ids(wildcards)]


# Targets annotated with label volumes: their stitched objects are scored in 3D.
LABELLED_TARGETS = [
    t for t in BASE_TARGETS if "labels" in config["targets"][t]["annotations"]
]
LABELLED_TARGETS_PATTERN = "|".join(re.escape(t) for t in LABELLED_TARGETS) or "(?!)"


def annotated_objects(wildcards):
    return [
        f"results/{d}/objects/{wildcards.target}.ome.zarr"
        for d in annotated_ids(wildcards)
    ]


def annotated_label_volumes(wildcards):
    pattern = target_settings(wildcards)["annotations"]["labels"]
    return [pattern.format(dataset=d) for d in annotated_ids(wildcards)]


def annotated_instances(wildcards):
    return list(
        instance_volumes_of(wildcards.target, annotated_ids(wildcards)).values()
    )


def annotated_instance_ids(wildcards):
    """The datasets whose instance volumes annotated_instances lists, in its order."""
    return list(instance_volumes_of(wildcards.target, annotated_ids(wildcards)))


def annotated_qc_tables(wildcards):
    return [f"results/{d}/qc/sections.tsv" for d in annotated_ids(wildcards)]


def target_guard_sections(wildcards):
    return target_settings(wildcards)["split"]["guard_sections"]


def annotation_sets(wildcards):
    target = wildcards.target
    if _painted(target):
        # a variant of a painted target reuses the base target's painted tiles
        base = VARIANT_BASE[target]
        return [f"results/{d}/tiles_painted/{base}" for d in POINTS[target]]
    return [f"results/{d}/tiles/{target}" for d in annotated_ids(wildcards)]


def target_points(wildcards):
    return _painted(wildcards.target)["points"]


def painted_masks_folder(wildcards):
    return _painted(wildcards.target)["masks"]


def _painted_mask_inputs(target, datasets):
    # Declared as input only once it exists, so that the check can explain what to paint. The
    # folder's own time changes only when a mask is added or removed; the masks of the
    # datasets' exported tiles are inputs too, so that one painted again reruns the check.
    folder = Path(_painted(target)["masks"])
    if not folder.is_dir():
        return []
    masks = [
        mask
        for dataset in datasets
        for tile in sorted(Path(f"results/{dataset}/to_paint/{target}").glob("*.tif"))
        for mask in mask_files(folder, tile.stem)
    ]
    return [str(folder)] + [str(mask) for mask in masks]


def painted_masks(wildcards):
    """The masks folder and the masks of one dataset's exported tiles (import_tiles)."""
    return _painted_mask_inputs(wildcards.target, [wildcards.dataset])


def target_painted_masks(wildcards):
    """The masks folder and the masks of every dataset's exported tiles (check_masks)."""
    return _painted_mask_inputs(wildcards.target, annotated_ids(wildcards))


def painted_exports(wildcards):
    """Every dataset's exported tiles of a painted target, in annotated_ids order."""
    return [
        f"results/{d}/to_paint/{wildcards.target}" for d in annotated_ids(wildcards)
    ]


# Targets annotated by painting tiles: their masks are checked together before import.
PAINTED_TARGETS = [t for t in config["targets"] if _painted(t)]
PAINTED_TARGETS_PATTERN = "|".join(re.escape(t) for t in PAINTED_TARGETS) or "(?!)"


def painted_options(wildcards):
    painted = _painted(wildcards.target)
    return {k: painted[k] for k in ("ignore_value", "allow_single_class")}


def target_tile_size(wildcards):
    return target_settings(wildcards)["tiles"]["size"]


def target_downsample(wildcards):
    return target_settings(wildcards)["downsample"]


def target_tiles(wildcards):
    return target_settings(wildcards)["tiles"]


def target_split(wildcards):
    return target_settings(wildcards)["split"]


def _cascade_and_ladder(target):
    """(node settings incl. stages, ladder settings) of a target's cascade section."""
    return split_cascade_settings(config["targets"][target]["cascade"])


def _rungs(target):
    """The (stages, levels) rungs a target trains: the configured one, or its ladder."""
    cascade, ladder = _cascade_and_ladder(target)
    if ladder["mode"] == "fixed":
        return [(cascade["stages"], cascade["levels"])]
    return ladder_rungs(
        cascade["stages"],
        cascade["levels"],
        extra_stages=ladder["ladder_extra_stages"],
        extra_levels=ladder["ladder_extra_levels"],
    )


try:  # the ladder's budget against the cascade's limits, before anything runs
    for _target in config["targets"]:
        _rungs(_target)
except TesseraInputError as error:
    raise WorkflowError(
        f"invalid input: config/config.yaml: key targets.{_target}.cascade: {error}"
    ) from None


try:
    # before rule shard_plan could clear a dataset's earlier plan; here, where the
    # ladder's rungs are known
    check_prediction_block(
        config["predict"]["block"],
        {t: config["targets"][t] for t in BASE_TARGETS},
        {t: _rungs(t) for t in BASE_TARGETS},
        source=CONFIG_FILE,
    )
except TesseraInputError as error:
    raise WorkflowError(f"invalid input: {error}") from None


# Targets of the study proper whose cascade size a ladder chooses.
LADDER_BASE_TARGETS = [
    t for t in BASE_TARGETS if _cascade_and_ladder(t)[1]["mode"] == "ladder"
]


wildcard_constraints:
    nodeset=r"cascade(/levels\d+)?",
    stages=r"\d+",
    levels=r"\d+",


def _nodeset_levels(target, nodeset):
    """Levels of the cascade whose nodes lie in folder `nodeset` (see _model_path)."""
    if nodeset == "cascade":
        return _cascade_and_ladder(target)[0]["levels"]
    return int(nodeset.removeprefix("cascade/levels"))


def node_cascade(wildcards):
    """Cascade settings a node depends on: all but the number of stages (and the ladder's
    keys), so that adding a stage leaves the earlier nodes' jobs untouched."""
    cascade = _cascade_and_ladder(wildcards.target)[0]
    levels = _nodeset_levels(wildcards.target, wildcards.nodeset)
    return node_settings({**cascade, "levels": levels})


@functools.lru_cache(maxsize=None)
def _target_spec(target, stages, levels):
    """The cascade's structure, for planning (``dims`` and ``neighbours`` ``auto`` and a 3D
    cascade's voxel_aspect, decided from the data by the job training a node, do not change
    which nodes exist).
    """
    cascade = {
        k: v
        for k, v in _cascade_and_ladder(target)[0].items()
        if v is not None and v != "auto"
    }
    return spec_from_settings({**cascade, "levels": levels}, stages=stages)


def _model_path(target, node, levels):
    """A node's model file. Nodes of the configured number of levels lie in cascade/; those of
    a ladder rung with more levels in cascade/levels<L>/ (they are other models: tessera.ladder).
    """
    folder = "cascade"
    if levels != _cascade_and_ladder(target)[0]["levels"]:
        folder = f"cascade/levels{levels}"
    return f"results/study/{target}/{folder}/stage{node[0]}_level{node[1]}.npz"


def upstream_models(wildcards):
    stage, level = int(wildcards.stage), int(wildcards.level)
    levels = _nodeset_levels(wildcards.target, wildcards.nodeset)
    spec = _target_spec(wildcards.target, stage, levels)
    return [
        _model_path(wildcards.target, n, levels)
        for n in ancestors(spec, (stage, level))[:-1]
    ]


def rung_models(wildcards):
    """The node files of one rung of the ladder (wildcards stages, levels)."""
    stages, levels = int(wildcards.stages), int(wildcards.levels)
    spec = _target_spec(wildcards.target, stages, levels)
    return [_model_path(wildcards.target, n, levels) for n in nodes(spec)]


def rung_scores(wildcards):
    return [
        f"results/study/{wildcards.target}/ladder/rung_{s}x{lv}.tsv"
        for s, lv in _rungs(wildcards.target)
    ]


def cascade_models(wildcards):
    """The node files the predictions use: the configured cascade's, or in ladder mode the
    chosen rung's (read from the choice table once checkpoint choose_rung has written it).
    """
    target = wildcards.target
    stages, levels = _rungs(target)[0]
    if _cascade_and_ladder(target)[1]["mode"] == "ladder":
        choice = checkpoints.choose_rung.get(target=target).output.choice
        try:
            stages, levels = chosen_rung(choice)
        except TesseraInputError as error:
            raise WorkflowError(f"invalid input: {error}") from None
    spec = _target_spec(target, stages, levels)
    return [_model_path(target, n, levels) for n in nodes(spec)]


wildcard_constraints:
    job=r"\d+",


def shard_outputs(wildcards):
    return expand(
        "results/{dataset}/predicted/{target}/shards/job{job}",
        dataset=wildcards.dataset,
        target=wildcards.target,
        job=range(config["predict"]["shard_jobs"]),
    )


def target_objects(wildcards):
    return target_settings(wildcards)["objects"]


def dataset_roi(wildcards):
    roi = DATASETS.loc[wildcards.dataset, "roi_mask"]
    return [] if roi is None else [roi]


def dataset_roi_identity(wildcards):
    return [user_input_identity(p) for p in dataset_roi(wildcards)]


def dataset_roi_check(wildcards):
    return (
        [f"results/{wildcards.dataset}/roi_check/regions.json"]
        if dataset_roi(wildcards)
        else []
    )


def dataset_groups(wildcards):
    """Condition and animal of every dataset, in sheet order (the first condition is the
    default reference)."""
    return {
        d: {"condition": row["condition"], "subject": row["subject"]}
        for d, row in DATASETS.iterrows()
    }


def dataset_stacks(wildcards):
    """Stack path, array inside it and animal of every dataset, in sheet order."""
    return {
        d: {
            "path": row["path"],
            "internal_path": row.get("internal_path"),
            "subject": row["subject"],
        }
        for d, row in DATASETS.iterrows()
    }


def dataset_inputs_of(dataset):
    """The files a dataset's results rest on: the stack and the optional ROI mask."""
    row = DATASETS.loc[dataset]
    return [p for p in (row["path"], row["roi_mask"]) if p]


def dataset_inputs(wildcards):
    return [user_input(p) for p in dataset_inputs_of(wildcards.dataset)]


def dataset_inputs_identity(wildcards):
    row = DATASETS.loc[wildcards.dataset]
    mask = [user_input_identity(row["roi_mask"])] if row["roi_mask"] else []
    return [stack_identity(wildcards.dataset), *mask]


def study_factors(wildcards):
    """Evaluation summaries of a target at every factor of its downsampling study."""
    target = config["targets"][wildcards.target]
    names = [
        wildcards.target if f == target["downsample"] else f"{wildcards.target}.x{f}"
        for f in target["downsampling_study"]["factors"]
    ]
    return [f"results/study/{n}/evaluation/summary.tsv" for n in names]


STUDY_TARGETS = [t for t in BASE_TARGETS if config["targets"][t]["downsampling_study"]]


def target_without_variants(target):
    """A target's own settings, without its variants (so adding one reruns nothing else)."""
    return {
        k: v
        for k, v in config["targets"][target].items()
        if k not in ("variants", "downsampling_study")
    }


def target_output_sigma(wildcards):
    return target_settings(wildcards)["output_smoothing_px"]


def target_output_sigma_z(wildcards):
    return target_settings(wildcards)["output_smoothing_sections"]


def target_objects_3d(wildcards):
    """The target's 3D object scores when it has label volumes: its statistics quote them."""
    if wildcards.target in LABELLED_TARGETS:
        return {
            "objects_3d": f"results/study/{wildcards.target}/evaluation/objects_3d.tsv"
        }
    return {}


def study_results():
    """Every final result of the study (what `rule all` asks for, besides the audit itself)."""
    return [
        *expand("results/{dataset}/qc/sections.tsv", dataset=DATASETS.index),
        *expand("results/{dataset}/pyramid/raw.ome.zarr", dataset=DATASETS.index),
        *expand(
            "results/study/{target}/evaluation/summary.tsv", target=config["targets"]
        ),
        *expand("results/study/{target}/downsampling/curve.tsv", target=STUDY_TARGETS),
        *expand(
            "results/study/{target}/evaluation/objects_3d.tsv", target=LABELLED_TARGETS
        ),
        *expand(
            "results/study/{target}/statistics/comparison.tsv", target=BASE_TARGETS
        ),
        "results/study/methods.md",
        *expand("results/study/{target}/next_tiles/points.tsv", target=BASE_TARGETS),
        *expand(
            "results/{dataset}/meshes/{target}.png",
            dataset=DATASETS.index,
            target=BASE_TARGETS,
        ),
        *expand(
            "results/{dataset}/morphometry/{target}_objects.tsv",
            dataset=DATASETS.index,
            target=BASE_TARGETS,
        ),
        *expand(
            "results/{dataset}/objects/{target}.ome.zarr",
            dataset=DATASETS.index,
            target=BASE_TARGETS,
        ),
    ]
