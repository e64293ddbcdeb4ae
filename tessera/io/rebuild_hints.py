"""What to tell the user about a damaged store: the hook through which an application words it.

The io layer finds the damage (:mod:`tessera.io.store_checksums` refuses a chunk whose SHA-256
does not match its record) but cannot know which step of which application wrote a store, or how
to run that step again. An application that knows registers two functions with
:func:`set_rebuild_hints`:

- ``writer(store)``: a short name of the step that writes `store` (or None). Checksum manifests
  of hard-linked arrays record it beside the source store, so a message about the copy can name
  the step that rebuilds the source too.
- ``hint(store, *, linked_from=None)``: the remedy ending every message about a damaged store;
  `linked_from` is the manifest's ``{"store": ..., "rule": ...}`` record of a hard-linked array.

The workflow registers its results-path grammar (:mod:`tessera.workflow.paths` does so when it is
imported, and importing anything of :mod:`tessera.workflow` imports it), so within a workflow job
every message names the rule to rerun. Without a registration a message says to rebuild the
store with the step that wrote it.

The registration is process-wide state, read at the moment a message is made: readers such as
``open_image`` are called from many places, none of which needs to pass a hint along. This module
imports nothing, so registering costs a job no import time and ties no rule's code version to
the store readers.
"""

__all__ = ["generic_rebuild_hint", "rebuild_hint", "set_rebuild_hints", "store_writer"]


def _unknown_writer(store):
    return None


def generic_rebuild_hint(store, *, linked_from=None):
    """The remedy for a damaged `store` when no application has said how it is rebuilt.

    Parameters
    ----------
    store : str or Path
        The damaged store.
    linked_from : dict, optional
        ``{"store": ...}``: the store its files are hard-linked from.

    Returns
    -------
    str

    Examples
    --------
    >>> generic_rebuild_hint("out/raw.ome.zarr")
    'rebuild out/raw.ome.zarr with the step that wrote it'
    >>> generic_rebuild_hint("out/b.zarr", linked_from={"store": "out/a.zarr"})
    'rebuild out/b.zarr with the step that wrote it; its files are hard-linked from out/a.zarr: if that store is damaged too, rebuild it first'
    """
    hint = f"rebuild {store} with the step that wrote it"
    if linked_from:
        hint += (
            f"; its files are hard-linked from {linked_from.get('store')}: "
            "if that store is damaged too, rebuild it first"
        )
    return hint


_HOOKS = {"writer": _unknown_writer, "hint": generic_rebuild_hint}


def set_rebuild_hints(*, writer, hint):
    """Register how this application names the writer of a store and words the remedy.

    Parameters
    ----------
    writer : callable
        ``writer(store) -> str or None``.
    hint : callable
        ``hint(store, *, linked_from=None) -> str``.

    Returns
    -------
    dict
        The previous registration, as keywords for this function (to restore it).

    Examples
    --------
    >>> previous = set_rebuild_hints(
    ...     writer=lambda store: "make", hint=lambda store, *, linked_from=None: f"run make ({store})"
    ... )
    >>> store_writer("a.zarr"), rebuild_hint("a.zarr")
    ('make', 'run make (a.zarr)')
    >>> _ = set_rebuild_hints(**previous)
    """
    previous = dict(_HOOKS)
    _HOOKS.update(writer=writer, hint=hint)
    return previous


def store_writer(store):
    """The registered name of the step that writes `store`, or None.

    Examples
    --------
    >>> store_writer("elsewhere/x.zarr") is None
    True
    """
    return _HOOKS["writer"](store)


def rebuild_hint(store, *, linked_from=None):
    """The registered remedy for a damaged `store` (and the store its files are linked from).

    Examples
    --------
    >>> rebuild_hint("elsewhere/x.zarr")
    'rebuild elsewhere/x.zarr with the step that wrote it'
    """
    return _HOOKS["hint"](store, linked_from=linked_from)
