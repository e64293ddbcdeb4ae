"""Section QC on the demo study: are the flagged sections the damaged ones, and only those?

Every demo dataset records the sections its generator damaged in ``truth.json`` (``blank``:
wholly or partly lost, ``torn`` the partly lost among them; ``blurred``: out of focus). This
benchmark takes each dataset of the demo sheet (``demo/data/<dataset>/`` if the demo has been
rendered there, else rendered into a temporary folder through ``tessera_demo``), ingests it and
runs the section QC job, with the settings of ``config/config.yaml`` as the workflow does, and
scores the flags against the truth:

- ``flat`` flags against ``blank`` sections, ``blurred`` flags against ``blurred`` sections;
- ``shift`` and ``intensity`` flags against nothing (the demo injects no shift and no change of
  brightness in one section), so any such flag is a false alarm;
- ``pooled``: any flag against any damaged section.

Precision is the share of flagged sections that are damaged (null when nothing is flagged),
recall the share of damaged sections that are flagged (null when none is damaged). The figures
describe the synthetic demo only; check ``sections.png`` of real data by eye.

Run from the repository root: .venv/bin/python benchmarks/qc_demo.py
"""

import json
import sys
import tempfile
from pathlib import Path

import yaml

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import report  # noqa: E402

from tessera.workflow.config import load_config, load_datasets  # noqa: E402
from tessera.workflow.jobs.ingest import ingest_job  # noqa: E402
from tessera.workflow.jobs.section_qc import section_qc_job  # noqa: E402
from tessera_demo.files import write_dataset  # noqa: E402
from tessera_demo.study import dataset_seed, subject_volume_scale  # noqa: E402

REPO = Path(__file__).resolve().parents[1]
SCHEMAS = REPO / "config" / "schemas"
# Flag name -> the truth.json list of the sections it should find (None: nothing injected).
KINDS = {"flat": "blank", "blurred": "blurred", "shift": None, "intensity": None}


def demo_dataset(row, config, scratch):
    """Folder holding the dataset's raw.tif and truth.json: the rendered demo, or a fresh one."""
    shipped = REPO / "demo" / "data" / row["dataset"]
    if (shipped / "raw.tif").is_file() and (shipped / "truth.json").is_file():
        return shipped
    demo = config["demo"]
    out = scratch / row["dataset"]
    write_dataset(
        out,
        dataset=row["dataset"],
        condition=row["condition"],
        subject=row["subject"],
        seed=dataset_seed(demo["seed"], row["dataset"]),
        shape=tuple(demo["shape"]),
        spacing=(row["voxel_z_nm"], row["voxel_y_nm"], row["voxel_x_nm"]),
        mito_volume_scale=subject_volume_scale(
            row["subject"],
            row["condition"],
            study_seed=demo["seed"],
            condition_scales=demo["mito_volume_scale"],
            animal_sd=demo["animal_sd"],
        ),
        tile_size=demo["tile_size"],
    )
    return out


def run_qc(folder, row, qc, scratch):
    """The workflow's ingest and section QC jobs on one dataset; z -> reason of flagged ones."""
    image = scratch / f"{row['dataset']}.ome.zarr"
    ingest_job(
        folder / "raw.tif",
        image,
        fmt="tiff_stack",
        spacing=(row["voxel_z_nm"], row["voxel_y_nm"], row["voxel_x_nm"]),
    )
    summary = section_qc_job(
        image,
        table_path=scratch / f"{row['dataset']}.tsv",
        plot_path=scratch / f"{row['dataset']}.png",
        title=row["dataset"],
        **qc,
    )
    return summary["flagged"], summary["sections"], summary["excluded"]


def ratio(hits, total):
    return hits / total if total else None


def score(found):
    """Precision and recall per flag kind and pooled, from (dataset, flags, truth) triples."""
    figures = {}
    pooled_flagged = pooled_true = pooled_hits = 0
    for kind, truth_key in KINDS.items():
        flagged = true = hits = 0
        for _, flags, truth in found:
            mine = {z for z, reason in flags.items() if kind in reason.split(";")}
            damaged = set(truth[truth_key]) if truth_key else set()
            flagged, true, hits = (
                flagged + len(mine),
                true + len(damaged),
                hits + len(mine & damaged),
            )
        figures[kind] = {
            "precision": ratio(hits, flagged),
            "recall": ratio(hits, true),
            "flagged": flagged,
            "damaged": true,
            "hits": hits,
        }
    for _, flags, truth in found:
        damaged = set(truth["blank"]) | set(truth["blurred"])
        pooled_flagged += len(flags)
        pooled_true += len(damaged)
        pooled_hits += len(set(flags) & damaged)
    figures["pooled"] = {
        "precision": ratio(pooled_hits, pooled_flagged),
        "recall": ratio(pooled_hits, pooled_true),
        "flagged": pooled_flagged,
        "damaged": pooled_true,
        "hits": pooled_hits,
    }
    return figures


def main():
    raw_config = yaml.safe_load((REPO / "config" / "config.yaml").read_text())
    config = load_config(raw_config, SCHEMAS / "config.schema.yaml")
    sheet = load_datasets(
        REPO / config["datasets"],
        SCHEMAS / "datasets.schema.yaml",
        base_dir=REPO,
        generated_dir=REPO / "demo" / "data",
    )
    found, per_dataset = [], {}
    with tempfile.TemporaryDirectory() as folder:
        scratch = Path(folder)
        for _, row in sheet.iterrows():
            data = demo_dataset(row, config, scratch)
            truth = json.loads((data / "truth.json").read_text())["defects"]
            flags, sections, excluded = run_qc(data, row, config["qc"], scratch)
            found.append((row["dataset"], flags, truth))
            damaged = set(truth["blank"]) | set(truth["blurred"])
            per_dataset[row["dataset"]] = {
                "sections": sections,
                "flagged": {str(z): r for z, r in flags.items()},
                "false_alarms": sorted(z for z in flags if z not in damaged),
                "excluded_fraction": len(excluded) / sections,
                "truth": truth,
            }
    figures = score(found)
    figures["datasets"] = per_dataset
    rows = []
    for kind in ("pooled", *KINDS):
        f = figures[kind]
        for what in ("precision", "recall"):
            value = f[what]
            rows.append((f"{kind} {what}", "n/a" if value is None else float(value), ""))
        rows.append((f"{kind} flagged / damaged", f"{f['flagged']} / {f['damaged']}", "sections"))
    worst = max(per_dataset.values(), key=lambda d: d["excluded_fraction"])
    rows.append(("largest excluded share of a dataset", worst["excluded_fraction"], ""))
    report("qc_demo", rows, figures)


if __name__ == "__main__":
    main()
