"""Shared plumbing of the benchmark scripts: tables on stdout, the same figures as JSON."""

import functools
import json
import os
import subprocess
import sys
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


def run_measured(code, *args):
    """Run Python `code` in a fresh interpreter; return (wall seconds, peak RSS in MiB)."""
    start = time.perf_counter()
    proc = subprocess.Popen([sys.executable, "-c", code, *map(str, args)])
    _, status, usage = os.wait4(proc.pid, 0)
    seconds = time.perf_counter() - start
    if status != 0:
        raise SystemExit(f"benchmark child failed with status {status}")
    return seconds, usage.ru_maxrss / 1024.0  # Linux reports kilobytes


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
