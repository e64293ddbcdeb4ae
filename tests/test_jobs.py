"""Script glue: a job that runs out of memory ends with one line naming the rule, its mem_mb and
the profile key that gives it more."""

import os
import platform
import re
import subprocess
import sys
import textwrap
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest
from snakemake.cli import parse_set_resources
from snakemake.profiles import ProfileConfigFileParser

from tessera.workflow.runner import run_job

REPO = Path(__file__).resolve().parents[1]


def script_object(tmp_path, *, rule, mem_mb):
    """The parts of Snakemake's ``snakemake`` script object that run_job reads."""
    return SimpleNamespace(
        log=[str(tmp_path / "job.log")], rule=rule, resources=SimpleNamespace(mem_mb=mem_mb)
    )


def allocate_an_exbibyte():
    # numpy reports a failed allocation as MemoryError "Unable to allocate 1.00 EiB for an array ..."
    # (numpy's _ArrayMemoryError); no machine grants 2**60 bytes.
    return np.empty(2**60, dtype=np.uint8)


def test_out_of_memory_names_rule_mem_mb_and_profile_key(tmp_path, capsys):
    job = script_object(tmp_path, rule="objects", mem_mb=2000)
    with pytest.raises(SystemExit) as stopped:
        run_job(job, allocate_an_exbibyte)
    assert stopped.value.code == 1
    err = capsys.readouterr().err
    assert err.count("\n") == 1, err  # one line, no traceback
    assert err.startswith(
        "tessera: rule objects ran out of memory with mem_mb=2000 (Unable to allocate 1.00 EiB"
    )
    assert (
        "; give it more in the profile's config.yaml (set-resources: {objects: {mem_mb: 4000}}) "
        "or rerun with --retries 1"
    ) in err
    assert "rule objects ran out of memory" in (tmp_path / "job.log").read_text()


def test_the_suggested_profile_entry_is_what_snakemake_reads(tmp_path, capsys):
    # Reference: Snakemake's own profile parser and --set-resources parser.
    with pytest.raises(SystemExit):
        run_job(script_object(tmp_path, rule="predict_shard", mem_mb=4000), allocate_an_exbibyte)
    entry = re.search(r"\((set-resources: \{.*?\}\})\)", capsys.readouterr().err).group(1)
    profile = tmp_path / "config.yaml"
    profile.write_text(entry + "\n")
    with open(profile) as stream:
        parsed = ProfileConfigFileParser().parse(stream)
    resources = parse_set_resources(parsed["set-resources"])
    assert resources["predict_shard"]["mem_mb"] == 8000


def test_out_of_memory_with_only_a_log_path_still_says_what_to_raise(tmp_path, capsys):
    with pytest.raises(SystemExit):
        run_job(str(tmp_path / "job.log"), allocate_an_exbibyte)
    err = capsys.readouterr().err
    assert err.startswith("tessera: the job ran out of memory with its mem_mb (Unable to allocate")
    assert "set-resources: {<rule>: {mem_mb: <MB>}}" in err


def test_ctrl_c_in_a_job_is_one_line_and_exit_status_130(tmp_path, capsys):
    # Ctrl-C reaches a job as KeyboardInterrupt; shells report a job stopped by SIGINT as
    # 128 + 2 = 130 (common practice). The user sees one line, not a traceback.
    def interrupted():
        raise KeyboardInterrupt

    with pytest.raises(SystemExit) as stopped:
        run_job(script_object(tmp_path, rule="ingest", mem_mb=1000), interrupted)
    assert stopped.value.code == 130
    err = capsys.readouterr().err
    assert err == "tessera: interrupted (Ctrl-C); the next run redoes this job\n"
    assert "interrupted" in (tmp_path / "job.log").read_text()


def test_other_failures_keep_their_traceback(tmp_path):
    def broken():
        raise ZeroDivisionError("a bug, not a resource problem")

    with pytest.raises(ZeroDivisionError):
        run_job(script_object(tmp_path, rule="stitch", mem_mb=1000), broken)
    assert "Traceback" in (tmp_path / "job.log").read_text()


_UNDER_LIMIT = textwrap.dedent("""
    import resource, sys
    from types import SimpleNamespace
    import numpy as np
    from tessera.workflow.runner import run_job

    # address space now plus 256 MB: allocations beyond fail (setrlimit(2), RLIMIT_AS)
    with open("/proc/self/statm") as fh:
        size = int(fh.read().split()[0]) * resource.getpagesize()
    resource.setrlimit(resource.RLIMIT_AS, (size + 256 * 2**20, resource.RLIM_INFINITY))
    job = SimpleNamespace(log=[sys.argv[1]], rule="stitch", resources=SimpleNamespace(mem_mb=300))
    run_job(job, lambda: np.ones(2**30, dtype=np.uint8))  # 1 GiB
""")


@pytest.mark.skipif(not Path("/proc/self/statm").exists(), reason="needs Linux /proc")
def test_a_real_allocation_beyond_the_address_space_limit(tmp_path):
    # POSIX setrlimit(2): with RLIMIT_AS set, malloc/mmap beyond it fail with ENOMEM, which numpy
    # reports as MemoryError; the job must end with the one-line message, exit status 1.
    script = tmp_path / "job.py"
    script.write_text(_UNDER_LIMIT)
    env = {
        **os.environ,
        "OPENBLAS_NUM_THREADS": "1",
        "OMP_NUM_THREADS": "1",
        "PYTHONPATH": str(REPO),
    }
    result = subprocess.run(
        [sys.executable, str(script), str(tmp_path / "job.log")],
        capture_output=True,
        text=True,
        timeout=120,
        env=env,
    )
    assert result.returncode == 1, result.stderr
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1, result.stderr
    assert lines[0].startswith(
        "tessera: rule stitch ran out of memory with mem_mb=300 (Unable to allocate 1.00 GiB"
    )
    assert "set-resources: {stitch: {mem_mb: 600}}" in lines[0]


def test_jobs_keep_freed_memory_where_the_c_library_is_glibc():
    # mallopt(3) (glibc manual): M_MMAP_THRESHOLD up to 32 MiB on 64-bit systems and
    # M_TRIM_THRESHOLD are accepted (return 1) by glibc; elsewhere the call reports False.
    # Run in a child process: the setting lasts for the process.
    code = "from tessera.workflow.resources import keep_freed_memory; print(keep_freed_memory())"
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True
    ).stdout.strip()
    assert out == str(platform.libc_ver()[0] == "glibc")
