"""Rules check_labels and sample_tiles: a label volume checked whole, then annotation tiles of
one dataset cut from it."""

import logging

import numpy as np
from scipy import ndimage

from tessera.errors import TesseraInputError
from tessera.io.omezarr import open_image, working_level
from tessera.tiles.sampling import (
    annotated_working_sections,
    sample_tiles_from_labels,
    unannotated_sections,
)
from tessera.workflow.files.label_volumes import check_both_classes, read_label_volume
from tessera.workflow.files.labels_check import read_labels_check, write_labels_check
from tessera.workflow.files.qc_table import excluded_sections
from tessera.workflow.files.tile_registry import write_annotation_set

_log = logging.getLogger(__name__)


#: Least foreground Jaccard between a target's instance volume and its label volume: the two
#: annotate the same organelles, so they may differ only at a few edge voxels.
MIN_INSTANCE_AGREEMENT = 0.9


#: A run of sections without a target voxel at least this share of the stack (and 3 sections)
#: is logged as possibly not annotated, when every section counts as annotated.
UNLABELLED_RUN_SHARE = 0.2


def check_labels_job(
    labels_path,
    image_path,
    out_path,
    *,
    target,
    instances_path=None,
    pyramid_path=None,
    downsample=None,
    sections="all",
):
    """Read a label volume whole and check it against the dataset's image; write the check.

    The volume must have the image's level-0 shape, hold integers >= 0 and both target and
    background (:func:`tessera.workflow.files.label_volumes.read_label_volume`,
    :func:`~tessera.workflow.files.label_volumes.check_both_classes`). An instance volume, when
    the target has one, must have that shape too and cover the same voxels (> 0): a foreground
    Jaccard of at least :data:`MIN_INSTANCE_AGREEMENT`, or the objects would be scored against
    other organelles than the pixels; and it must number them: one id over objects the labels
    hold apart is a mask, refused.

    With ``sections: labelled`` (:func:`tessera.tiles.sampling.unannotated_sections`), some
    section of the target's working level (the `pyramid_path` level at `downsample`) must be
    wholly labelled, or rule sample_tiles could cut no tile: refused here, before that rule
    clears the dataset's earlier tiles. (The check is shared by the targets reading the same
    volume, the variants of a downsampling study among them; it holds the volume to the settings
    of the target it is made for, so that adding a variant does not rerun it. A variant at
    another factor is held to it by rule sample_tiles.) With every section counted as annotated,
    a long run of sections without a target voxel is logged.
    """
    _, info = open_image(image_path)
    labels = read_label_volume(labels_path, info["levels"][0].shape)
    check_both_classes(labels, labels_path, target)
    found = {
        "path": str(labels_path),
        "shape": [int(n) for n in labels.shape],
        "dtype": str(labels.dtype),
        "target_voxels": int(np.count_nonzero(labels)),
    }
    unlabelled = unannotated_sections(labels, sections="labelled")
    found["labelled_sections"] = labels.shape[0] - len(unlabelled)
    if sections == "labelled" and pyramid_path is not None:
        _check_labelled_sections(
            labels, unlabelled, pyramid_path, target, downsample, source=labels_path
        )
    elif sections == "all":
        _log_unlabelled_run(unlabelled, labels.shape[0], target)
    if instances_path is not None:
        ids = read_label_volume(instances_path, labels.shape, "instance volume")
        counts = _instance_counts(ids, labels)
        union = counts["union"]
        agreement = counts["shared"] / union if union else 1.0
        if agreement < MIN_INSTANCE_AGREEMENT:
            raise TesseraInputError(
                f"its objects (> 0, {counts['marked']} voxels) and the label volume "
                f"{labels_path} ({found['target_voxels']} target voxels) agree on "
                f"{agreement:.0%} of the voxels either marks; expected the same organelles "
                f"(at least {MIN_INSTANCE_AGREEMENT:.0%})",
                source=instances_path,
            )
        _refuse_a_mask_as_instances(counts, labels, instances_path)
        found["instance_agreement"] = agreement
    write_labels_check(out_path, found)
    return found


