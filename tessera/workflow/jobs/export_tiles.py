"""The export_tiles rule: tiles cut from the points sheet, for painting."""

from tessera.errors import TesseraInputError
from tessera.io.omezarr import open_image, working_level
from tessera.workflow.files.points import read_points
from tessera.workflow.files.to_paint import export_tiles


def export_tiles_job(
    image_path, points_path, out_dir, *, dataset, target, downsample, size, datasets, targets
):
    """Cut this dataset's tiles of one target from the points sheet, for painting."""
    _, info = open_image(image_path)
    level = working_level(info["factors"], downsample, source=image_path)
    points = read_points(points_path, datasets=datasets, targets=targets)
    mine = points[(points["dataset"] == dataset) & (points["target"] == target)]
    if mine.empty:
        raise TesseraInputError(
            f"no points for dataset {dataset!r} and target {target!r}", source=points_path
        )
    registry = export_tiles(
        info["levels"][level],
        mine,
        level=level,
        factors=info["factors"][level],
        size=size,
        out_dir=out_dir,
    )
    return {"tiles": len(registry), "level": level}
