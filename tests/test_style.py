"""One formatter and linter for the whole code base: ruff, configured in pyproject.toml."""

import ast
import subprocess
import sys
from pathlib import Path

import pytest

RUFF = Path(sys.executable).parent / "ruff"
REPO = Path(__file__).resolve().parents[1]


@pytest.mark.parametrize("command", [["format", "--check"], ["check"]], ids=["format", "lint"])
def test_ruff_is_clean(command):
    # ruff is the registry's formatter and linter (a pinned tool, outside the project)
    result = subprocess.run([str(RUFF), *command, "."], cwd=REPO, capture_output=True, text=True)
    assert result.returncode == 0, result.stdout + result.stderr


def test_library_never_imports_the_workflow_floor():
    # Two floors: tessera/ (arrays and plain values) and tessera/io/ (file formats) never import
    # tessera.workflow, which owns paths, config, rules and provenance.
    offenders = []
    for path in sorted((REPO / "tessera").rglob("*.py")):
        relative = path.relative_to(REPO / "tessera")
        if relative.parts[0] == "workflow":
            continue
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            names = []
            if isinstance(node, ast.Import):
                names = [alias.name for alias in node.names]
            elif isinstance(node, ast.ImportFrom) and node.module:
                names = [node.module] + [f"{node.module}.{a.name}" for a in node.names]
            if any(n == "tessera.workflow" or n.startswith("tessera.workflow.") for n in names):
                offenders.append(f"{relative}:{node.lineno}")
    assert not offenders, offenders
