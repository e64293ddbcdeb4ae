"""The section QC table, ``results/<dataset>/qc/sections.tsv``: its one writer and its readers.

One row per section, tab-separated: the metrics of
:func:`~tessera.section_qc.metrics.measure_sections` and the flags of
:func:`~tessera.section_qc.flags.flag_sections`, floats with 6 significant digits, booleans as
``True``/``False``, the ``reason`` column empty for an unflagged section. The section QC job
writes it; tile sampling, training and scoring tiles (for the stand-ins of excluded sections),
the shard plan, objects, next tiles and the methods paragraph read it. Reading it
through the functions here keeps every reader in agreement on which sections are excluded.
"""

import pandas as pd

from tessera.errors import TesseraInputError
from tessera.io.atomic import atomic_path

# The columns every reader relies on.
_READ_COLUMNS = ("z", "excluded")


def write_qc_table(table, path):
    """Write the QC table atomically: a killed job leaves the previous file or none.

    Parameters
    ----------
    table : pandas.DataFrame
        Output of :func:`~tessera.section_qc.flags.flag_sections` (or of
        :func:`~tessera.section_qc.metrics.measure_sections`).
    path : str or path-like
        Output file; its directory must exist.

    Examples
    --------
    >>> import tempfile
    >>> from pathlib import Path
    >>> table = pd.DataFrame({"z": [0, 1], "sharpness": [1 / 3, 2.0], "reason": ["", "flat"],
    ...                       "excluded": [False, True]})
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     write_qc_table(table, Path(folder) / "sections.tsv")
    ...     print((Path(folder) / "sections.tsv").read_text(), end="")
    z	sharpness	reason	excluded
    0	0.333333		False
    1	2	flat	True
    """
    if not isinstance(table, pd.DataFrame):
        raise TesseraInputError(f"table must be a pandas DataFrame, got {type(table).__name__}")
    with atomic_path(path) as tmp:
        table.to_csv(tmp, sep="\t", index=False, float_format="%.6g", lineterminator="\n")


def read_qc_table(path):
    """The QC table as written, with ``excluded`` as booleans and empty reasons as ``""``.

    Parameters
    ----------
    path : str, path-like or file-like
        A table written by :func:`write_qc_table`.

    Returns
    -------
    pandas.DataFrame
        Every column, in the file's order.

    Examples
    --------
    >>> import io
    >>> table = read_qc_table(io.StringIO("z\\treason\\texcluded\\n0\\t\\tFalse\\n1\\tflat\\tTrue\\n"))
    >>> table["reason"].tolist(), table["excluded"].tolist()
    (['', 'flat'], [False, True])
    """
    table = pd.read_csv(path, sep="\t", keep_default_na=False)
    missing = [c for c in _READ_COLUMNS if c not in table.columns]
    if missing:
        raise TesseraInputError(
            f"missing column(s) {missing}; expected a section QC table with columns z and excluded",
            source=path,
        )
    table["excluded"] = table["excluded"].astype(str) == "True"
    return table


def excluded_sections(qc_table, z_factor=1):
    """Sections of a working level (z reduced by `z_factor`) that QC excluded.

    Examples
    --------
    >>> import io
    >>> table = io.StringIO("z\\texcluded\\n0\\tFalse\\n1\\tTrue\\n2\\tFalse\\n3\\tTrue\\n")
    >>> excluded_sections(table), excluded_sections(io.StringIO(table.getvalue()), z_factor=2)
    ([1, 3], [0, 1])
    """
    table = read_qc_table(qc_table)
    return sorted({int(z) // z_factor for z in table.loc[table["excluded"], "z"]})


def count_sections(qc_tables):
    """Sections checked, flagged and excluded over the QC tables, and how many per reason.

    A section's ``reason`` lists its flags joined by ``;``; each is counted as written, so a
    kind of flag added later is counted without a change here. A table without ``reason``
    counts its excluded sections as flagged (reasons unknown).

    Examples
    --------
    >>> import io
    >>> tables = [io.StringIO("z\\treason\\texcluded\\n0\\t\\tFalse\\n1\\tflat\\tTrue\\n"),
    ...           io.StringIO("z\\treason\\texcluded\\n0\\tblurred;shift\\tTrue\\n1\\tflat\\tTrue\\n")]
    >>> count_sections(tables)
    {'sections': 4, 'flagged': 3, 'excluded': 3, 'reasons': {'flat': 2, 'blurred': 1, 'shift': 1}}
    """
    counts = {"sections": 0, "flagged": 0, "excluded": 0, "reasons": {}}
    for path in qc_tables:
        table = read_qc_table(path)
        reasons = table["reason"].astype(str) if "reason" in table.columns else None
        flagged = table["excluded"] if reasons is None else reasons.str.strip() != ""
        counts["sections"] += len(table)
        counts["flagged"] += int(flagged.sum())
        counts["excluded"] += int(table["excluded"].sum())
        for text in [] if reasons is None else reasons:
            for reason in filter(None, (r.strip() for r in text.split(";"))):
                counts["reasons"][reason] = counts["reasons"].get(reason, 0) + 1
    return counts
