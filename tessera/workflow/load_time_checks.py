"""Settings held against what they imply, when the workflow loads.

The config and the sheet are valid on their own (:mod:`tessera.workflow.config`); some settings
can still be wrong for the cascade they describe or for a stack already checked. A job would
refuse them too, but only after Snakemake had cleared its earlier outputs, so they are refused
here first, naming the key. Each check derives what it needs through the function that owns
the rule (the halo, the level shapes), never a copy of it.
"""

from pathlib import Path

from tessera.cascade.api import spec_from_settings
from tessera.errors import TesseraInputError
from tessera.ladder import split_cascade_settings
from tessera.predict import block_halo_problem, shard_halo
from tessera.tiles.sampling import level_shape
from tessera.workflow.files.stack_check import read_stack_check


def _latest_time(path):
    """The latest modification time of a stack: a file's own, or a folder's and its files'."""
    path = Path(path)
    times = [path.stat().st_mtime]
    if path.is_dir():
        times += [entry.stat().st_mtime for entry in path.iterdir()]
    return max(times)


def _still_the_stack_checked(record, check, stack):
    """Whether a stack check describes the stack the sheet names now: the same path, format
    and array, not changed since the check was written. A check of a stack since replaced,
    moved or edited is stale: rule check_stack checks the stack again before anything uses it.
    """
    if stack is None:
        return True
    path, fmt, internal = stack
    try:
        same = (
            Path(record["path"]).resolve() == Path(path).resolve()
            and record["format"] == fmt
            and record.get("internal_path") == internal
        )
        return same and _latest_time(path) <= check.stat().st_mtime
    except (KeyError, TypeError, OSError):
        return False


def check_tiles_fit_checked_stacks(
    targets, dataset_ids, *, results="results", source="config/config.yaml", stacks=None
):
    """Refuse a tile size larger than the sections of a stack already checked.

    A dataset's stack check (``results/<dataset>/ingest/stack_check.json``, rule check_stack)
    records its shape once the workflow has run. A target whose tiles (``tiles.size`` pixels
    at its working level, ``downsample``) cannot fit on those sections is refused here, when the
    workflow loads; inside rule sample_tiles the same refusal would come after Snakemake had
    cleared the dataset's earlier tiles. Datasets not yet checked are left to that rule.

    Parameters
    ----------
    targets : dict
        The config's ``targets`` (variants included).
    dataset_ids : iterable of str
        The sheet's datasets.
    results : str or Path, optional
        The results folder.
    stacks : dict, optional
        Dataset → (path, format, internal_path) of its stack as the sheet names it now. A check
        of another stack, or of one changed since it was checked, is left out: rule check_stack
        checks the new one first (without this a corrected stack would be refused by the
        record of the one it replaced).

    Examples
    --------
    >>> check_tiles_fit_checked_stacks({"m": {"tiles": {"size": 64}, "downsample": 2,
    ...     "annotations": {"labels": "t/{dataset}.tif"}}}, ["a1"], results="/nonexistent")
    """
    for name, target in targets.items():
        if "labels" not in (target.get("annotations") or {}):
            continue  # painted tiles are cut around points, and sized per point
        size, factor = target["tiles"]["size"], target["downsample"]
        annotated = target.get("annotated_datasets")
        for dataset in dataset_ids:
            check = Path(results) / dataset / "ingest" / "stack_check.json"
            if (annotated is not None and dataset not in annotated) or not check.is_file():
                continue
            try:
                record = read_stack_check(check)
                sides = level_shape(record["shape"], (1, factor, factor))[1:]
            except (TesseraInputError, KeyError, TypeError, ValueError):
                continue  # a damaged record: rule check_stack writes it again
            if not _still_the_stack_checked(record, check, (stacks or {}).get(dataset)):
                continue
            if size > min(sides):
                raise TesseraInputError(
                    f"key targets.{name}.tiles.size: {size} px exceeds the sections of dataset "
                    f"{dataset} at downsample {factor} ({sides[0]} x {sides[1]} px, from "
                    f"{check}); expected at most {min(sides)}",
                    source=source,
                )


def check_prediction_block(block, targets, rungs, *, source="config/config.yaml"):
    """Refuse a ``predict.block`` smaller in y or x than the halo of a target's cascade.

    The halo a shard plan reads its blocks with (:func:`tessera.predict.shard_halo`) follows
    from the cascade's settings and ``output_smoothing_px`` alone. Rule shard_plan refuses such
    a block too, from the trained models, but only after Snakemake has cleared the earlier
    plan; here it is refused when the workflow loads. Where the settings leave the cascade open
    (a ladder's rungs; ``dims: auto`` with ``sigmas`` unset, whose default scales follow the
    dims), the smallest halo they allow is held against the block, so a refusal here holds
    whichever cascade is chosen.

    Parameters
    ----------
    block : sequence of int
        ``predict.block``, z y x.
    targets : dict
        Target → its settings (``cascade``, ``output_smoothing_px``), for the targets whose
        volumes are predicted whole.
    rungs : dict
        Target → the (stages, levels) of every cascade it may predict with.
    source : str, optional
        The config file, named in the error.

    Examples
    --------
    >>> mito = {"cascade": {"stages": 1, "levels": 0, "sigmas": [1.0], "dims": 2},
    ...         "output_smoothing_px": 0.0}
    >>> check_prediction_block([8, 14, 14], {"mito": mito}, {"mito": [(1, 0)]})
    >>> check_prediction_block([8, 13, 64], {"mito": mito}, {"mito": [(1, 0)]})
    Traceback (most recent call last):
    ...
    tessera.errors.TesseraInputError: config/config.yaml: predict.block [8, 13, 64] is smaller in y or x than the model's halo of 14 px: every block would read more halo than core; use blocks of at least 14 px (a few times more is efficient); the halo of target mito, from its cascade settings and output_smoothing_px
    """
    for name, target in targets.items():
        halos = _possible_halos(target, rungs[name])
        problem = halos and block_halo_problem(block, min(halos))
        if problem:
            whence = (
                "from its cascade settings and output_smoothing_px"
                if len(set(halos)) == 1
                else "the smallest its cascade settings allow (its ladder's rungs or dims "
                "auto may need more)"
            )
            raise TesseraInputError(
                f"{problem}; the halo of target {name}, {whence}", source=source
            )


def _possible_halos(target, rungs):
    """The shard halo of every cascade a target's settings allow, over `rungs` and, for
    ``dims: auto``, both dims (a dims the other settings exclude is left out)."""
    cascade = split_cascade_settings(target["cascade"])[0]
    fixed = {k: v for k, v in cascade.items() if v is not None and v != "auto"}
    dims = [{}] if "dims" in fixed else [{"dims": 2}, {"dims": 3}]
    halos = []
    for stages, levels in rungs:
        for chosen in dims:
            try:
                spec = spec_from_settings({**fixed, **chosen, "levels": levels}, stages=stages)
            except TesseraInputError:
                continue  # dims 3 beside neighbours: not a cascade dims auto chooses
            halos.append(shard_halo(spec, output_sigma=target["output_smoothing_px"]))
    return halos
