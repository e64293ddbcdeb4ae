# Validation of config and sheet (before any rule runs) and the input functions rules share.
import sys

sys.path.insert(
    0, workflow.basedir
)  # the package, when it is not pip-installed (conda deploys)

from snakemake.exceptions import WorkflowError

from tessera.config import load_config, load_datasets, sheet_spacing
from tessera.errors import TesseraInputError
from tessera.provenance import code_version

DEMO_DIR = (
    "demo/data"  # where the demo rule writes; sheet paths below it need not exist yet
)

try:
    config = load_config(
        config, f"{workflow.basedir}/config/schemas/config.schema.yaml"
    )
    DATASETS = load_datasets(
        config["datasets"],
        f"{workflow.basedir}/config/schemas/datasets.schema.yaml",
        generated_dir=DEMO_DIR if "demo" in config else None,
    )
except TesseraInputError as error:
    raise WorkflowError(f"invalid input: {error}") from None


def stage_code(stage):
    """Version + source hash of tessera.<stage> and what it imports; every rule passes it as a
    param, so editing a module reruns exactly the jobs that depend on it."""
    return code_version(f"tessera.{stage}", "tessera.jobs")


wildcard_constraints:
    dataset="|".join(DATASETS.index),


def dataset_path(wildcards):
    return DATASETS.loc[wildcards.dataset, "path"]


def dataset_format(wildcards):
    return DATASETS.loc[wildcards.dataset, "format"]


def dataset_condition(wildcards):
    return DATASETS.loc[wildcards.dataset, "condition"]


def dataset_subject(wildcards):
    return DATASETS.loc[wildcards.dataset, "subject"]


def dataset_spacing(wildcards):
    return list(sheet_spacing(DATASETS.loc[wildcards.dataset]))


def demo_volume_scale(wildcards):
    return config["demo"]["mito_volume_scale"].get(dataset_condition(wildcards), 1.0)


def scaled_by_attempt(base):
    """A resource that grows with each retry (`--retries`), e.g. memory after an OOM kill."""

    def resource(wildcards, attempt):
        return base * attempt

    return resource
