"""The objects rule's tables: ``results/<dataset>/objects/<target>.tsv`` (one row per object)
and ``<target>.json`` (the settings the objects were made with); their one writer and reader.

Morphometry and meshes read the table, the methods text reads the settings.
"""

import json
from pathlib import Path

import pandas as pd

from tessera.io.atomic import write_table, write_text


def write_object_table(path, table):
    """Write the object table (as :func:`tessera.objects.label_objects` returns it) atomically.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "mito.tsv"
    >>> write_object_table(path, pd.DataFrame({"id": [1, 2], "voxels": [4, 8]}))
    >>> read_object_table(path).to_dict("list")
    {'id': [1, 2], 'voxels': [4, 8]}
    """
    write_table(path, table)


def read_object_table(path):
    """The object table written by :func:`write_object_table`."""
    return pd.read_csv(path, sep="\t")


def write_object_settings(path, settings):
    """Write the settings the objects were made with (a JSON object, one key a line).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "mito.json"
    >>> write_object_settings(path, {"high": 0.5, "low": 0.3, "max_volume_um3": None})
    >>> read_object_settings(path)
    {'high': 0.5, 'low': 0.3, 'max_volume_um3': None}
    """
    write_text(path, json.dumps(settings, indent=1) + "\n")


def read_object_settings(path):
    """The settings written by :func:`write_object_settings`, as a dict."""
    return json.loads(Path(path).read_text(encoding="utf-8"))
