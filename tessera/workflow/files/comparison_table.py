"""The statistics rule's comparison table, ``results/study/<target>/statistics/comparison.tsv``,
read by the methods text: its one writer and reader."""

import pandas as pd

from tessera.io.atomic import write_table

#: Columns that hold numbers but may be empty (no interval with fewer than 2 animals).
NUMERIC = ("effect", "ci_low", "ci_high")


def write_comparison_table(path, table):
    """Write the comparison of conditions atomically.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "comparison.tsv"
    >>> table = pd.DataFrame({"condition": ["NA"], "effect": [1.5], "ci_low": [float("nan")],
    ...                       "ci_high": [2.0], "warning": [""]})
    >>> write_comparison_table(path, table)
    >>> read_comparison_table(path).to_dict("list")
    {'condition': ['NA'], 'effect': [1.5], 'ci_low': [nan], 'ci_high': [2.0], 'warning': ['']}
    """
    write_table(path, table)


def read_comparison_table(path):
    """The comparison table written by :func:`write_comparison_table`.

    Text cells are kept as written (a condition named ``NA`` stays a name, an empty warning an
    empty string); the effect and its interval are numbers, NaN where empty.
    """
    table = pd.read_csv(path, sep="\t", keep_default_na=False)
    for col in NUMERIC:
        table[col] = pd.to_numeric(table[col], errors="coerce")
    return table