def _instance_counts(ids, labels):
    """Voxels an instance volume marks (> 0), those the label volume marks too, those either
    marks, and the lowest and highest id marked; section by section, so that no temporary the
    size of the volume is made (the two volumes themselves are already in memory).

    Examples
    --------
    >>> ids = np.array([[[0, 3, 3, 5]]]); labels = np.array([[[1, 1, 0, 1]]])
    >>> _instance_counts(ids, labels)
    {'marked': 3, 'shared': 2, 'union': 4, 'lowest': 3, 'highest': 5}
    """
    out = {"marked": 0, "shared": 0, "union": 0, "lowest": None, "highest": None}
    for z in range(ids.shape[0]):
        marked, target = ids[z] > 0, labels[z] > 0
        out["marked"] += int(np.count_nonzero(marked))
        out["shared"] += int(np.count_nonzero(marked & target))
        out["union"] += int(np.count_nonzero(marked | target))
        values = ids[z][marked]
        if values.size:
            low, high = int(values.min()), int(values.max())
            out["lowest"] = low if out["lowest"] is None else min(out["lowest"], low)
            out["highest"] = high if out["highest"] is None else max(out["highest"], high)
    return out


def _refuse_a_mask_as_instances(counts, labels, instances_path):
    """Refuse an instance volume that gives one id to organelles the labels hold apart (a
    mask, such as the label volume itself, given as instances): every object would be scored
    against one true object. `counts` as :func:`_instance_counts` gives them."""
    if counts["lowest"] is None or counts["lowest"] != counts["highest"]:
        return
    _, components = ndimage.label(labels > 0, np.ones((3, 3, 3), bool))
    if components > 1:
        raise TesseraInputError(
            f"it numbers every voxel {counts['lowest']} where the label volume holds "
            f"{components} separate objects (26-connected); expected one integer id per "
            "object (0 background): a mask, not an instance volume",
            source=instances_path,
        )


