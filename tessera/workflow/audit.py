"""The study's audit trail: a manifest of every result with its checksum, and an RO-Crate.

RO-Crate (https://w3id.org/ro/crate/1.1) is an open standard for packaging research outputs with
their metadata as JSON-LD; a crate describing this run (the workflow, its inputs and its
results, as a CreateAction) can be deposited beside a paper. The manifest lists every result
file or store with its size and SHA-256 (a store's digest covers every file in it, by relative
path), so a reader can check that what they downloaded is what the run made.

Every job also leaves a provenance record under ``results/provenance/`` (written by
:func:`tessera.workflow.runner.run_job`); the audit indexes them, links each result of the manifest to the
record of the job that made it, and lists them in the crate.
"""

import json
import platform
from datetime import UTC, datetime
from pathlib import Path

import pandas as pd

from tessera import __version__
from tessera.io.digests import file_sha256
from tessera.workflow.versions import software_versions


def _size(path):
    path = Path(path)
    if path.is_dir():
        return sum(p.stat().st_size for p in path.rglob("*") if p.is_file())
    return path.stat().st_size


def manifest(paths, *, root, records=None):
    """One row per path: path relative to `root`, kind (file or store), bytes, SHA-256 and the
    provenance record of the job that wrote it (from `records`, a table of
    :func:`provenance_index`; empty when unknown)."""
    made_by = {}
    if records is not None:
        for row in records.itertuples(index=False):
            for output in row.outputs.split(";"):
                made_by[output] = row.record
    rows = []
    for path in sorted({str(p) for p in paths}):
        p = Path(path)
        rows.append(
            {
                "path": str(p.relative_to(root)) if p.is_relative_to(root) else str(p),
                "kind": "store" if p.is_dir() else "file",
                "bytes": _size(p),
                "sha256": file_sha256(p),
                "provenance": made_by.get(str(p), ""),
            }
        )
    return pd.DataFrame(rows, columns=["path", "kind", "bytes", "sha256", "provenance"])


RECORD_COLUMNS = [
    "record",
    "rule",
    "wildcards",
    "code_version",
    "git_commit",
    "dirty",
    "host",
    "started",
    "finished",
    "duration_s",
    "outputs",
]


def provenance_index(root):
    """One row per job record found below `root` (``results/provenance``), sorted by path.

    A record whose JSON cannot be read is listed with rule ``unreadable`` rather than dropped,
    so the audit shows it.
    """
    rows = []
    for path in sorted(Path(root).rglob("*.json")) if Path(root).is_dir() else []:
        try:
            rec = json.loads(path.read_text(encoding="utf-8"))
            source = rec.get("source") or {}
            rows.append(
                {
                    "record": str(path),
                    "rule": rec["rule"],
                    "wildcards": ",".join(f"{k}={v}" for k, v in sorted(rec["wildcards"].items())),
                    "code_version": rec.get("code_version") or "",
                    "git_commit": source.get("commit") or "",
                    "dirty": source.get("dirty"),
                    "host": rec["host"],
                    "started": rec["started"],
                    "finished": rec["finished"],
                    "duration_s": rec["duration_s"],
                    "outputs": ";".join(o["path"] for o in rec["outputs"]),
                }
            )
        except (ValueError, KeyError, TypeError, AttributeError) as error:
            rows.append(
                {"record": str(path), "rule": "unreadable", "outputs": "", "wildcards": str(error)}
            )
    return pd.DataFrame(rows, columns=RECORD_COLUMNS)


def _provenance_entries(records, root, listed):
    """Crate entries of the job records, each ``about`` those of its outputs the crate lists."""
    provenance = []
    for row in records.itertuples(index=False) if records is not None else []:
        about = [
            str(Path(o).relative_to(root))
            for o in row.outputs.split(";")
            if o and Path(o).is_relative_to(root)
        ]
        about = [a for a in about if a in listed or a + "/" in listed]
        provenance.append(
            {
                "@id": str(Path(row.record).relative_to(root)),
                "@type": "File",
                "encodingFormat": "application/json",
                "name": f"provenance of rule {row.rule} {row.wildcards}".rstrip(),
                "about": [{"@id": a + ("/" if a + "/" in listed else "")} for a in about],
            }
        )
    return provenance


def ro_crate(table, inputs, *, name, description, root_dir, records=None):
    """RO-Crate 1.1 metadata (JSON-LD dict) of the run: workflow, inputs, results, and the job
    provenance records (each ``about`` the results its job wrote).

    Most of this function is the crate's JSON-LD graph written out as one literal.
    """
    now = datetime.now(UTC).replace(microsecond=0).isoformat()
    results = [
        {
            "@id": r.path + ("/" if r.kind == "store" else ""),
            "@type": "Dataset" if r.kind == "store" else "File",
            "contentSize": int(r.bytes),
            "sha256": r.sha256,
        }
        for r in table.itertuples(index=False)
    ]
    sources = [{"@id": str(Path(p)), "@type": "File", "sha256": file_sha256(p)} for p in inputs]
    provenance = _provenance_entries(records, Path(root_dir), {r["@id"] for r in results})
    software = software_versions()
    graph = [
        {
            "@id": "ro-crate-metadata.json",
            "@type": "CreativeWork",
            "about": {"@id": "./"},
            "conformsTo": {"@id": "https://w3id.org/ro/crate/1.1"},
        },
        {
            "@id": "./",
            "@type": "Dataset",
            "name": name,
            "description": description,
            "datePublished": now,
            "license": {"@id": "https://spdx.org/licenses/BSD-3-Clause"},
            "hasPart": [{"@id": r["@id"]} for r in [*results, *provenance]],
            "mentions": {"@id": "#run"},
        },
        {
            "@id": "#workflow",
            "@type": ["File", "SoftwareSourceCode", "ComputationalWorkflow"],
            "name": f"tessera {__version__} (Snakemake workflow)",
            "programmingLanguage": {"@id": "#snakemake"},
            "version": __version__,
        },
        {
            "@id": "#snakemake",
            "@type": "ComputerLanguage",
            "name": "Snakemake",
            "url": {"@id": "https://snakemake.github.io"},
            "version": software.get("snakemake", ""),
        },
        {
            "@id": "#run",
            "@type": "CreateAction",
            "name": f"run of {name}",
            "endTime": now,
            "instrument": {"@id": "#workflow"},
            "object": [{"@id": s["@id"]} for s in sources],
            "result": [{"@id": r["@id"]} for r in results],
            "description": f"host {platform.node()}, Python {platform.python_version()}; "
            + ", ".join(f"{k} {v}" for k, v in software.items()),
        },
        *results,
        *provenance,
        *sources,
    ]
    return {"@context": "https://w3id.org/ro/crate/1.1/context", "@graph": graph}
