"""Code identity for rerun triggers and audit records."""

import ast
import functools
import hashlib
import json
import platform
import subprocess
from pathlib import Path

from tessera import __version__
from tessera.io.atomic import write_text
from tessera.io.digests import file_sha256
from tessera.workflow.versions import software_versions

_PACKAGE_DIR = Path(__file__).resolve().parents[1]  # the tessera package
# The packages whose source a rule's code param hashes: the library and the demo generator,
# which sits beside it (it imports the library; the library never imports it).
_HASHED = ("tessera", "tessera_demo")


def _ours(name):
    return name.split(".")[0] in _HASHED


def _module_file(name):
    path = _PACKAGE_DIR.parent.joinpath(*name.split("."))
    return path / "__init__.py" if path.is_dir() else path.with_suffix(".py")


@functools.cache
def _package_imports(path, module):
    """Names of the tessera modules that the file `path` (module `module`) imports anywhere."""
    package = module if path.name == "__init__.py" else module.rpartition(".")[0]
    found = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            found.update(a.name for a in node.names if _ours(a.name))
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.rsplit(".", node.level - 1)[0] if node.level > 1 else package
                target = f"{base}.{node.module}" if node.module else base
            elif _ours(node.module or ""):
                target = node.module
            else:
                continue
            found.add(target)
            # `from . import x` / `from .pkg import mod` may name modules, not attributes.
            for alias in node.names:
                candidate = f"{target}.{alias.name}"
                if _module_file(candidate).exists():
                    found.add(candidate)
    return frozenset(m for m in found if _module_file(m).exists())


def module_closure(*modules):
    """The given tessera modules plus every tessera module they import, transitively.

    Examples
    --------
    >>> sorted(module_closure("tessera.spacing"))
    ['tessera', 'tessera.errors', 'tessera.spacing']
    >>> sorted(module_closure("tessera_demo.study"))
    ['tessera', 'tessera.errors', 'tessera_demo', 'tessera_demo.checks', 'tessera_demo.study']
    """
    seen, todo = set(), list(modules)
    while todo:
        name = todo.pop()
        if name in seen:
            continue
        seen.add(name)
        # importing a submodule runs the __init__ of every package above it too
        parents = [name.rsplit(".", n)[0] for n in range(1, name.count(".") + 1)]
        todo.extend(p for p in parents if p not in seen)
        todo.extend(_package_imports(_module_file(name), name) - seen)
    return seen


