"""The import_tiles rule: painted masks read back and registered as an annotation set."""

from pathlib import Path

from tessera.errors import TesseraInputError
from tessera.workflow.files.tile_registry import write_annotation_set
from tessera.workflow.files.to_paint import import_painted


def import_tiles_job(
    exported_dir, masks_dir, out_dir, *, ignore_value=None, allow_single_class=False
):
    """Read the painted masks of exported tiles and register them as an annotation set."""
    if masks_dir is None or not Path(masks_dir).is_dir():
        raise TesseraInputError(
            f"no painted masks yet: paint the tiles in {exported_dir} (previews *.preview.png) and "
            f"save one mask per tile as <tile_id>.png (0 = background, 1 or 255 = target) in the "
            f"folder named by annotations.painted.masks",
            source=masks_dir,
        )
    registry, labels = import_painted(
        exported_dir, masks_dir, ignore_value=ignore_value, allow_single_class=allow_single_class
    )
    write_annotation_set(out_dir, registry, labels)
    return {"tiles": len(registry)}
