"""The objects rule: a stitched probability map into labelled objects, their table and settings.

The threshold defaults to the one chosen on the validation tiles (from the tile scores), the
sections QC excluded come from the QC table, and the filtering itself is
:func:`tessera.objects.label.label_objects`.
"""

import shutil
from pathlib import Path

import numpy as np
import zarr

from tessera.errors import TesseraInputError
from tessera.io.atomic import atomic_path
from tessera.io.links import link_tree
from tessera.io.omezarr import AXES, level_zero_origin, multiscale_attrs
from tessera.io.store_checksums import record_checksums, verified_bytes
from tessera.objects.depth_limit import split_depth_nm
from tessera.objects.label import label_objects, subsample_labels
from tessera.workflow.files.object_table import write_object_settings, write_object_table
from tessera.workflow.files.probability_map import open_probability_map
from tessera.workflow.files.qc_table import excluded_sections
from tessera.workflow.files.scores import validation_threshold


def _label_levels(root, *, target, info, shape, used, origin):
    """Create ``labels/<target>`` in the objects store: NGFF image-label metadata, the settings
    used, and one empty uint32 array per level of the image (each at `origin`, the image's
    level-0 translation)."""
    labels_group = root.create_group("labels")
    labels_group.attrs["ome"] = {"version": "0.5", "labels": [target]}
    image = labels_group.create_group(target)
    # NGFF wants a label level per image level; coarser label levels take every f-th voxel
    # (labels cannot be averaged), so their first voxel sits on level 0's first voxel.
    ome = multiscale_attrs(
        name=f"{target} objects", spacing=info["spacing"], factors=info["factors"]
    )
    for dataset in ome["multiscales"][0]["datasets"]:
        dataset["coordinateTransformations"] = dataset["coordinateTransformations"][:1]
        if any(origin):
            dataset["coordinateTransformations"].append(
                {"type": "translation", "translation": list(origin)}
            )
    ome["image-label"] = {"version": "0.5", "source": {"image": "../../"}}
    image.attrs.update({"ome": ome, "tessera": {"objects": used}})
    levels = []
    for k, factor in enumerate(info["factors"]):
        level_shape = tuple(-(-s // f) for s, f in zip(shape, factor, strict=False))
        levels.append(
            image.create_array(
                name=str(k),
                shape=level_shape,
                dtype=np.uint32,
                chunks=tuple(min(c, s) for c, s in zip((1, 512, 512), level_shape, strict=False)),
                dimension_names=AXES,
                fill_value=0,
            )
        )
    return levels


def objects_job(
    probability, qc_table, scores, out_image, out_table, out_settings, *, target, settings
):
    """Filter a stitched probability map into objects; write labels, table and settings.

    The labels go to ``labels/<target>`` inside a copy of the probability image (NGFF image-label,
    levels hard-linked, not copied), so a viewer shows both together.
    """
    settings = dict(settings)
    high = settings.pop("high")
    if high is None:
        high = validation_threshold(scores)
    low = settings.pop("low")
    low = high if low is None else low
    group, info, fields = open_probability_map(probability)
    prob = info["levels"][0]
    scale, z_factor = fields["scale"], fields["z_factor"]
    excluded = excluded_sections(qc_table, z_factor)
    if len(excluded) >= prob.shape[0]:
        # nothing to find objects in: measured, the stack would enter the statistics as an
        # animal without any object (densities 0) instead of as one not measured
        raise TesseraInputError(
            "section QC excluded every section of this stack, so no object can be found or "
            "measured; look at its sections.png, and replace a blank or damaged stack or "
            "remove its row from the datasets sheet",
            source=qc_table,
        )
    # recorded as set (auto or a number) and as the depth it means for these voxels
    depth_setting = {}
    if "split_min_depth_nm" in settings:
        depth_setting = {"split_min_depth_setting": settings["split_min_depth_nm"]}
        settings["split_min_depth_nm"] = split_depth_nm(
            settings["split_min_depth_nm"], info["spacing"]
        )
    used = {
        "target": target,
        "high": high,
        "low": low,
        **settings,
        **depth_setting,
        "connectivity_meaning": f"{settings['connectivity']}-connected voxels in 3D belong to one object",
        "excluded_sections": excluded,
        "spacing_nm": list(info["spacing"]),
    }
    block = settings.pop("block")
    # the off switch and the depth reach the library as one argument: no depth, no splitting
    depth = settings.pop("split_min_depth_nm", None)
    split = settings.pop("split", False)
    settings["split_min_depth_nm"] = depth if split else None
    valley = settings.pop("split_valley_probability", None)
    settings["split_valley_probability"] = valley if split else None
    level_paths = [d["path"] for d in group.attrs["ome"]["multiscales"][0]["datasets"]]
    # Labelling keeps large scratch arrays beside the results (not in a small /tmp). A job killed
    # outright (SIGKILL, a node lost) cannot clean up, so each run clears its own target's scratch
    # folder first; only one job per dataset and target runs at a time, so nothing else uses it.
    scratch = Path(out_image).parent / f".{target}.scratch"
    shutil.rmtree(scratch, ignore_errors=True)
    scratch.mkdir(parents=True)
    try:
        with atomic_path(out_image) as tmp:
            for name in level_paths:
                link_tree(Path(probability) / name, tmp / name)
            (tmp / "zarr.json").write_bytes(verified_bytes(probability, "zarr.json"))
            root = zarr.open_group(store=str(tmp), mode="r+", zarr_format=3)
            levels = _label_levels(
                root,
                target=target,
                info=info,
                shape=prob.shape,
                used=used,
                origin=level_zero_origin(group.attrs["ome"]),
            )
            table = label_objects(
                prob,
                levels[0],
                spacing=info["spacing"],
                high=high,
                low=low,
                block=block,
                scale=scale,
                excluded_sections=excluded,
                workdir=scratch,
                **settings,
            )
            for factor, level in zip(info["factors"][1:], levels[1:], strict=True):
                subsample_labels(levels[0], level, factor=factor)
            # the probability levels keep the records made when they were stitched
            record_checksums(tmp, linked={name: probability for name in level_paths})
    finally:
        shutil.rmtree(scratch, ignore_errors=True)
    write_object_table(out_table, table)
    write_object_settings(out_settings, {**used, "objects": len(table)})
    return {"objects": len(table), "high": high, "low": low}
