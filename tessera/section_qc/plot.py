"""Summary plot of the section metrics against z, flagged sections marked."""

import numpy as np
import pandas as pd
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from tessera.errors import TesseraInputError

__all__ = ["plot_sections"]


#: The panels drawn: column, axis label, flag column shown in red, log scale.
PANELS = (
    ("mean", "mean grey value", "flag_intensity", False),
    ("std", "contrast (std)", None, False),
    ("sharpness", "sharpness (var. of Laplacian)", "flag_blurred", True),
    ("flat_fraction", "flat fraction", "flag_flat", False),
    ("shift", "shift from previous (px)", "flag_shift", False),
)
PLOTTED = ("z",) + tuple(panel[0] for panel in PANELS)


def plot_sections(table, path, *, title=""):
    r"""Plot the section metrics against z and mark flagged sections; write a PNG.

    Parameters
    ----------
    table : pandas.DataFrame
        Output of :func:`~tessera.section_qc.metrics.measure_sections` or
        :func:`~tessera.section_qc.flags.flag_sections`. Flag columns are
        optional; when present, flagged sections are marked in every panel and excluded
        sections shaded.
    path : str or path-like
        Output PNG file; its directory must exist.
    title : str, optional
        Figure title.

    Notes
    -----
    Drawn with matplotlib's Agg canvas directly, without pyplot, so no global state or
    display is touched. The PNG carries no software-version metadata, so equal tables give
    equal files.

    Examples
    --------
    >>> import tempfile
    >>> from pathlib import Path
    >>> table = pd.DataFrame({"z": [0, 1, 2], "mean": [100.0, 102.0, 101.0],
    ...                       "std": [20.0, 21.0, 19.0], "sharpness": [50.0, 5.0, 48.0],
    ...                       "flat_fraction": 0.0, "shift_y": 0.0, "shift_x": 0.0, "shift": 0.0,
    ...                       "flag_blurred": [False, True, False]})
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     plot_sections(table, Path(folder) / "sections.png", title="three sections")
    ...     (Path(folder) / "sections.png").read_bytes()[:8]  # the PNG signature
    b'\x89PNG\r\n\x1a\n'
    """
    if not isinstance(table, pd.DataFrame):
        raise TesseraInputError(f"table must be a pandas DataFrame, got {type(table).__name__}")
    missing = [c for c in PLOTTED if c not in table.columns]
    if missing:
        raise TesseraInputError(
            f"table is missing column(s) {missing}; expected the output of measure_sections"
        )
    if len(table) == 0:
        raise TesseraInputError("table must have at least one row")

    z = table["z"].to_numpy()
    fig = Figure(figsize=(8, 10), layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(len(PANELS), 1, sharex=True)
    excluded = table["excluded"].to_numpy(dtype=bool) if "excluded" in table.columns else None
    for ax, (col, label, flag_col, log) in zip(axes, PANELS, strict=True):
        values = table[col].to_numpy(dtype=np.float64)
        if log:
            values = np.where(values > 0, values, np.nan)
            ax.set_yscale("log")
        ax.plot(z, values, color="0.3", linewidth=1, marker=".", markersize=3)
        if excluded is not None:
            for zz in z[excluded]:
                ax.axvspan(zz - 0.5, zz + 0.5, color="tab:red", alpha=0.12, linewidth=0)
        if flag_col is not None and flag_col in table.columns:
            hit = table[flag_col].to_numpy(dtype=bool)
            if hit.any():
                ax.plot(
                    z[hit],
                    values[hit],
                    linestyle="none",
                    marker="o",
                    markersize=6,
                    markerfacecolor="none",
                    color="tab:red",
                    label=flag_col.removeprefix("flag_"),
                )
                ax.legend(loc="upper right", fontsize="small")
        ax.set_ylabel(label, fontsize="small")
    axes[-1].set_xlabel("section z")
    if title:
        fig.suptitle(title)
    fig.savefig(path, format="png", dpi=100, metadata={"Software": None})
