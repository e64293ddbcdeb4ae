"""The profile check: every shipped profile passes; each kind of bad profile is refused by name."""

import subprocess
import sys
from pathlib import Path

import pytest
import yaml

from tessera.errors import TesseraInputError
from tessera.workflow.profiles import check_profile, rule_resources

REPO = Path(__file__).resolve().parents[1]


@pytest.mark.parametrize("name", ["local", "slurm", "slurm-test"])
def test_shipped_profiles_pass(name):
    settings = check_profile(REPO / "profiles" / name)
    assert settings["rerun-incomplete"] is True


def write_profile(tmp_path, settings):
    folder = tmp_path / "profile"
    folder.mkdir()
    (folder / "config.yaml").write_text(
        yaml.safe_dump(settings) if isinstance(settings, dict) else settings
    )
    return folder


@pytest.mark.parametrize(
    "settings, expected",
    [
        (
            {"executor": "slurmx"},
            r"key executor: 'slurmx' is not installed \(installed: .*\); install the plugin "
            r"snakemake-executor-plugin-slurmx from PyPI",
        ),
        (
            {"executro": "slurm"},
            r"key executro: not an option of Snakemake or of an installed executor plugin",
        ),
        (
            {"set-resources": {"predict_shards": {"mem_mb": 8000}}},
            r"key set-resources.predict_shards: no such rule; rules are ",
        ),
        (
            {"set-resources": {"predict_shard": {"mem_mb": 500}}},
            r"key set-resources.predict_shard.mem_mb: 500 is below what rule predict_shard needs \(4000 MB, declared in rules/\)",
        ),
        (
            {"group-components": ["shards=8"]},
            r"key group-components: no rule group 'shards'; groups are predict_shards",
        ),
        ("executor: [unclosed", r"not valid YAML"),
        ("- a list", r"key \(top level\): expected a mapping"),
    ],
)
def test_bad_profiles_are_refused_by_file_and_key(tmp_path, settings, expected):
    folder = write_profile(tmp_path, settings)
    with pytest.raises(TesseraInputError, match=expected) as error:
        check_profile(folder)
    assert str(folder / "config.yaml") in str(error.value)


def test_more_memory_and_less_runtime_are_accepted(tmp_path):
    # runtime in rules/ is a generous limit, memory a need
    folder = write_profile(
        tmp_path, {"set-resources": {"predict_shard": {"mem_mb": 16000, "runtime": 5}}}
    )
    assert check_profile(folder)["set-resources"]["predict_shard"]["mem_mb"] == 16000


def test_rule_needs_are_read_from_the_rule_files():
    needs = rule_resources()
    # every rule Snakemake would run is found, with the memory its resources block declares
    text = (REPO / "rules" / "predict.smk").read_text()
    assert "mem_mb=scaled_by_attempt(4000)" in text and needs["predict_shard"]["mem_mb"] == 4000
    assert "predict_shards" in needs["_groups"]


def test_command_line_exit_status(tmp_path):
    bad = write_profile(tmp_path, {"executor": "nowhere"})
    done = subprocess.run(
        [
            sys.executable,
            "-m",
            "tessera.workflow.profiles",
            str(REPO / "profiles" / "local"),
            str(bad),
        ],
        capture_output=True,
        text=True,
        cwd=REPO,
    )
    assert done.returncode == 1
    assert (
        "profiles/local: ok" in done.stdout
        and "key executor: 'nowhere' is not installed" in done.stderr
    )
