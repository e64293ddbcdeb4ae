"""Check a Snakemake profile before a run is submitted to a cluster.

Snakemake reads a profile's ``config.yaml`` as command-line options. A misspelt key, an executor
whose plugin is not installed or a rule given less memory than it needs then shows up late: as
a usage dump, or as a job killed on the cluster hours later. :func:`check_profile` finds these
first, with one message naming the file, the key and what was expected::

    python -m tessera.workflow.profiles profiles/slurm
"""

import functools
import sys
from pathlib import Path

import yaml
from snakemake.api import SnakemakeApi
from snakemake.cli import get_argument_parser
from snakemake.exceptions import WorkflowError
from snakemake.iocontainers import Wildcards
from snakemake.settings.types import OutputSettings, ResourceSettings
from snakemake_interface_common.exceptions import ApiError

from tessera.errors import TesseraInputError

__all__ = ["check_profile", "rule_resources", "snakemake_options"]

# The workflow folder: Snakefile, rules/, config/config.yaml (the profile check loads it as is).
_WORKFLOW_DIR = Path(__file__).resolve().parents[2]
# Executors that ship inside Snakemake itself, not as plugins.
_BUILT_IN_EXECUTORS = {"local", "dryrun", "touch"}
# The resources a profile's set-resources is checked against, and the attempt they are read at:
# rules scale them with the attempt number (scaled_by_attempt), so attempt 1 is the least a job gets.
_CHECKED_RESOURCES = ("mem_mb", "runtime")
_FIRST_ATTEMPT = 1


def snakemake_options():
    """Long options of the installed Snakemake (including its executor plugins) and the executors.

    Returns
    -------
    options : set of str
        Option names without the leading ``--`` (profile keys are these names).
    executors : set of str
        Names accepted by ``--executor``: built-in ones and installed plugins.

    Examples
    --------
    >>> options, executors = snakemake_options()
    >>> "set-resources" in options and "local" in executors
    True
    """
    options, executors = set(), set(_BUILT_IN_EXECUTORS)
    for action in get_argument_parser()._actions:
        names = [o[2:] for o in action.option_strings if o.startswith("--")]
        options.update(names)
        if "executor" in names and action.choices:
            executors.update(action.choices)
    return options, executors


def _first_attempt_needs(rule):
    """The rule's declared mem_mb/runtime, evaluated as Snakemake would for attempt 1."""
    needs = {}
    for name in _CHECKED_RESOURCES:
        if name in rule.resources:
            # a plain number evaluates to itself; scaled_by_attempt gives (wildcards, attempt)
            needs[name] = rule.resources[name].evaluate(Wildcards(), attempt=_FIRST_ATTEMPT).value
    return needs


@functools.cache
def _declared_rules(workflow_dir):
    """``(name, first-attempt needs, group)`` of every rule, from the workflow Snakemake loads.

    Loading runs the Snakefile (config and sheet validation included) from `workflow_dir`, about
    two seconds, so it is done once per process.
    """
    snakefile = Path(workflow_dir) / "Snakefile"
    try:
        with SnakemakeApi(OutputSettings(enable_file_logging=False)) as api:
            workflow = api.workflow(
                resource_settings=ResourceSettings(),
                snakefile=snakefile,
                workdir=Path(workflow_dir),
            )._workflow  # the loaded Workflow; the API has no public accessor for its rules
            # Rule.group reports no group unless the workflow is being executed on a cluster or
            # dry-run; the group a rule declares is what a profile's group-components names.
            return tuple(
                (rule.name, _first_attempt_needs(rule), rule._group) for rule in workflow.rules
            )
    except (WorkflowError, ApiError) as error:
        raise TesseraInputError(
            f"cannot load the workflow to read its rules ({error})", source=snakefile
        ) from None


def rule_resources(workflow_dir=_WORKFLOW_DIR):
    """Memory (MB) and runtime (min) each rule asks for on its first attempt, and the rule groups.

    Read from the workflow as Snakemake itself loads it (Snakefile, rules/*.smk and the config in
    `workflow_dir`): rules declare ``mem_mb=scaled_by_attempt(N)`` and
    ``runtime=scaled_by_attempt(M)``, evaluated here at attempt 1. These are what the job needs,
    so a profile must not set less.

    Parameters
    ----------
    workflow_dir : path, optional
        The folder holding the Snakefile and ``config/config.yaml``; this repository by default.

    Returns
    -------
    dict
        Rule name -> ``{"mem_mb": int, "runtime": int}`` (only what the rule declares), plus the
        key ``"_groups"``: the set of rule group names.

    Examples
    --------
    >>> needs = rule_resources()
    >>> needs["objects"]["mem_mb"] >= 1000, "predict_shards" in needs["_groups"]
    (True, True)
    """
    declared = _declared_rules(Path(workflow_dir).resolve())
    needs = {name: dict(resources) for name, resources, _ in declared}
    needs["_groups"] = {group for _, _, group in declared if group is not None}
    return needs


def _mapping(value, source, key):
    if not isinstance(value, dict):
        raise TesseraInputError(f"key {key}: expected a mapping, got {value!r}", source=source)
    return value


def _read_settings(profile):
    """The profile's ``config.yaml`` path and its settings (a mapping)."""
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
    return path, _mapping(settings if settings is not None else {}, path, "(top level)")


def _check_options(settings, path):
    """Every key is a Snakemake option and the executor is installed."""
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


def _check_resources(settings, needs, path):
    """``set-resources`` names existing rules and gives each at least the memory it declares."""
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


def _check_groups(settings, groups, path):
    """``group-components`` names existing rule groups."""
    for entry in settings.get("group-components", []) or []:
        name = str(entry).split("=")[0]
        if name not in groups:
            raise TesseraInputError(
                f"key group-components: no rule group {name!r}; groups are {', '.join(sorted(groups))}",
                source=path,
            )


def check_profile(profile, *, workflow_dir=_WORKFLOW_DIR):
    """Validate a profile folder (or its ``config.yaml``) against this Snakemake and our rules.

    Checks: readable YAML mapping; every key is an option of the installed Snakemake or of an
    installed executor plugin; the executor is installed; ``set-resources`` names existing rules
    and gives them at least the memory the rule declares; ``group-components`` names
    existing rule groups. Rules, their memory and their groups are read from the workflow as
    Snakemake loads it (:func:`rule_resources`).

    Parameters
    ----------
    profile : path
        A profile folder holding ``config.yaml`` (or the file itself).
    workflow_dir : path, optional
        The workflow whose rules the profile is checked against; this repository by default.

    Returns
    -------
    dict
        The profile's settings.

    Raises
    ------
    TesseraInputError
        Naming the file, the key and what was expected.

    Examples
    --------
    >>> check_profile(_WORKFLOW_DIR / "profiles" / "local")["cores"]
    'all'
    """
    path, settings = _read_settings(profile)
    _check_options(settings, path)
    needs = rule_resources(workflow_dir)
    groups = needs.pop("_groups")
    _check_resources(settings, needs, path)
    _check_groups(settings, groups, path)
    return settings


def main(argv=None):
    """``python -m tessera.workflow.profiles PROFILE...``: check each profile; exit 1 on the first problem.

    Parameters
    ----------
    argv : list of str, optional
        Profile folders (or their ``config.yaml``); the command line by default.

    Returns
    -------
    int
        Exit status: 0 all profiles pass, 1 one does not (its message goes to stderr), 2 usage.

    Examples
    --------
    >>> main([str(_WORKFLOW_DIR / "profiles" / "slurm")])  # doctest: +ELLIPSIS
    /.../profiles/slurm: ok
    0
    """
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
