"""The workflow on a real SLURM scheduler: the tiny study submitted job by job through
profiles/slurm-test gives byte for byte the results of a local run.

Needs a running cluster: `.ci/slurm-cluster start DIR`, then TESSERA_SLURM_DIR=DIR. Without it the
test is skipped; with TESSERA_SLURM_REQUIRED=1 (as in CI) a missing cluster fails it instead.
"""

import os
import subprocess
import sys
from pathlib import Path

import pytest

from tessera.workflow.provenance import is_run_specific

pytestmark = [pytest.mark.slurm, pytest.mark.workflow]

REPO = Path(__file__).resolve().parents[1]
BIN = Path(sys.executable).parent


@pytest.fixture(scope="module")
def slurm_env():
    """The environment for talking to the test cluster, or a skip when there is none."""
    cluster = os.environ.get("TESSERA_SLURM_DIR")
    required = os.environ.get("TESSERA_SLURM_REQUIRED") == "1"
    give_up = pytest.fail if required else pytest.skip
    if not cluster:
        give_up(
            "TESSERA_SLURM_DIR is not set (start a test cluster with `.ci/slurm-cluster start DIR`)"
        )
    status = subprocess.run(
        [str(REPO / ".ci" / "slurm-cluster"), "status", cluster],
        capture_output=True,
        text=True,
        timeout=60,
    )
    if status.returncode != 0:
        give_up(f"no SLURM test cluster running in {cluster}: {status.stderr.strip()}")
    return {**os.environ, "SLURM_CONF": str(Path(cluster) / "slurm.conf")}


def snakemake(*args, cwd, env=None):
    result = subprocess.run(
        [str(BIN / "snakemake"), *args],
        cwd=cwd,
        env=env,
        capture_output=True,
        text=True,
        timeout=2400,
    )
    if result.returncode != 0:
        raise AssertionError(
            f"snakemake {' '.join(args)} failed:\n{result.stdout}\n{result.stderr}"
        )
    return result


def test_slurm_run_matches_local_run(slurm_env, tmp_path, new_tiny_study, file_digests):
    local = new_tiny_study(tmp_path / "local")
    snakemake("--cores", "2", "--snakefile", str(REPO / "Snakefile"), cwd=local)

    cluster = new_tiny_study(tmp_path / "cluster")
    snakemake(
        "--profile",
        str(REPO / "profiles" / "slurm-test"),
        "--snakefile",
        str(REPO / "Snakefile"),
        cwd=cluster,
        env=slurm_env,
    )

    # The jobs really went through SLURM, and the prediction shards were bundled into fewer SLURM jobs.
    slurm_logs = cluster / ".snakemake" / "slurm_logs"
    assert any((slurm_logs / "rule_pyramid").glob("*/*.log")), sorted(
        p.name for p in slurm_logs.iterdir()
    )
    shard_jobs = len(list((cluster / "results").glob("*/predicted/*/shards/job*")))
    bundles = list((slurm_logs / "group_predict_shards_predict_shard").glob("*.log"))
    assert 1 <= len(bundles) < shard_jobs

    expected, got = file_digests(local / "results"), file_digests(cluster / "results")
    assert len(expected) > 100
    assert got.keys() == expected.keys()
    # Provenance records and the RO-Crate say when, where and with which resources jobs ran: the
    # only results meant to differ.
    differing = [
        name for name in expected if got[name] != expected[name] and not is_run_specific(name)
    ]
    assert not differing, (
        f"{len(differing)} of {len(expected)} result files differ, e.g. {differing[:10]}"
    )