def script_modules(script):
    r"""The tessera (and tessera_demo) modules a script runs: what it imports, transitively.

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     script = Path(folder) / "job.py"
    ...     _ = script.write_text("from tessera.spacing import normalize_spacing\n")
    ...     sorted(script_modules(script))
    ['tessera', 'tessera.errors', 'tessera.spacing']
    """
    found = set()
    for node in ast.walk(ast.parse(Path(script).read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            found.update(a.name for a in node.names if _ours(a.name))
        elif isinstance(node, ast.ImportFrom) and _ours(node.module or ""):
            found.add(node.module)
            found.update(
                f"{node.module}.{a.name}"
                for a in node.names
                if _module_file(f"{node.module}.{a.name}").exists()
            )
    return module_closure(*sorted(m for m in found if _module_file(m).exists()))


def script_code(script):
    """:func:`code_version` of what a rule's script runs: the ``code`` param of every rule.

    Snakemake's own code trigger sees the script file, not the modules it imports; this param
    covers exactly those, so editing a module reruns the jobs that execute it and no others.
    """
    return code_version(*sorted(script_modules(script)))


def code_version(*modules):
    """Package version plus a short hash of the source of `modules` and what they import.

    Rules pass this as a ``params:`` value (Snakemake's code trigger only sees the rule's own
    script, not imported modules), so editing a module reruns the jobs whose computation depends
    on it, and only those. With no modules, the whole package is hashed.

    Examples
    --------
    >>> code_version("tessera.pyramid").startswith(__version__ + "+")
    True
    """
    names = (
        module_closure(*modules)
        if modules
        else {
            "tessera." + p.relative_to(_PACKAGE_DIR).with_suffix("").as_posix().replace("/", ".")
            for p in _PACKAGE_DIR.rglob("*.py")
        }
    )
    digest = hashlib.sha256()
    for name in sorted(names):
        digest.update(name.encode())
        digest.update(_module_file(name).read_bytes())
    return f"{__version__}+{digest.hexdigest()[:12]}"


# --- per-job provenance records ------------------------------------------------------------

#: Where every job's record goes, one JSON file per job: <root>/<rule>/<wildcards>.json
RECORD_ROOT = "results/provenance"

#: Results (relative to results/) that record when, where and how a job ran, so they differ
#: between two otherwise identical runs; every other result is byte for byte reproducible.
RUN_SPECIFIC = ("provenance/", "study/audit/provenance.tsv", "ro-crate-metadata.json")


def is_run_specific(relative_path):
    """True for the results that record host, times or scheduler resources (see RUN_SPECIFIC).

    Examples
    --------
    >>> is_run_specific("provenance/objects/dataset=w1,target=nuclei.json"), is_run_specific("w1/qc/sections.tsv")
    (True, False)
    """
    path = Path(relative_path).as_posix()
    return any(path == p or (p.endswith("/") and path.startswith(p)) for p in RUN_SPECIFIC)


def record_path(rule, wildcards, *, root=RECORD_ROOT):
    """Path of the provenance record of one job: one file per rule and wildcard values.

    Examples
    --------
    >>> record_path("objects", {"target": "nuclei", "dataset": "w1"}).as_posix()
    'results/provenance/objects/dataset=w1,target=nuclei.json'
    >>> record_path("audit", {}).as_posix()
    'results/provenance/audit/job.json'
    """
    name = ",".join(f"{k}={v}" for k, v in sorted(dict(wildcards).items())) or "job"
    return Path(root) / rule / f"{name}.json"


def _plain(value):
    """Snakemake's named lists and other containers as plain JSON values."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if value is None or isinstance(value, (bool, int, float, str)):
        return value
    if hasattr(value, "item"):  # numpy scalars
        return value.item()
    return str(value)


def _named(files):
    """A Snakemake Namedlist as {name: path} plus unnamed paths, in order."""
    names = dict(files.items()) if hasattr(files, "items") else {}
    named = {str(p) for v in names.values() for p in ([v] if isinstance(v, str) else v)}
    out = [
        {"name": k, "path": str(p)}
        for k, v in names.items()
        for p in ([v] if isinstance(v, str) else v)
    ]
    out += [{"name": None, "path": str(p)} for p in files if str(p) not in named]
    return out


#: Inputs and outputs up to this size are hashed whole for their record. Larger ones (a
#: terabyte stack, its stores) would make every job reread them: stores are then identified by
#: the checksum manifests their writers recorded, and large files by size only (the stacks' own
#: SHA-256 is in results/<dataset>/audit/inputs.sha256).
FULL_HASH_BYTES = 256 * 2**20

# Files in which our writers record the checksums of everything else in a folder.
_CHECKSUM_MANIFESTS = ("tessera-checksums.json", "manifest.json")


def _file_entry(entry, *, full_hash_bytes=FULL_HASH_BYTES):
    path = Path(entry["path"])
    if not path.exists():
        return {**entry, "kind": "missing", "bytes": None, "sha256": None}
    files = sorted(p for p in path.rglob("*") if p.is_file()) if path.is_dir() else [path]
    size = sum(p.stat().st_size for p in files)
    out = {**entry, "kind": "store" if path.is_dir() else "file", "bytes": size}
    if not files:
        return {**out, "sha256": None}
    if size <= full_hash_bytes:
        return {**out, "sha256": file_sha256(path)}
    manifests = [p for p in files if p.name in _CHECKSUM_MANIFESTS]
    if not manifests:
        return {**out, "sha256": None, "not_hashed": f"larger than {full_hash_bytes} bytes"}
    digest = hashlib.sha256()
    for manifest in manifests:
        digest.update(str(manifest.relative_to(path)).encode() + b"\0" + manifest.read_bytes())
    return {**out, "sha256": None, "checksum_manifests_sha256": digest.hexdigest()}


def _seeds(params, prefix=""):
    """Every parameter whose key names a seed, found at any depth."""
    found = {}
    if isinstance(params, dict):
        for k, v in params.items():
            key = f"{prefix}{k}"
            if "seed" in str(k).lower() and not isinstance(v, (dict, list)):
                found[key] = v
            found.update(_seeds(v, key + "."))
    elif isinstance(params, list):
        for i, v in enumerate(params):
            found.update(_seeds(v, f"{prefix}{i}."))
    return found


@functools.cache
def source_state(directory):
    """Git commit of `directory` and whether tracked files differ from it (None outside git).

    A record from a dirty tree says so: the code version hash still identifies the package
    source, but the workflow files may differ from any commit.
    """

    def git(*args):
        done = subprocess.run(
            ["git", "-C", str(directory), *args], capture_output=True, text=True, timeout=30
        )
        return done.stdout.strip() if done.returncode == 0 else None

    try:
        commit = git("rev-parse", "HEAD")
        status = git("status", "--porcelain", "--untracked-files=no")
    except (OSError, subprocess.SubprocessError):
        return {"commit": None, "dirty": None}
    return {"commit": commit, "dirty": None if status is None or commit is None else bool(status)}


def job_record(job, *, started, finished, workflow_dir):
    """Provenance of one finished job as a JSON-ready dict.

    Parameters
    ----------
    job : snakemake.script.Snakemake
        The object Snakemake hands to a script (``rule``, ``input``, ``output``, ``params``,
        ``wildcards``, ``threads``, ``resources``, ``log``).
    started, finished : datetime.datetime
        Wall-clock start and end of the job (UTC).
    workflow_dir : path
        Folder of the workflow, for the git commit and dirty flag.

    Returns
    -------
    dict
        rule, wildcards, inputs and outputs (path, kind, bytes, SHA-256; above
        :data:`FULL_HASH_BYTES` the SHA-256 of a store's checksum manifests instead), params, seeds,
        code version (``params.code``) with the git commit and dirty flag, package versions,
        threads, resources, host, start, end and duration. Only ``host``, ``started``,
        ``finished`` and ``duration_s`` differ between two identical runs.
    """
    params = (
        _plain(dict(job.params.items()))
        if hasattr(job.params, "items")
        else _plain(list(job.params))
    )
    resources = {k: _plain(v) for k, v in job.resources.items() if not str(k).startswith("_")}
    return {
        "rule": job.rule,
        "wildcards": _plain(dict(job.wildcards.items())),
        "inputs": [_file_entry(e) for e in _named(job.input)],
        "outputs": [_file_entry(e) for e in _named(job.output)],
        "log": [str(p) for p in job.log],
        "params": params,
        "seeds": _seeds(params),
        "code_version": params.get("code") if isinstance(params, dict) else None,
        "source": source_state(str(Path(workflow_dir).resolve())),
        "packages": software_versions(),
        "python": platform.python_version(),
        "threads": int(job.threads),
        "resources": resources,
        "host": platform.node(),
        "started": started.isoformat(timespec="seconds"),
        "finished": finished.isoformat(timespec="seconds"),
        "duration_s": round((finished - started).total_seconds(), 3),
    }


def write_job_record(job, *, started, finished, workflow_dir, root=RECORD_ROOT):
    """Write :func:`job_record` of `job` to :func:`record_path` atomically; return the path."""
    path = record_path(job.rule, dict(job.wildcards.items()), root=root)
    record = job_record(job, started=started, finished=finished, workflow_dir=workflow_dir)
    write_text(path, json.dumps(record, indent=1, sort_keys=False) + "\n")
    return path
