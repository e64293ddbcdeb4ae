"""How long Snakemake takes to plan a large study: 20 datasets x 200 shard jobs each.

A temporary study with the demo config and a sheet of 20 datasets (all pointing at one small
stack, which is never read by a dry run) is planned with `snakemake -n`; the figures are the
planning wall time and the peak memory of the Snakemake process.

Run from the repository root: .venv/bin/python benchmarks/dag_scale.py
"""

import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import yaml

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import report  # noqa: E402

REPO = Path(__file__).resolve().parents[1]


def main(datasets=20, shards=200):
    with tempfile.TemporaryDirectory(prefix="tessera-dag-") as tmp:
        root = Path(tmp)
        (root / "config").mkdir()
        (root / "data").mkdir()
        (root / "data" / "stack.tif").write_bytes(b"")  # must exist; a dry run never opens it
        config = yaml.safe_load((REPO / "config" / "config.yaml").read_text())
        config.pop("demo")
        config["predict"]["shard_jobs"] = shards
        for target in config["targets"].values():
            target["downsampling_study"] = None
        (root / "config" / "config.yaml").write_text(yaml.safe_dump(config))
        rows = [
            "dataset\tcondition\tsubject\tpath\tformat\tvoxel_z_nm\tvoxel_y_nm\tvoxel_x_nm\troi_mask"
        ]
        rows += [
            f"d{i:02d}\t{'a' if i % 2 else 'b'}\td{i:02d}\tdata/stack.tif\ttiff_stack\t40\t8\t8\t"
            for i in range(datasets)
        ]
        (root / "config" / "datasets.tsv").write_text("\n".join(rows) + "\n")
        # the demo config reads label volumes per dataset; point them at the same empty file
        for target in config["targets"].values():
            target["annotations"] = {"labels": "data/stack.tif"}
        (root / "config" / "config.yaml").write_text(
            yaml.safe_dump(config).replace("data/stack.tif", "data/{dataset}.tif")
        )
        for i in range(datasets):
            (root / "data" / f"d{i:02d}.tif").write_bytes(b"")
        start = time.perf_counter()
        proc = subprocess.Popen(
            [
                str(Path(sys.executable).parent / "snakemake"),
                "-n",
                "--quiet",
                "rules",
                "--snakefile",
                str(REPO / "Snakefile"),
            ],
            cwd=root,
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
        )
        _, status, usage = os.wait4(proc.pid, 0)
        seconds = time.perf_counter() - start
        out, err = proc.stdout.read(), proc.stderr.read()
        if status != 0:
            raise SystemExit(f"dry run failed:\n{out}\n{err}")
        jobs = int(next(line.split()[1] for line in out.splitlines() if line.startswith("total")))
    figures = {
        "jobs": jobs,
        "dry_run_s": seconds,
        "peak_rss_MB": usage.ru_maxrss / 1024.0,
        "datasets": datasets,
        "shard_jobs_per_dataset_and_target": shards,
    }
    report(
        "dag_scale",
        [
            ("jobs planned", jobs, ""),
            ("dry run", seconds, "s"),
            ("peak RSS of snakemake", figures["peak_rss_MB"], "MB"),
        ],
        figures,
    )


if __name__ == "__main__":
    main()
