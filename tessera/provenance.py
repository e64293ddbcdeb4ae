"""Code identity for rerun triggers and audit records."""

import ast
import functools
import hashlib
from pathlib import Path

from . import __version__

_PACKAGE_DIR = Path(__file__).parent


def _module_file(name):
    parts = name.split(".")[1:]  # drop "tessera"
    path = _PACKAGE_DIR.joinpath(*parts)
    return path / "__init__.py" if path.is_dir() else path.with_suffix(".py")


@functools.lru_cache(maxsize=None)
def _package_imports(path, module):
    """Names of the tessera modules that the file `path` (module `module`) imports anywhere."""
    package = module if path.name == "__init__.py" else module.rpartition(".")[0]
    found = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            found.update(a.name for a in node.names if a.name.split(".")[0] == "tessera")
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.rsplit(".", node.level - 1)[0] if node.level > 1 else package
                target = f"{base}.{node.module}" if node.module else base
            elif (node.module or "").split(".")[0] == "tessera":
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
    """
    seen, todo = set(), list(modules)
    while todo:
        name = todo.pop()
        if name in seen:
            continue
        seen.add(name)
        if name != "tessera":
            seen.add("tessera")  # importing a submodule runs the package __init__ too
        todo.extend(_package_imports(_module_file(name), name) - seen)
    return seen


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
    names = module_closure(*modules) if modules else {
        "tessera." + p.relative_to(_PACKAGE_DIR).with_suffix("").as_posix().replace("/", ".")
        for p in _PACKAGE_DIR.rglob("*.py")
    }
    digest = hashlib.sha256()
    for name in sorted(names):
        digest.update(name.encode())
        digest.update(_module_file(name).read_bytes())
    return f"{__version__}+{digest.hexdigest()[:12]}"
