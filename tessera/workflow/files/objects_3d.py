"""The 3D object scores, ``results/study/<target>/evaluation/objects_3d.tsv``: its one writer
(rule evaluate_objects) and its one reader (rules methods and statistics).

One row per dataset and one ``all`` row: the stitched objects on the held-out test sections
against the true objects (an instance volume, or the connected components of the labels).
"""

import pandas as pd

from tessera.io.atomic import write_table


def write_objects_3d(path, table):
    """Write the 3D object scores table (atomic)."""
    write_table(path, table)


def read_objects_3d(path):
    """The table written by :func:`write_objects_3d`.

    Examples
    --------
    >>> import io
    >>> table = read_objects_3d(io.StringIO("dataset\\tobject_f1\\nw1\\t0.7\\nall\\t0.75\\n"))
    >>> table["object_f1"].tolist()
    [0.7, 0.75]
    """
    return pd.read_csv(path, sep="\t", keep_default_na=False, na_values=["", "NaN", "nan"])


def overall_objects_3d(path):
    """The ``all`` row of the 3D object scores as a dict of plain values.

    Examples
    --------
    >>> import io
    >>> text = "dataset\\ttruth_source\\tobject_f1\\nw1\\tinstances\\t0.7\\nall\\tinstances\\t0.75\\n"
    >>> overall_objects_3d(io.StringIO(text))
    {'dataset': 'all', 'truth_source': 'instances', 'object_f1': 0.75}
    """
    table = read_objects_3d(path)
    row = table[table["dataset"] == "all"].iloc[0]
    return {k: (v.item() if hasattr(v, "item") else v) for k, v in row.items()}
