"""Code identity for rerun triggers: which of our modules a rule's script runs, and their hash.

Snakemake's own code trigger sees a rule's script file, not the modules it imports. Every rule
therefore passes ``code=script_code("<rule>")`` as a param: the package version plus a hash of the
source of every module of ours that ``scripts/<rule>.py`` imports, transitively (read from the
source, nothing is imported). Editing a module reruns exactly the jobs whose script runs it.
:func:`rerun_table` lists, for every module, the rules that an edit to it reruns directly.
"""

import ast
import functools
import hashlib
from pathlib import Path

from tessera import __version__

#: The folder holding our top-level packages (the repository root in a development install).
_ROOT = Path(__file__).resolve().parents[2]

#: Our top-level packages: the library and workflow (``tessera``) and the demo-data generator.
OWN_PACKAGES = ("tessera", "tessera_demo")


def _module_file(name):
    """The source file of module `name` (a package's ``__init__.py``); may not exist."""
    path = _ROOT.joinpath(*name.split("."))
    return path / "__init__.py" if path.is_dir() else path.with_suffix(".py")


def _is_own(name):
    return name.split(".")[0] in OWN_PACKAGES and _module_file(name).exists()


def _imports_of(path, package):
    """Names of our modules that the file `path` imports anywhere (any depth, any branch).

    `package` is the package relative imports start from (None for a script).
    """
    found = set()
    for node in ast.walk(ast.parse(Path(path).read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            found.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.rsplit(".", node.level - 1)[0] if node.level > 1 else package
                target = f"{base}.{node.module}" if node.module else base
            else:
                target = node.module or ""
            found.add(target)
            # `from pkg import mod` names a module, not an attribute
            found.update(f"{target}.{alias.name}" for alias in node.names)
    return frozenset(name for name in found if _is_own(name))


@functools.cache
def _module_imports(name):
    path = _module_file(name)
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    return _imports_of(path, package)


def module_closure(*modules):
    """The given modules plus every module of ours they import, transitively, with the
    ``__init__`` of every package above each (Python runs those on import too).

    Examples
    --------
    >>> sorted(module_closure("tessera.spacing"))
    ['tessera', 'tessera.errors', 'tessera.spacing']
    """
    seen, todo = set(), list(modules)
    while todo:
        name = todo.pop()
        if name in seen:
            continue
        seen.add(name)
        todo.extend(name.rsplit(".", n)[0] for n in range(1, name.count(".") + 1))
        todo.extend(_module_imports(name) - seen)
    return seen


def script_modules(script):
    r"""The modules of ours that a script runs: what it imports, transitively.

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     script = Path(folder) / "job.py"
    ...     _ = script.write_text("from tessera.spacing import normalize_spacing\n")
    ...     sorted(script_modules(script))
    ['tessera', 'tessera.errors', 'tessera.spacing']
    """
    return module_closure(*sorted(_imports_of(script, None)))


def code_version(*modules):
    """Package version plus a short hash of the source of `modules` and what they import.

    Examples
    --------
    >>> code_version("tessera.spacing").startswith(__version__ + "+")
    True
    """
    digest = hashlib.sha256()
    for name in sorted(module_closure(*modules)):
        digest.update(name.encode())
        digest.update(_module_file(name).read_bytes())
    return f"{__version__}+{digest.hexdigest()[:12]}"


def script_code(script):
    """:func:`code_version` of what a rule's script runs: the ``code`` param of every rule."""
    return code_version(*sorted(script_modules(script)))


def own_modules():
    """Every module of our packages, by dotted name, sorted.

    Examples
    --------
    >>> modules = own_modules()
    >>> "tessera.spacing" in modules and "tessera.workflow.code_identity" in modules
    True
    """
    names = set()
    for package in OWN_PACKAGES:
        for path in (_ROOT / package).rglob("*.py"):
            parts = path.relative_to(_ROOT).with_suffix("").parts
            names.add(".".join(parts[:-1] if parts[-1] == "__init__" else parts))
    return sorted(names)


def rerun_table(scripts_dir):
    """For every module of ours, the rules whose jobs an edit to it reruns directly.

    Rules are read from `scripts_dir`, one script per rule named after it (``<rule>.py``).
    Jobs downstream of those rerun too, because their inputs change.

    Returns
    -------
    dict
        Module name to the sorted list of rule names (empty when no rule runs it).
    """
    scripts = sorted(Path(scripts_dir).glob("*.py"))
    runs = {script.stem: script_modules(script) for script in scripts}
    return {
        module: sorted(rule for rule, modules in runs.items() if module in modules)
        for module in own_modules()
    }


def rerun_markdown(scripts_dir):
    """:func:`rerun_table` as a Markdown table (the one in DEVELOPERS.md is this output)."""
    table = rerun_table(scripts_dir)
    every = sorted(Path(p).stem for p in Path(scripts_dir).glob("*.py"))
    lines = ["| module | rules an edit reruns directly |", "|---|---|"]
    for module, rules in table.items():
        if rules == every:
            shown = "every rule"
        else:
            shown = ", ".join(rules) if rules else "none (no rule's script runs it)"
        lines.append(f"| `{module}` | {shown} |")
    return "\n".join(lines) + "\n"


if __name__ == "__main__":
    print(rerun_markdown(_ROOT / "scripts"), end="")