def _check_labelled_sections(labels, unlabelled, pyramid_path, target, downsample, *, source):
    """Refuse ``sections: labelled`` where no section of the target's working level is wholly
    labelled; log how many are."""
    _, info = open_image(pyramid_path)
    level = working_level(info["factors"], downsample, source=pyramid_path)
    z_factor = info["factors"][level][0]
    depth = labels.shape[0]
    allowed = annotated_working_sections(depth, unlabelled, z_factor)
    if not allowed:
        raise TesseraInputError(
            f"with targets.{target}.annotations.sections: labelled, no section at downsample "
            f"{downsample} is wholly labelled ({depth - len(unlabelled)} of {depth} sections "
            f"hold {target} voxels): that level averages {z_factor} "
            "sections in z and counts one as annotated only where each of them is labelled; "
            f"label runs of {z_factor} consecutive sections starting at a multiple of "
            f"{z_factor}, or use downsample: 1, or set pyramid.downsample_z: false",
            source=source,
        )
    _log.info(
        "%s, sections: labelled: %d of %d sections hold its voxels; at downsample %d (%d "
        "section(s) averaged in z) %d of %d working sections count as annotated",
        target,
        depth - len(unlabelled),
        depth,
        downsample,
        z_factor,
        len(allowed),
        -(-depth // z_factor),
    )


def _log_unlabelled_run(unlabelled, depth, target):
    """Log the longest run of sections without a target voxel when it is long: perhaps sections
    never annotated, which every-section annotation teaches as background."""
    runs, start = [], None
    for k, z in enumerate(unlabelled):
        if start is None or z != unlabelled[k - 1] + 1:
            start = z
        runs.append((z - start + 1, start, z))
    if not runs:
        return
    length, first, last = max(runs)
    if length >= max(3, UNLABELLED_RUN_SHARE * depth):
        _log.warning(
            "sections %d to %d (%d of %d) hold no %s voxel; every section counts as annotated, "
            "so they teach that whatever lies there is background. If they were not annotated, "
            "set targets.%s.annotations.sections: labelled",
            first,
            last,
            length,
            depth,
            target,
            target,
        )


def sample_tiles_job(
    labels_path,
    image_path,
    qc_table,
    out_dir,
    *,
    labels_check=None,
    dataset,
    target,
    downsample,
    size,
    count,
    seed,
    allow_fewer=False,
    sections="all",
    min_fraction=0.0,
):
    """Sample annotation tiles of one dataset from a full label volume (TIFF stack, >0 = target).

    The label stack is read whole: full label volumes exist for synthetic and open benchmark
    data of modest size; real studies annotate tiles (the painted route) instead. With
    `allow_fewer`, a volume that cannot hold `count` tiles gives as many as fit, and the job
    logs how many (see :func:`tessera.tiles.sampling.sample_tiles_from_labels`). With
    `labels_check` (rule check_labels' record) the volume must still be the one checked.
    `sections` says which sections count as annotated
    (:func:`tessera.tiles.sampling.unannotated_sections`); tiles lie on those only. Each tile
    holds at least `min_fraction` of target pixels (``tiles.min_target_fraction``).
    """
    _, info = open_image(image_path)
    level = working_level(info["factors"], downsample, source=image_path)
    labels = read_label_volume(labels_path, info["levels"][0].shape)
    check_both_classes(labels, labels_path, target)
    if labels_check is not None:
        checked = read_labels_check(labels_check)
        if checked["shape"] != list(labels.shape) or checked["dtype"] != str(labels.dtype):
            raise TesseraInputError(
                f"the label volume changed since it was checked (shape {checked['shape']}, "
                f"dtype {checked['dtype']}; now {list(labels.shape)}, {labels.dtype}); run the "
                "workflow again so that rule check_labels checks it",
                source=labels_path,
            )
    # the QC table's `excluded` column is the one record of exclusion: it already honours
    # qc.exclude_flagged, and always holds lost (placeholder) sections; level-0 sections,
    # which sample_tiles_from_labels maps to the working level itself
    exclude = excluded_sections(qc_table)
    if len(exclude) == labels.shape[0]:
        # not a matter of tile settings: say where the exclusion comes from
        raise TesseraInputError(
            f"section QC excluded every section of dataset {dataset}, so no tile can be cut; "
            "look at its sections.png, or set qc.exclude_flagged: false in config/config.yaml",
            source=qc_table,
        )
    unannotated = unannotated_sections(labels, sections=sections)
    if unannotated:
        _log.info(
            "%d of %d sections hold %s voxels and count as annotated (annotations.sections: %s)",
            labels.shape[0] - len(unannotated),
            labels.shape[0],
            target,
            sections,
        )
        exclude = sorted(set(exclude) | set(unannotated))
        if len(exclude) == labels.shape[0]:
            raise TesseraInputError(
                f"section QC excluded every section of dataset {dataset} that holds {target} "
                "voxels (with annotations.sections: labelled only those count as annotated), "
                "so no tile can be cut; look at its sections.png, or set qc.exclude_flagged: "
                "false in config/config.yaml",
                source=qc_table,
            )
    try:
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
            allow_fewer=allow_fewer,
            min_fraction=min_fraction,
        )
    except TesseraInputError as exc:
        if unannotated and str(exc).startswith("every level-"):
            # sparse annotated sections on a pyramid reduced in z: no setting of tiles helps
            raise TesseraInputError(
                f"{exc}: a working-level section averages {info['factors'][level][0]} level-0 "
                f"sections, and with annotations.sections: labelled it counts as annotated only "
                f"when each of them holds {target} voxels; annotate runs of consecutive sections",
                source=labels_path,
            ) from None
        raise TesseraInputError(
            f"{exc} (target {target}: the settings are its tiles.per_dataset and tiles.size; "
            "tiles.allow_fewer: true takes as many as fit)",
            source=labels_path,
        ) from None
    if len(registry) < count:
        _log.warning(
            "only %d of %d tiles fit on the allowed level-%d sections (allow_fewer)",
            len(registry),
            count,
            level,
        )
    write_annotation_set(out_dir, registry, tile_labels)
    return {"tiles": len(registry), "asked": count, "excluded_sections": exclude, "level": level}
