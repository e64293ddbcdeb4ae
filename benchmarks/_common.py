"""Shared plumbing of the benchmark scripts: tables on stdout, the same figures as JSON."""

import json
import os
import subprocess
import sys
import time
from pathlib import Path

OUT = Path(__file__).resolve().parent / "out"


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
