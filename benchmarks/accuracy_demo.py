"""Accuracy of the cascade on the demo study's held-out test tiles, through the workflow.

Runs (or reuses) the demo study with the shipped config, then reads each target's
results/study/<target>/tiles_predicted/scores.tsv: pixel F1 and Jaccard on test tiles, with the
threshold chosen on validation tiles.

Run from the repository root: .venv/bin/python benchmarks/accuracy_demo.py
"""

import subprocess
import sys
from pathlib import Path

import pandas as pd
import yaml

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import report  # noqa: E402

REPO = Path(__file__).resolve().parents[1]


def main():
    targets = list(yaml.safe_load((REPO / "config" / "config.yaml").read_text())["targets"])
    outputs = [f"results/study/{t}/tiles_predicted/scores.tsv" for t in targets]
    snakemake = Path(sys.executable).parent / "snakemake"
    subprocess.run([str(snakemake), "--profile", "profiles/local", *outputs], cwd=REPO, check=True)
    figures, rows = {"demo": {}}, []
    for target, path in zip(targets, outputs):
        scores = pd.read_csv(REPO / path, sep="\t").set_index("role")
        test = scores.loc["test"]
        figures["demo"][target] = {
            "f1": float(test["f1"]),
            "jaccard": float(test["jaccard"]),
            "precision": float(test["precision"]),
            "recall": float(test["recall"]),
            "threshold": float(test["threshold"]),
        }
        rows.append((f"{target} test F1 (Jaccard {test['jaccard']:.3f})", float(test["f1"]), ""))
    report("accuracy_demo", rows, figures)


if __name__ == "__main__":
    main()
