"""The ladder's files: each rung's validation score,
``results/study/<target>/ladder/rung_<stages>x<levels>.tsv`` (one writer: rule score_rung; one
reader: rule choose_rung), and the choice, ``results/study/<target>/ladder/choice.tsv`` (one
writer: checkpoint choose_rung; one reader, :func:`chosen_rung`, through which the rules that
predict with the cascade pick their node files).

A rung score is one row: ``stages``, ``levels``, ``tiles``, ``pixels``, ``threshold`` (chosen on
the validation tiles), ``precision``, ``recall``, ``f1``, ``jaccard``. The choice adds ``rung``,
``nodes`` and ``chosen`` (one row True) to every rung's row (:func:`tessera.ladder.choose_rung`).
"""

import pandas as pd

from tessera.errors import TesseraInputError
from tessera.io.atomic import write_table

SCORE_COLUMNS = ("stages", "levels", "tiles", "pixels", "threshold", "precision", "recall", "f1")
_REBUILD = (
    "rerun rule choose_rung to rebuild it (delete the file, or snakemake --forcerun choose_rung)"
)


def write_rung_score(path, row):
    """Write one rung's validation score (a mapping with ``SCORE_COLUMNS``; atomic)."""
    write_table(path, pd.DataFrame([row]))


def read_rung_scores(paths):
    """Every rung score file of `paths` as one table (one row each).

    Examples
    --------
    >>> import io
    >>> text = "stages\\tlevels\\ttiles\\tpixels\\tthreshold\\tprecision\\trecall\\tf1\\n2\\t1\\t3\\t90\\t0.5\\t0.8\\t0.7\\t0.75\\n"
    >>> read_rung_scores([io.StringIO(text)])[["stages", "f1"]].values.tolist()
    [[2.0, 0.75]]
    """
    rows = []
    for path in paths:
        try:
            table = pd.read_csv(path, sep="\t")
        except (OSError, ValueError, pd.errors.ParserError) as exc:
            raise TesseraInputError(
                f"not a readable rung score ({exc}); rerun rule score_rung", source=path
            ) from None
        missing = [c for c in SCORE_COLUMNS if c not in table.columns]
        if len(table) != 1 or missing:
            raise TesseraInputError(
                f"expected one row with columns {list(SCORE_COLUMNS)}, found {len(table)} row(s), "
                f"missing {missing}; rerun rule score_rung",
                source=path,
            )
        rows.append(table)
    return pd.concat(rows, ignore_index=True)


def write_choice(path, table):
    """Write the ladder's choice table (atomic)."""
    write_table(path, table)


def chosen_rung(path):
    """(stages, levels) of the rung the ladder chose, from the choice table.

    Raises
    ------
    TesseraInputError
        Missing or damaged table, or not exactly one chosen rung (naming the file and the rule
        that rebuilds it).

    Examples
    --------
    >>> import io
    >>> chosen_rung(io.StringIO("rung\\tstages\\tlevels\\tchosen\\n2x2\\t2\\t2\\tFalse\\n3x2\\t3\\t2\\tTrue\\n"))
    (3, 2)
    """
    try:
        table = pd.read_csv(path, sep="\t")
        picked = table[table["chosen"].astype(str) == "True"]
    except (OSError, KeyError, ValueError, pd.errors.ParserError) as exc:
        raise TesseraInputError(
            f"no choice in the ladder table ({exc}); {_REBUILD}", source=path
        ) from None
    if len(picked) != 1:
        raise TesseraInputError(
            f"column chosen: expected exactly one rung marked True, found {len(picked)}; {_REBUILD}",
            source=path,
        )
    try:
        return int(picked["stages"].iloc[0]), int(picked["levels"].iloc[0])
    except (KeyError, ValueError, TypeError) as exc:
        raise TesseraInputError(f"columns stages, levels: {exc}; {_REBUILD}", source=path) from None
