"""Shared plumbing of the benchmark scripts: tables on stdout, the same figures as JSON."""

import functools
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import yaml

OUT = Path(__file__).resolve().parent / "out"
REPO = Path(__file__).resolve().parents[1]


def report(name, rows, figures):
    """Print `rows` (list of (label, value, unit)) as a table and write `figures` to out/<name>.json."""
    width = max(len(r[0]) for r in rows)
    print(f"{name}")
    for label, value, unit in rows:
        shown = f"{value:.3f}" if isinstance(value, float) else str(value)
        print(f"  {label:<{width}}  {shown:>12}  {unit}")
    OUT.mkdir(exist_ok=True)
    (OUT / f"{name}.json").write_text(json.dumps(figures, indent=2) + "\n")
    print(f"figures written to {OUT / (name + '.json')}")


# Put before a measured child's code: writes its own peak resident memory at exit. proc(5)'s VmHWM
# starts afresh at exec; getrusage's ru_maxrss does not (Linux carries the parent's high-water
# mark into a child it starts), so a child smaller than this process would read as its size.
PEAK_PREAMBLE = """
import atexit as _atexit
def _write_peak(path):
    with open("/proc/self/status") as status:
        kib = next(int(line.split()[1]) for line in status if line.startswith("VmHWM:"))
    with open(path, "w") as out:
        out.write(str(kib))
_atexit.register(_write_peak, __import__("os").environ["BENCHMARK_PEAK_FILE"])
"""


def peak_mib(path):
    """The peak written by :data:`PEAK_PREAMBLE`'s child to `path`, in MiB."""
    return int(Path(path).read_text()) / 1024.0


def run_measured(code, *args):
    """Run Python `code` in a fresh interpreter; return (wall seconds, its own peak RSS in MiB)."""
    with tempfile.TemporaryDirectory() as tmp:
        peak_file = Path(tmp) / "peak"
        start = time.perf_counter()
        proc = subprocess.Popen(
            [sys.executable, "-c", PEAK_PREAMBLE + code, *map(str, args)],
            env={**os.environ, "BENCHMARK_PEAK_FILE": str(peak_file)},
        )
        status = proc.wait()
        seconds = time.perf_counter() - start
        if status != 0:
            raise SystemExit(f"benchmark child failed with status {status}")
        return seconds, peak_mib(peak_file)


@functools.cache
def objects_default(key):
    """The objects step's default for `key` (``min_volume_um3``, ``split`` ...), read from the
    config schema."""
    schema = yaml.safe_load((REPO / "config" / "schemas" / "config.schema.yaml").read_text())
    found = []

    def walk(node):
        if isinstance(node, dict):
            properties = node.get("properties", {})
            if "min_volume_um3" in properties and key in properties:
                found.append(properties[key]["default"])
            for value in node.values():
                walk(value)

    walk(schema)
    return found[0]


def target_default(key):
    """A target's own default for `key` (``output_smoothing_px``, ``output_smoothing_sections``
    ...), read from the config schema."""
    schema = yaml.safe_load((REPO / "config" / "schemas" / "config.schema.yaml").read_text())
    targets = schema["properties"]["targets"]
    target = targets.get("additionalProperties") or next(
        iter(targets["patternProperties"].values())
    )
    return target["properties"][key]["default"]
