"""Reading the pyramid (``results/<dataset>/pyramid/raw.ome.zarr``) at a target's working level."""

from tessera.errors import TesseraInputError
from tessera.io.omezarr import open_image, working_level
from tessera.section_qc.stand_ins import stand_in_pairs, through_stand_ins
from tessera.workflow.files.qc_table import excluded_sections


def working_array(pyramid, downsample):
    """(array, spacing, factors) of the pyramid level downsampled `downsample` times in-plane."""
    _, info = open_image(pyramid)
    level = working_level(info["factors"], downsample, source=pyramid)
    spacing = tuple(s * f for s, f in zip(info["spacing"], info["factors"][level], strict=False))
    return info["levels"][level], spacing, info["factors"][level]


def working_stand_ins(qc_table, array, factors):
    """``[[z, stand-in], ...]`` of a working-level array: each section the section QC table
    excludes, with the kept section read in its place
    (:func:`tessera.section_qc.stand_ins.stand_in_sections`)."""
    try:
        return stand_in_pairs(array.shape[0], excluded_sections(qc_table, factors[0]))
    except TesseraInputError as error:
        raise TesseraInputError(str(error), source=qc_table) from None


def level_arrays(pyramids, registry, *, downsample, qc_tables=None):
    """Dataset id → the working-level array of every dataset the registry names.

    With `qc_tables` (dataset id → section QC table), every read of a section QC excluded
    takes its stand-in instead, as whole-volume prediction does (:func:`working_stand_ins`).
    """
    arrays = {}
    for dataset in sorted(set(registry["dataset"])):
        if dataset not in pyramids:
            raise TesseraInputError(
                f"tiles name dataset {dataset!r}, which has no image in this study"
            )
        array, _, factors = working_array(pyramids[dataset], downsample)
        if qc_tables is not None:
            array = through_stand_ins(array, working_stand_ins(qc_tables[dataset], array, factors))
        arrays[dataset] = array
    return arrays


# Voxel aspects (z / in-plane) closer than this factor count as one for a 3D cascade.
ASPECT_TOLERANCE = 1.05


def aspects_agree(a, b):
    """Whether two working-level voxel aspects are close enough to share one 3D model.

    Examples
    --------
    >>> aspects_agree(1.0, 1.04), aspects_agree(1.0, 1.1)
    (True, False)
    """
    return 1 / ASPECT_TOLERANCE <= a / b <= ASPECT_TOLERANCE


def working_spacings(pyramids, datasets, *, downsample):
    """Each dataset's working-level voxel size (z, y, x nm): {dataset: spacing}, sorted."""
    return {d: working_array(pyramids[d], downsample)[1] for d in sorted(datasets)}


def working_aspects(pyramids, datasets, *, downsample):
    """Each dataset's working-level z spacing over its in-plane spacing: {dataset: aspect}."""
    spacings = working_spacings(pyramids, datasets, downsample=downsample)
    return {d: spacing[0] / spacing[1] for d, spacing in spacings.items()}


def pixel_size_spread(pyramids, datasets, *, downsample):
    """The datasets of smallest and largest in-plane pixel (nm) at the working level, when they
    differ by more than the aspect tolerance; else None.

    The filters' sigmas and the context stencils count pixels, so one model applied to pixels
    of other sizes sees every structure at another scale.
    """
    spacings = working_spacings(pyramids, datasets, downsample=downsample)
    sizes = {d: spacing[1] for d, spacing in spacings.items()}
    low, high = min(sizes, key=sizes.get), max(sizes, key=sizes.get)
    if sizes[high] <= sizes[low] * ASPECT_TOLERANCE:
        return None
    return (low, sizes[low]), (high, sizes[high])


def working_aspect(pyramids, datasets, *, downsample):
    """The working level's z spacing over its in-plane spacing, common to `datasets`.

    A 3D cascade scales its filters along z by it (``cascade.voxel_aspect``); left unset in the
    config, it is read from the data here. Datasets whose aspects differ by more than 5 % cannot
    share one 3D model: refused, naming them.
    """
    aspects = working_aspects(pyramids, datasets, downsample=downsample)
    low, high = min(aspects, key=aspects.get), max(aspects, key=aspects.get)
    if not aspects_agree(aspects[high], aspects[low]):
        raise TesseraInputError(
            f"datasets {low} and {high} have working-level voxel aspects (z / in-plane) "
            f"{aspects[low]:.3g} and {aspects[high]:.3g}; a 3D cascade needs one: set "
            "cascade.voxel_aspect, or use dims 2"
        )
    return round(sum(aspects.values()) / len(aspects), 4)
