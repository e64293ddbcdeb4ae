"""The results path grammar: where rules write, and which rule wrote a given path.

This module is the one owner, on the Python side, of the ``results/<dataset>/<stage>/...``
patterns that code needs to reason about (the rules in ``rules/*.smk`` declare the same patterns
as their outputs; ``tests/test_chunksums.py`` checks the two agree).

Importing it registers the workflow's wording for damaged stores with the io layer
(:func:`tessera.io.rebuild_hints.set_rebuild_hints`): a damaged chunk is then reported with the
rule that rebuilds its store. :mod:`tessera.workflow` imports this module, so every job (and every
test of workflow code) reports damage that way, while :mod:`tessera.io` never imports the
workflow.
"""

import re
from pathlib import Path

from tessera.io.rebuild_hints import set_rebuild_hints

__all__ = ["STORES", "rebuild_hint", "store_rule"]

#: The OME-Zarr stores of a study, by the rule that writes them (its output pattern). Order
#: matters to :func:`store_rule`: the first pattern a path matches names its rule.
STORES = {
    "ingest": "results/{dataset}/ingest/raw.ome.zarr",
    "pyramid": "results/{dataset}/pyramid/raw.ome.zarr",
    "stitch": "results/{dataset}/predicted/{target}/probability.ome.zarr",
    "objects": "results/{dataset}/objects/{target}.ome.zarr",
}
# A store is recognised by its path below the dataset folder, wherever the results folder is.
_BELOW_DATASET = "results/{dataset}/"


def _tail_matcher(pattern):
    """(number of path components, regex) matching the part of `pattern` below the dataset."""
    tail = pattern.removeprefix(_BELOW_DATASET)
    pieces = re.split(r"(\{\w+\})", tail)
    regex = "".join("[^/]*" if p.startswith("{") else re.escape(p) for p in pieces)
    return tail.count("/") + 1, re.compile(regex)


_MATCHERS = {rule: _tail_matcher(pattern) for rule, pattern in STORES.items()}


def store_rule(store):
    """The workflow rule that writes the store at `store`, from the results path grammar; or None.

    Parameters
    ----------
    store : str or Path
        A store path, relative or absolute (the results folder may be anywhere).

    Returns
    -------
    str or None

    Examples
    --------
    >>> store_rule("results/d1/pyramid/raw.ome.zarr"), store_rule("results/d1/objects/mito.ome.zarr")
    ('pyramid', 'objects')
    >>> store_rule("results/d1/predicted/mito/probability.ome.zarr"), store_rule("elsewhere/x.zarr")
    ('stitch', None)
    """
    parts = Path(store).parts
    for rule, (count, regex) in _MATCHERS.items():
        if len(parts) >= count and regex.fullmatch("/".join(parts[-count:])):
            return rule
    return None


def rebuild_hint(store, *, linked_from=None):
    """What to do about a damaged store: the rule to rerun (and the store its files come from).

    Parameters
    ----------
    store : str or Path
        The damaged store.
    linked_from : dict, optional
        The ``linked_from`` record of a hard-linked array's checksum manifest:
        ``{"store": <source store>, "rule": <rule that writes it, or None>}``.

    Returns
    -------
    str

    Examples
    --------
    >>> rebuild_hint("results/d1/ingest/raw.ome.zarr")
    'rerun rule ingest to rebuild results/d1/ingest/raw.ome.zarr (delete it, or snakemake --forcerun ingest)'
    """
    rule = store_rule(store)
    if rule is None:
        hint = f"rebuild {store} with the step that wrote it"
    else:
        hint = f"rerun rule {rule} to rebuild {store} (delete it, or snakemake --forcerun {rule})"
    if linked_from:
        source, source_rule = linked_from.get("store"), linked_from.get("rule")
        first = f"rerun rule {source_rule} first" if source_rule else "rebuild it first"
        hint += f"; its files are hard-linked from {source}: if that store is damaged too, {first}"
    return hint


set_rebuild_hints(writer=store_rule, hint=rebuild_hint)
