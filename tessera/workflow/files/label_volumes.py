"""Label and instance volumes named by ``targets.<t>.annotations``: multi-page TIFFs, > 0 = target.

One reader for every rule that takes them (sample_tiles, evaluate_objects), so a volume is held
to the same checks wherever it is read.
"""

from pathlib import Path

import numpy as np

from tessera.errors import TesseraInputError
from tessera.io.tiff_checks import read_checked_tiff


def read_label_volume(path, shape, what="label volume"):
    """The whole volume at `path`, checked against the image's level-0 `shape`.

    It must have that shape and hold integers >= 0 (0 background). A negative value is no
    label: it comes from a signed type that wrapped, or from another kind of image.
    """
    volume = read_checked_tiff(Path(path))
    if volume.shape != tuple(shape):
        raise TesseraInputError(
            f"{what} has shape {volume.shape}, the image {tuple(shape)}", source=path
        )
    if volume.dtype.kind not in "iub":
        raise TesseraInputError(
            f"{what} must hold integers (0 background), got {volume.dtype}", source=path
        )
    if volume.dtype.kind == "i" and volume.size and volume.min() < 0:
        raise TesseraInputError(
            f"{what} holds negative values (lowest {volume.min()}); expected 0 for background "
            "and labels > 0",
            source=path,
        )
    return volume


def check_both_classes(volume, path, target):
    """Refuse a label volume without target or without background: its tiles teach nothing.

    An all-zero volume is most often the wrong file (an unsaved or empty export), and one that is
    target everywhere a mask written inverted or as a constant.
    """
    target_voxels = int(np.count_nonzero(volume))
    if target_voxels == 0:
        raise TesseraInputError(
            f"label volume has no {target} voxels (every voxel is 0); expected values > 0 "
            f"where the {target} are (if this dataset truly holds none, leave it out of the "
            "target's annotated_datasets)",
            source=path,
        )
    if target_voxels == volume.size:
        raise TesseraInputError(
            f"label volume has no background voxels (every voxel is > 0); expected 0 where "
            f"there is no {target}",
            source=path,
        )
