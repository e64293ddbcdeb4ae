"""The section QC table, ``results/<dataset>/qc/sections.tsv``: its one reader."""

import pandas as pd


def excluded_sections(qc_table, z_factor=1):
    """Sections of a working level (z reduced by `z_factor`) that QC excluded.

    Examples
    --------
    >>> import io
    >>> table = io.StringIO("z\\texcluded\\n0\\tFalse\\n1\\tTrue\\n2\\tFalse\\n3\\tTrue\\n")
    >>> excluded_sections(table), excluded_sections(io.StringIO(table.getvalue()), z_factor=2)
    ([1, 3], [0, 1])
    """
    table = pd.read_csv(qc_table, sep="\t", keep_default_na=False)
    return sorted(
        {int(z) // z_factor for z in table.loc[table["excluded"].astype(str) == "True", "z"]}
    )


def read_qc_table(path):
    """The QC table as written, with ``excluded`` as booleans and empty cells as ``""``.

    Examples
    --------
    >>> import io
    >>> table = read_qc_table(io.StringIO("z\\treason\\texcluded\\n0\\t\\tFalse\\n1\\tflat\\tTrue\\n"))
    >>> table["reason"].tolist(), table["excluded"].tolist()
    (['', 'flat'], [False, True])
    """
    table = pd.read_csv(path, sep="\t", keep_default_na=False)
    table["excluded"] = table["excluded"].astype(str) == "True"
    return table


def count_sections(qc_tables):
    """Number of sections, and of excluded sections, over several QC tables.

    Examples
    --------
    >>> import io
    >>> tables = [io.StringIO("z\\texcluded\\n0\\tFalse\\n1\\tTrue\\n"),
    ...           io.StringIO("z\\texcluded\\n0\\tTrue\\n1\\tTrue\\n2\\tFalse\\n")]
    >>> count_sections(tables)
    {'sections': 5, 'excluded': 3}
    """
    tables = [read_qc_table(path) for path in qc_tables]
    return {
        "sections": sum(len(t) for t in tables),
        "excluded": sum(int(t["excluded"].sum()) for t in tables),
    }
