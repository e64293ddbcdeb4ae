"""The morphometry rule's tables, read by the statistics rule: their one writer and reader.

``results/<dataset>/morphometry/<target>_objects.tsv`` holds one row per object (the object
table with its measures and ``region``), ``<target>_regions.tsv`` one row per region (densities).
"""

import pandas as pd

from tessera.io.atomic import write_table


def write_object_measures(path, table):
    """Write the measured object table atomically.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "mito_objects.tsv"
    >>> write_object_measures(path, pd.DataFrame({"id": [1], "volume_um3": [0.5], "region": [2]}))
    >>> read_object_measures(path).to_dict("list")
    {'id': [1], 'volume_um3': [0.5], 'region': [2]}
    """
    write_table(path, table)


def read_object_measures(path):
    """The measured object table written by :func:`write_object_measures`."""
    return pd.read_csv(path, sep="\t")


def write_region_densities(path, table):
    """Write the per-region densities atomically.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "mito_regions.tsv"
    >>> write_region_densities(path, pd.DataFrame({"region": [1], "N_V": [0.25]}))
    >>> read_region_densities(path).to_dict("list")
    {'region': [1], 'N_V': [0.25]}
    """
    write_table(path, table)


def read_region_densities(path):
    """The per-region densities written by :func:`write_region_densities`."""
    return pd.read_csv(path, sep="\t")
