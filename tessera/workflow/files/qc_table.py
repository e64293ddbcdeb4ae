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
