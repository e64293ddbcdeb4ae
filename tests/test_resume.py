"""Kill and resume: the tiny study, killed with SIGKILL at ten points across the pipeline and
resumed each time, ends with results byte for byte equal to an uninterrupted run.

SIGKILL cannot be caught (POSIX signal(7)): no cleanup code runs, exactly as when a node dies or
a scheduler kills a job. Sent to the process group (killpg(2)), it ends Snakemake and every job it
started at once. After each kill the study is unlocked and resumed with --rerun-incomplete, as
the local profile does; the ten kills are chained in one study, so the whole test costs about one
run plus ten restarts.

A kill point names a rule and what shows that one of its jobs is running, seen from outside:
``log`` - the job's log file was (re)opened in this attempt and has no "done in" line yet
(run_job opens the log as the job starts); ``write`` - an output's ``.partial-`` temporary exists,
so the kill lands in the middle of writing. A kill counts only if, once every process is gone,
a job of that rule is still unfinished (its log has no "done in" line); a point the run went past
before it was seen fails the test rather than counting.
"""

import json
import os
import signal
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import pytest

from tessera.workflow.provenance import is_run_specific

pytestmark = pytest.mark.workflow

REPO = Path(__file__).resolve().parents[1]
SNAKEMAKE = [str(Path(sys.executable).parent / "snakemake"), "--snakefile", str(REPO / "Snakefile")]
RUN = [*SNAKEMAKE, "--cores", "2", "--rerun-incomplete"]
# Provenance records, their index and the RO-Crate say when and on which host jobs ran.
WHEN_AND_WHERE = ("host", "started", "finished", "duration_s")


def comparable(record):
    """A provenance record without when and where the job ran, nor the checksums of the outputs
    that record those (the audit job writes the record index and the RO-Crate)."""
    kept = {k: v for k, v in record.items() if k not in WHEN_AND_WHERE}
    kept["outputs"] = [
        {**o, "sha256": None, "bytes": None}
        if o["path"].startswith("results/") and is_run_specific(o["path"][len("results/") :])
        else o
        for o in record["outputs"]
    ]
    return kept


FINISHED = " done in "  # run_job's last log line
MISSED_POINT_RETRIES = 2  # reruns of a rule whose job the watcher did not catch running


@dataclass(frozen=True)
class KillPoint:
    rule: str
    trigger: str  # "log" or "write"
    partial: str = ""  # glob of the rule's output temporaries (write points)


KILL_POINTS = [
    KillPoint("ingest", "write", "results/*/ingest/raw.ome.zarr.partial-*"),
    KillPoint("pyramid", "write", "results/*/pyramid/raw.ome.zarr.partial-*"),
    KillPoint("train_node", "log"),
    KillPoint("predict_tiles", "log"),
    KillPoint("predict_shard", "write", "results/*/predicted/*/shards/job*.partial-*"),
    KillPoint("stitch", "write", "results/*/predicted/*/probability.ome.zarr.partial-*"),
    KillPoint("objects", "write", "results/*/objects/*.ome.zarr.partial-*"),
    KillPoint("morphometry", "log"),
    KillPoint("statistics", "log"),
    KillPoint("audit", "log"),
]


def log_signatures(study, rule):
    """Identity of every log of `rule` now: a job (re)opening its log changes it."""
    out = {}
    for path in (study / "logs" / rule).glob("*.log"):
        try:
            st = path.stat()
        except FileNotFoundError:
            continue
        out[path] = (st.st_ino, st.st_mtime_ns, st.st_size)
    return out


def _finished(log):
    try:
        return FINISHED in log.read_text()
    except FileNotFoundError:
        return False


def unfinished_jobs(study, rule, before):
    """Logs of `rule` opened since `before` was taken that have no "done in" line yet."""
    now = log_signatures(study, rule)
    return sorted(p.name for p, sig in now.items() if before.get(p) != sig and not _finished(p))


def group_alive(pgid):
    """Whether any process of group `pgid` is still running (zombies aside), from /proc (proc(5))."""
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            fields = stat.read_text().rsplit(")", 1)[1].split()
        except (OSError, IndexError):
            continue
        if int(fields[2]) == pgid and fields[0] != "Z":
            return True
    return False


def kill_group(proc):
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait()
    deadline = time.monotonic() + 30
    while group_alive(proc.pid):
        assert time.monotonic() < deadline, "processes of the killed run are still alive"
        time.sleep(0.05)


def attempt(study, point, output, *, extra=()):
    """Run (or resume) the study; SIGKILL it when `point` fires. Returns what happened."""
    before = log_signatures(study, point.rule) if point else {}
    # temporaries a kill left behind earlier are not a write under way
    stale = set(study.glob(point.partial)) if point and point.partial else set()
    with open(output, "w") as out:
        proc = subprocess.Popen(
            [*RUN, *extra], cwd=study, stdout=out, stderr=subprocess.STDOUT, start_new_session=True
        )
    start = time.monotonic()
    try:
        while proc.poll() is None:
            assert time.monotonic() - start < 900, "a run of the tiny study took over 15 minutes"
            if point is None:
                time.sleep(0.1)
                continue
            if point.trigger == "write":
                seen = sorted(p.name for p in set(study.glob(point.partial)) - stale)
            else:
                seen = unfinished_jobs(study, point.rule, before)
            if seen:
                kill_group(proc)
                running = unfinished_jobs(study, point.rule, before)
                mid_write = (
                    sorted(p.name for p in set(study.glob(point.partial)) - stale)
                    if point.partial
                    else []
                )
                return {
                    "rule": point.rule,
                    "trigger": point.trigger,
                    "seen": seen,
                    "landed": bool(running),
                    "running": running,
                    "mid_write": mid_write,
                    "after_s": round(time.monotonic() - start, 2),
                    "returncode": None,
                }
            time.sleep(0.005)
    finally:
        if proc.poll() is None:
            kill_group(proc)
    return {
        "rule": point.rule if point else None,
        "trigger": point.trigger if point else None,
        "seen": [],
        "landed": False,
        "running": [],
        "mid_write": [],
        "after_s": round(time.monotonic() - start, 2),
        "returncode": proc.returncode,
    }


