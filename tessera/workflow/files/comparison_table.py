"""The statistics rule's comparison table, ``results/study/<target>/statistics/comparison.tsv``,
read by the methods text: its one writer and reader."""

import pandas as pd

from tessera.io.atomic import write_table

#: Columns that hold numbers but may be empty (no interval with fewer than 2 animals, no mean
#: for a condition without a whole object, no test tiles, no label volumes to score objects
#: on); the ``warning`` column says why in words.
NUMERIC = (
    "mean",
    "reference_mean",
    "effect",
    "ci_low",
    "ci_high",
    "p_value",
    "p_holm",
    "test_f1",
    "test_jaccard",
    "object_f1_3d",
    "count_error_3d",
)


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
    empty string); the columns of :data:`NUMERIC` that the table has are numbers, NaN where
    empty. A study with one condition gives a table with its columns and no rows.
    """
    table = pd.read_csv(path, sep="\t", keep_default_na=False)
    for col in (c for c in NUMERIC if c in table.columns):
        table[col] = pd.to_numeric(table[col], errors="coerce")
    return table
