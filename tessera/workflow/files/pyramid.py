"""Reading the pyramid (``results/<dataset>/pyramid/raw.ome.zarr``) at a target's working level."""

from tessera.errors import TesseraInputError
from tessera.io.omezarr import open_image, working_level


def working_array(pyramid, downsample):
    """(array, spacing, factors) of the pyramid level downsampled `downsample` times in-plane."""
    _, info = open_image(pyramid)
    level = working_level(info["factors"], downsample, source=pyramid)
    spacing = tuple(s * f for s, f in zip(info["spacing"], info["factors"][level], strict=False))
    return info["levels"][level], spacing, info["factors"][level]


def level_arrays(pyramids, registry, *, downsample):
    """Dataset id → the working-level array of every dataset the registry names."""
    arrays = {}
    for dataset in sorted(set(registry["dataset"])):
        if dataset not in pyramids:
            raise TesseraInputError(
                f"tiles name dataset {dataset!r}, which has no image in this study"
            )
        arrays[dataset] = working_array(pyramids[dataset], downsample)[0]
    return arrays
