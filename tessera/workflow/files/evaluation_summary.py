"""The evaluation summary, ``results/study/<target>/evaluation/summary.tsv``: its one writer
(rule evaluate) and its one reader (rule downsampling_study).

One row per dataset and one ``all`` row over every test tile: pixel precision, recall, F1 and
Jaccard with their intervals, average precision and object scores at the validation threshold.
"""

import pandas as pd

from tessera.io.atomic import write_table


def write_evaluation_summary(path, table):
    """Write the evaluation summary table (atomic)."""
    write_table(path, table)


def overall_scores(path):
    """The ``all`` row of an evaluation summary: the scores over every test tile.

    Examples
    --------
    >>> import io
    >>> summary = io.StringIO("dataset\\tf1\\nw1\\t0.8\\nall\\t0.85\\n")
    >>> float(overall_scores(summary)["f1"])
    0.85
    """
    table = pd.read_csv(path, sep="\t")
    return table[table["dataset"] == "all"].iloc[0]
