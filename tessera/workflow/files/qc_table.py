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
    """The section QC table as written, one row per section (cells kept as text where not numbers).

    Examples
    --------
    >>> import io
    >>> table = read_qc_table(io.StringIO("z\\texcluded\\tnote\\n0\\tFalse\\t\\n1\\tTrue\\tNA\\n"))
    >>> table["excluded"].tolist(), table["note"].tolist()
    ([False, True], ['', 'NA'])
    """
    return pd.read_csv(path, sep="\t", keep_default_na=False)