def summary(kills):
    lines = [
        f"{'rule':14} {'trigger':7} {'landed':6} {'after s':>7}  jobs unfinished at the kill / temporaries left"
    ]
    for k in kills:
        lines.append(
            f"{k['rule']:14} {k['trigger']:7} {'yes' if k['landed'] else 'NO':6} {k['after_s']:7.2f}  "
            f"{', '.join(k['running']) or '-'} / {', '.join(k['mid_write']) or '-'}"
        )
    return "\n".join(lines)


def reader_failures(text):
    """Signs that a job failed (a reader met a half-written input, or anything else)."""
    return [
        line
        for line in text.splitlines()
        if line.startswith(("Error in rule", "tessera:", "Traceback")) or "Exception" in line
    ]


@pytest.fixture(scope="module")
def reference(tmp_path_factory, new_tiny_study):
    study = new_tiny_study(tmp_path_factory.mktemp("reference"))
    started = time.monotonic()
    result = subprocess.run(RUN, cwd=study, capture_output=True, text=True, timeout=900)
    assert result.returncode == 0, result.stdout + result.stderr
    return study, time.monotonic() - started


@pytest.mark.skipif(
    not Path("/proc/self/stat").exists(), reason="follows the killed processes through Linux /proc"
)
def test_ten_kills_and_resumes_give_the_uninterrupted_results(
    reference, tmp_path, new_tiny_study, file_digests
):
    reference, reference_s = reference
    study = new_tiny_study(tmp_path / "killed")
    started = time.monotonic()
    kills, outputs = [], []
    for n, point in enumerate(KILL_POINTS):
        outputs.append(tmp_path / f"attempt{n}.txt")
        kill = attempt(study, point, outputs[-1])
        # A write window lasts milliseconds; on a loaded machine the watcher can miss it and the
        # run completes. Forcing the rule to run again brings the window round once more (and
        # reruns everything after it, which the final comparison covers as well).
        for retry in range(1, MISSED_POINT_RETRIES + 1):
            if kill["returncode"] != 0:
                break
            outputs.append(tmp_path / f"attempt{n}-retry{retry}.txt")
            kill = attempt(study, point, outputs[-1], extra=("--forcerun", point.rule))
        kills.append(kill)
        assert kill["returncode"] is None, (
            f"the run ended (exit {kill['returncode']}) before a job of rule {point.rule} was seen running; "
            f"kills so far:\n{summary(kills)}\n{outputs[-1].read_text()[-3000:]}"
        )
        unlock = subprocess.run(
            [*SNAKEMAKE, "--unlock"], cwd=study, capture_output=True, text=True, timeout=300
        )
        assert unlock.returncode == 0, unlock.stderr
    outputs.append(tmp_path / "final.txt")
    final = attempt(study, None, outputs[-1])
    elapsed = time.monotonic() - started
    report = summary(kills)
    print(
        f"\n{report}\n{sum(k['landed'] for k in kills)} of {len(kills)} kills landed inside a running job; "
        f"the uninterrupted run took {reference_s:.0f} s, the ten kills, unlocks and resumes {elapsed:.0f} s"
    )

    assert final["returncode"] == 0, outputs[-1].read_text()[-5000:]
    landed = [k["rule"] for k in kills if k["landed"]]
    assert landed == [p.rule for p in KILL_POINTS], (
        f"kills that did not land inside a running job:\n{report}"
    )
    failures = [(out.name, line) for out in outputs for line in reader_failures(out.read_text())]
    assert not failures, failures

    # ours end in .partial-<pid>, zarr's own chunk temporaries in .<uuid>.partial
    leftovers = [p for p in study.rglob("*.partial*") if ".snakemake" not in p.parts]
    assert not leftovers, leftovers
    expected, got = file_digests(reference / "results"), file_digests(study / "results")
    assert got.keys() == expected.keys(), sorted(set(got) ^ set(expected))
    differing = [
        name for name in expected if got[name] != expected[name] and not is_run_specific(name)
    ]
    assert not differing, (
        f"{len(differing)} of {len(expected)} result files differ, e.g. {differing[:10]}"
    )
    # the provenance records themselves differ only in when and where each job ran
    records = sorted(name for name in expected if name.startswith("provenance/"))
    assert records
    for name in records:
        a, b = (
            comparable(json.loads((root / "results" / name).read_text()))
            for root in (reference, study)
        )
        assert a == b, name
    dry = subprocess.run([*SNAKEMAKE, "-n"], cwd=study, capture_output=True, text=True, timeout=300)
    assert "Nothing to be done" in dry.stdout + dry.stderr
