"""Sections lost before imaging or in copying: marked ``missing`` and excluded."""

import numpy as np

from tessera.errors import TesseraInputError

__all__ = ["mark_missing"]


def mark_missing(table, missing):
    """Mark placeholder sections ``missing`` and excluded in a flagged QC table.

    A placeholder stands where a section is lost: it holds no data to judge, so its reason is
    ``missing`` alone (not the ``flat`` its blank pixels would give) and it is always excluded,
    whatever ``exclude_flagged`` says for sections that were imaged. Exclusion keeps it out of
    training tiles and lets the objects step bridge across it.

    Parameters
    ----------
    table : pandas.DataFrame
        Output of :func:`~tessera.section_qc.flags.flag_sections` (columns ``z``, ``reason``,
        ``excluded``; ``flag_*`` columns are cleared for the placeholders).
    missing : sequence of int
        The z of the placeholder sections.

    Returns
    -------
    pandas.DataFrame
        A copy of `table` with a boolean column ``flag_missing``.

    Examples
    --------
    >>> import pandas as pd
    >>> t = pd.DataFrame({"z": [0, 1, 2], "flag_flat": [False, True, False],
    ...                   "reason": ["", "flat", ""], "excluded": [False, True, False]})
    >>> out = mark_missing(t, [1])
    >>> out["reason"].tolist(), out["excluded"].tolist(), out["flag_flat"].tolist()
    (['', 'missing', ''], [False, True, False], [False, False, False])
    """
    z = table["z"].to_numpy()
    unknown = sorted(set(int(m) for m in missing) - set(z.tolist()))
    if unknown:
        raise TesseraInputError(
            f"placeholder section(s) {unknown} are not in the QC table (z {z.min()}..{z.max()})"
        )
    lost = np.isin(z, np.asarray(list(missing), dtype=np.int64))
    out = table.copy()
    for column in out.columns:
        if column.startswith("flag_"):
            out.loc[lost, column] = False
    out["flag_missing"] = lost
    out.loc[lost, "reason"] = "missing"
    out.loc[lost, "excluded"] = True
    return out
