"""The section QC job: measure and flag every section of one dataset, write its table and plot."""

from tessera.io.atomic import atomic_path
from tessera.io.omezarr import open_image
from tessera.section_qc.flags import flag_sections
from tessera.section_qc.metrics import measure_sections
from tessera.section_qc.missing import mark_missing
from tessera.section_qc.plot import plot_sections
from tessera.workflow.files.missing_sections import read_missing_sections
from tessera.workflow.files.qc_table import write_qc_table


def section_qc_job(
    image_path,
    *,
    table_path,
    plot_path,
    title="",
    flat_block=16,
    flat_std=2.0,
    sharpness_sigma=1.5,
    max_flat_fraction=0.1,
    sharpness_z=3.5,
    min_sharpness_drop=0.5,
    intensity_z=3.5,
    min_intensity_change=10.0,
    max_shift_px=20.0,
    shift_crop=1024,
    exclude_flagged=True,
):
    """Measure and flag every section of an OME-Zarr image (level 0); write the table and plot.

    Both outputs are written under temporary names and renamed, so a killed job leaves no
    half-written file behind. Placeholders that ingest wrote for lost sections are marked
    ``missing`` and excluded.

    Returns
    -------
    dict
        Number of sections, and the z of flagged and of excluded sections.
    """
    _, info = open_image(image_path)
    table = measure_sections(
        info["levels"][0],
        flat_block=flat_block,
        flat_std=flat_std,
        sharpness_sigma=sharpness_sigma,
        shift_crop=shift_crop,
    )
    table = flag_sections(
        table,
        max_flat_fraction=max_flat_fraction,
        sharpness_z=sharpness_z,
        min_sharpness_drop=min_sharpness_drop,
        intensity_z=intensity_z,
        min_intensity_change=min_intensity_change,
        max_shift_px=max_shift_px,
        exclude_flagged=exclude_flagged,
    )
    table = mark_missing(table, read_missing_sections(info["extra"], source=image_path))
    write_qc_table(table, table_path)
    with atomic_path(plot_path) as tmp:
        plot_sections(table, tmp, title=title)
    flagged = table["reason"] != ""
    return {
        "sections": int(len(table)),
        "flagged": {
            int(z): r for z, r in zip(table["z"][flagged], table["reason"][flagged], strict=True)
        },
        "excluded": [int(z) for z in table["z"][table["excluded"]]],
    }
