"""Check a Snakemake profile before a run is submitted to a cluster.

Snakemake reads a profile's ``config.yaml`` as command-line options. A misspelt key, an executor
whose plugin is not installed or a rule given less memory than it needs then shows up late: as
a usage dump, or as a job killed on the cluster hours later. :func:`check_profile` finds these
first, with one message naming the file, the key and what was expected::

    python -m tessera.workflow.profiles profiles/slurm
"""

import re
import sys
from pathlib import Path

import yaml

from tessera.errors import TesseraInputError

__all__ = ["check_profile", "rule_resources", "snakemake_options"]

_RULES_DIR = Path(__file__).resolve().parents[2] / "rules"
# Executors that ship inside Snakemake itself, not as plugins.
_BUILT_IN_EXECUTORS = {"local", "dryrun", "touch"}


def snakemake_options():
    """Long options of the installed Snakemake (including its executor plugins) and the executors.

    Returns
    -------
    options : set of str
        Option names without the leading ``--`` (profile keys are these names).
    executors : set of str
        Names accepted by ``--executor``: built-in ones and installed plugins.
    """
    from snakemake.cli import get_argument_parser

    options, executors = set(), set(_BUILT_IN_EXECUTORS)
    for action in get_argument_parser()._actions:
        names = [o[2:] for o in action.option_strings if o.startswith("--")]
        options.update(names)
        if "executor" in names and action.choices:
            executors.update(action.choices)
    return options, executors


def rule_resources(rules_dir=_RULES_DIR):
    """Memory (MB) and runtime (min) each rule asks for on its first attempt, from rules/*.smk.

    Rules declare ``mem_mb=scaled_by_attempt(N)`` and ``runtime=scaled_by_attempt(M)``; these
    are what the job needs, so a profile must not set less.

    Examples
    --------
    >>> needs = rule_resources()
    >>> needs["objects"]["mem_mb"] >= 1000
    True
    """
    needs, groups = {}, set()
    for path in sorted(Path(rules_dir).glob("*.smk")):
        rule, prev_is_group = None, False
        for line in path.read_text(encoding="utf-8").splitlines():
            found = re.match(r"\s*rule (\w+):", line)
            if found:
                rule = found.group(1)
                needs.setdefault(rule, {})
                continue
            found = re.match(r"\s*(mem_mb|runtime)=scaled_by_attempt\((\d+)\)", line)
            if found and rule:
                needs[rule][found.group(1)] = int(found.group(2))
            found = re.match(r'\s*"(\w+)"\s*$', line)
            if found and rule and prev_is_group:
                groups.add(found.group(1))
            prev_is_group = bool(re.match(r"\s*group:\s*$", line))
    needs["_groups"] = groups
    return needs


def _mapping(value, source, key):
    if not isinstance(value, dict):
        raise TesseraInputError(f"key {key}: expected a mapping, got {value!r}", source=source)
    return value


def check_profile(profile, *, rules_dir=_RULES_DIR):
    """Validate a profile folder (or its ``config.yaml``) against this Snakemake and our rules.

    Checks: readable YAML mapping; every key is an option of the installed Snakemake or of an
    installed executor plugin; the executor is installed; ``set-resources`` names existing rules
    and gives them at least the memory the rule declares; ``group-components`` names
    existing rule groups.

    Parameters
    ----------
    profile : path
        A profile folder holding ``config.yaml`` (or the file itself).

    Returns
    -------
    dict
        The profile's settings.

    Raises
    ------
    TesseraInputError
        Naming the file, the key and what was expected.
    """
    path = Path(profile)
    path = path / "config.yaml" if path.is_dir() else path
    if not path.is_file():
        raise TesseraInputError(
            "profile not found: expected a folder with config.yaml", source=path
        )
    try:
        settings = yaml.safe_load(path.read_text(encoding="utf-8"))
    except (yaml.YAMLError, UnicodeDecodeError) as error:
        raise TesseraInputError(f"not valid YAML ({error})", source=path) from None
    settings = _mapping(settings if settings is not None else {}, path, "(top level)")
    options, executors = snakemake_options()
    for key in settings:
        if str(key).replace("_", "-") not in options:
            close = sorted(o for o in options if o[:4] == str(key)[:4])[:5]
            raise TesseraInputError(
                f"key {key}: not an option of Snakemake or of an installed executor plugin"
                + (f" (similar: {', '.join(close)})" if close else ""),
                source=path,
            )
    executor = settings.get("executor", "local")
    if executor not in executors:
        raise TesseraInputError(
            f"key executor: {executor!r} is not installed (installed: {', '.join(sorted(executors))}); "
            f"install the plugin snakemake-executor-plugin-{executor} from PyPI into this environment",
            source=path,
        )
    needs = rule_resources(rules_dir)
    groups = needs.pop("_groups")
    for rule, resources in _mapping(
        settings.get("set-resources", {}) or {}, path, "set-resources"
    ).items():
        if rule not in needs:
            raise TesseraInputError(
                f"key set-resources.{rule}: no such rule; rules are {', '.join(sorted(needs))}",
                source=path,
            )
        for name, value in _mapping(resources, path, f"set-resources.{rule}").items():
            # Memory is a need (below it the scheduler kills the job); a rule's runtime is a
            # generous limit that small studies may well lower.
            need = needs[rule].get(name) if name == "mem_mb" else None
            if need is None:
                continue
            if not isinstance(value, (int, float)) or isinstance(value, bool) or value < need:
                raise TesseraInputError(
                    f"key set-resources.{rule}.mem_mb: {value!r} is below what rule {rule} needs "
                    f"({need} MB, declared in rules/); the scheduler would kill the job: give at least {need}",
                    source=path,
                )
    for entry in settings.get("group-components", []) or []:
        name = str(entry).split("=")[0]
        if name not in groups:
            raise TesseraInputError(
                f"key group-components: no rule group {name!r}; groups are {', '.join(sorted(groups))}",
                source=path,
            )
    return settings


def main(argv=None):
    """``python -m tessera.workflow.profiles PROFILE...``: check each profile; exit 1 on the first problem."""
    argv = sys.argv[1:] if argv is None else argv
    if not argv:
        print("usage: python -m tessera.workflow.profiles PROFILE [PROFILE ...]", file=sys.stderr)
        return 2
    for profile in argv:
        try:
            check_profile(profile)
        except TesseraInputError as error:
            print(f"tessera: {error}", file=sys.stderr)
            return 1
        print(f"{profile}: ok")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
