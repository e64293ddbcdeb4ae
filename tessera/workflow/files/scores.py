"""The tile scores, ``results/study/<target>/tiles_predicted/scores.tsv``: its one writer and reader.

One row per role (``validation``, ``test``): ``role``, ``tiles``, ``informative_tiles`` (those
holding a true or predicted target pixel), ``threshold`` (the one chosen
on the validation tiles, :func:`tessera.threshold.choose_threshold`), ``precision``, ``recall``,
``f1``, ``jaccard`` and ``unsure_fraction`` (the share of the tiles' pixels marked unsure, left
out of the scores). Rule predict_tiles writes it; objects (the default threshold), statistics
and methods read it.
"""

import pandas as pd

from tessera.errors import TesseraInputError
from tessera.io.atomic import write_table


def write_scores(path, table):
    """Write the tile scores table (atomic)."""
    write_table(path, table)


def read_scores(path):
    """The tile scores table as written by :func:`write_scores`.

    Examples
    --------
    >>> import io
    >>> read_scores(io.StringIO("role\\tthreshold\\nvalidation\\t0.48\\n"))["threshold"].tolist()
    [0.48]
    """
    return pd.read_csv(path, sep="\t")


def validation_threshold(scores_path):
    """The threshold chosen on the validation tiles (from the tile scores table).

    Examples
    --------
    >>> import io
    >>> validation_threshold(io.StringIO("role\\tthreshold\\nvalidation\\t0.48\\ntest\\t0.48\\n"))
    0.48
    """
    try:
        table = read_scores(scores_path)
        return float(table.loc[table["role"] == "validation", "threshold"].iloc[0])
    except (FileNotFoundError, KeyError, IndexError, ValueError, pd.errors.ParserError) as exc:
        raise TesseraInputError(
            f"no validation threshold in the tile scores ({exc})", source=scores_path
        ) from None
