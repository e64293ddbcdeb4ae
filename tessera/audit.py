"""The study's audit trail: a manifest of every result with its checksum, and an RO-Crate.

RO-Crate (https://w3id.org/ro/crate/1.1) is an open standard for packaging research outputs with
their metadata as JSON-LD; a crate describing this run (the workflow, its inputs and its
results, as a CreateAction) can be deposited beside a paper. The manifest lists every result
file or store with its size and SHA-256 (a store's digest covers every file in it, by relative
path), so a reader can check that what they downloaded is what the run made.
"""

import json
import platform
from datetime import datetime, timezone
from pathlib import Path

import pandas as pd

from . import __version__
from .atomic import write_table, write_text
from .checksum import file_sha256
from .methods import software_versions


def _size(path):
    path = Path(path)
    if path.is_dir():
        return sum(p.stat().st_size for p in path.rglob("*") if p.is_file())
    return path.stat().st_size


def manifest(paths, *, root):
    """One row per path: path relative to `root`, kind (file or store), bytes, SHA-256."""
    rows = []
    for path in sorted({str(p) for p in paths}):
        p = Path(path)
        rows.append({"path": str(p.relative_to(root)) if p.is_relative_to(root) else str(p),
                     "kind": "store" if p.is_dir() else "file", "bytes": _size(p), "sha256": file_sha256(p)})
    return pd.DataFrame(rows, columns=["path", "kind", "bytes", "sha256"])


def ro_crate(table, inputs, *, name, description, root_dir):
    """RO-Crate 1.1 metadata (JSON-LD dict) of the run: workflow, inputs, results."""
    now = datetime.now(timezone.utc).replace(microsecond=0).isoformat()
    results = [{"@id": r.path + ("/" if r.kind == "store" else ""),
                "@type": "Dataset" if r.kind == "store" else "File",
                "contentSize": int(r.bytes), "sha256": r.sha256} for r in table.itertuples(index=False)]
    sources = [{"@id": str(Path(p)), "@type": "File", "sha256": file_sha256(p)} for p in inputs]
    software = software_versions()
    graph = [
        {"@id": "ro-crate-metadata.json", "@type": "CreativeWork", "about": {"@id": "./"},
         "conformsTo": {"@id": "https://w3id.org/ro/crate/1.1"}},
        {"@id": "./", "@type": "Dataset", "name": name, "description": description, "datePublished": now,
         "license": {"@id": "https://spdx.org/licenses/BSD-3-Clause"},
         "hasPart": [{"@id": r["@id"]} for r in results],
         "mentions": {"@id": "#run"}},
        {"@id": "#workflow", "@type": ["File", "SoftwareSourceCode", "ComputationalWorkflow"],
         "name": f"tessera {__version__} (Snakemake workflow)", "programmingLanguage": {"@id": "#snakemake"},
         "version": __version__},
        {"@id": "#snakemake", "@type": "ComputerLanguage", "name": "Snakemake",
         "url": {"@id": "https://snakemake.github.io"}, "version": software.get("snakemake", "")},
        {"@id": "#run", "@type": "CreateAction", "name": f"run of {name}", "endTime": now,
         "instrument": {"@id": "#workflow"}, "object": [{"@id": s["@id"]} for s in sources],
         "result": [{"@id": r["@id"]} for r in results],
         "description": f"host {platform.node()}, Python {platform.python_version()}; "
                        + ", ".join(f"{k} {v}" for k, v in software.items())},
        *results,
        *sources,
    ]
    return {"@context": "https://w3id.org/ro/crate/1.1/context", "@graph": graph}


def audit_job(outputs, inputs, out_manifest, out_crate, *, study_name, root="results"):
    """Write the manifest of every result and the RO-Crate metadata of the run."""
    table = manifest(outputs, root=Path(root))
    write_table(out_manifest, table)
    crate = ro_crate(table, inputs, name=study_name, root_dir=root,
                     description="Organelle segmentation and morphometry results made by tessera; automatic "
                                 "segmentation is a research measurement, validated on held-out annotation.")
    write_text(out_crate, json.dumps(crate, indent=1) + "\n")
    return {"results": len(table), "bytes": int(table["bytes"].sum())}
