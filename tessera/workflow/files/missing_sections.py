"""Sections lost before ingest: the ``missing_sections`` entry of the ingest store's metadata.

Ingest writes a blank placeholder for every section missing from a numbered slice folder, so
that z positions and lengths stay right, and records their z here (under the ``tessera``
attribute key of ``results/<dataset>/ingest/raw.ome.zarr``). Section QC reads them back and
marks those sections ``missing`` and excluded. This module is the one writer and one reader of
that entry.
"""

from tessera.errors import TesseraInputError

_KEY = "missing_sections"


def missing_sections_entry(missing):
    """The metadata entry recording the placeholder sections, to merge into ``tessera`` attrs.

    Examples
    --------
    >>> missing_sections_entry((4, 2))
    {'missing_sections': [2, 4]}
    """
    return {_KEY: sorted(int(z) for z in missing)}


def read_missing_sections(extra, *, source=None):
    """The z of the placeholder sections, from the ``tessera`` attrs of an ingest store.

    Parameters
    ----------
    extra : dict
        The store's ``tessera`` attributes (``open_image(...)[1]["extra"]``).
    source : str or Path, optional
        The store, named in error messages.

    Returns
    -------
    list of int
        Sorted; empty for a store written before this entry existed or without gaps.

    Examples
    --------
    >>> read_missing_sections({"missing_sections": [2, 4]}), read_missing_sections({})
    ([2, 4], [])
    """
    value = extra.get(_KEY, [])
    if not isinstance(value, list) or not all(
        isinstance(z, int) and not isinstance(z, bool) and z >= 0 for z in value
    ):
        raise TesseraInputError(
            f"metadata entry tessera.{_KEY} must be a list of section indices >= 0, got {value!r}",
            source=source,
        )
    return sorted(value)
