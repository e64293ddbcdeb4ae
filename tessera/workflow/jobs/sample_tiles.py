"""The sample_tiles rule: annotation tiles of one dataset from a full label volume."""

from pathlib import Path

from tessera.errors import TesseraInputError
from tessera.io.omezarr import open_image, working_level
from tessera.io.tiff_checks import read_checked_tiff
from tessera.tiles.sampling import sample_tiles_from_labels
from tessera.workflow.files.qc_table import excluded_sections
from tessera.workflow.files.tile_registry import write_annotation_set


def sample_tiles_job(
    labels_path,
    image_path,
    qc_table,
    out_dir,
    *,
    dataset,
    target,
    downsample,
    size,
    count,
    seed,
):
    """Sample annotation tiles of one dataset from a full label volume (TIFF stack, >0 = target).

    The label stack is read whole: full label volumes exist for synthetic and open benchmark
    data of modest size; real studies annotate tiles (the painted route) instead.
    """
    _, info = open_image(image_path)
    level = working_level(info["factors"], downsample, source=image_path)
    labels = read_checked_tiff(Path(labels_path))
    if labels.shape != tuple(info["levels"][0].shape):
        raise TesseraInputError(
            f"label volume has shape {labels.shape}, the image {tuple(info['levels'][0].shape)}",
            source=labels_path,
        )
    # the QC table's `excluded` column is the one record of exclusion: it already honours
    # qc.exclude_flagged, and always holds lost (placeholder) sections; level-0 sections,
    # which sample_tiles_from_labels maps to the working level itself
    exclude = excluded_sections(qc_table)
    registry, tile_labels = sample_tiles_from_labels(
        labels,
        dataset=dataset,
        target=target,
        level=level,
        factors=info["factors"][level],
        size=size,
        count=count,
        seed=seed,
        exclude_z=exclude,
    )
    write_annotation_set(out_dir, registry, tile_labels)
    return {"tiles": len(registry), "excluded_sections": exclude, "level": level}
