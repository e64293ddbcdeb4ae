"""The morphometry rule: measure every object of one dataset and target, densities per region."""

import contextlib
import tempfile
from pathlib import Path

import numpy as np
import zarr

from tessera.errors import TesseraInputError
from tessera.io.omezarr import open_image
from tessera.io.tiff_checks import open_checked_tiff, read_checked_page
from tessera.morphometry import measure_objects, region_densities
from tessera.workflow.files.morphometry_tables import (
    write_object_measures,
    write_region_densities,
)
from tessera.workflow.files.object_table import read_object_table
from tessera.workflow.files.probability_map import probability_fields


def read_region_mask(path, *, shape, factors, out):
    """Copy a region label TIFF (full resolution) into `out` at a working level, page by page.

    Coarser levels take every f-th voxel (labels are not averaged). The TIFF's shape reduced by
    `factors` must equal `shape`.
    """
    # checked whole first: a damaged mask is refused in one line, never read short or altered
    with contextlib.closing(open_checked_tiff(Path(path))) as tif:
        full = (len(tif.pages), *tif.pages[0].shape)
        reduced = tuple(-(-n // f) for n, f in zip(full, factors, strict=False))
        if reduced != tuple(shape):
            raise TesseraInputError(
                f"region mask has shape {full}, which at the working level ({'x'.join(map(str, factors))} smaller) "
                f"is {reduced}; the image there is {tuple(shape)} (same stack and voxel size expected)",
                source=path,
            )
        for oz in range(shape[0]):
            page = read_checked_page(tif, oz * factors[0], path)
            out[oz] = page[:: factors[1], :: factors[2]]
    return out


def morphometry_job(
    objects_image,
    objects_table,
    out_objects,
    out_regions,
    *,
    target,
    roi_mask=None,
    block=(16, 512, 512),
):
    """Measure every object of one dataset and target; densities per region (ROI labels) or volume.

    Writes the object table with the measures and its ``region`` column, and the region table.
    """
    group, info = open_image(objects_image)
    try:
        labels = group[f"labels/{target}/0"]
    except KeyError:
        raise TesseraInputError(
            f"no labels/{target} in the image (rule objects writes it)", source=objects_image
        ) from None
    spacing = info["spacing"]
    objects = read_object_table(objects_table)
    measured = measure_objects(labels, objects, spacing=spacing)
    # the objects image keeps the probability map's own facts (its working-level factors)
    fields = probability_fields(info)
    factors = (fields["z_factor"], fields["downsample"], fields["downsample"])
    Path(out_regions).parent.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory(dir=Path(out_regions).parent, prefix=".roi-") as tmp:
        region_labels = None
        if roi_mask:
            region_labels = zarr.create_array(
                store=tmp,
                shape=labels.shape,
                dtype=np.uint32,
                chunks=(1, *labels.shape[1:]),
                zarr_format=3,
            )
            read_region_mask(roi_mask, shape=labels.shape, factors=factors, out=region_labels)
        regions, region_of = region_densities(
            labels, region_labels, measured, spacing=spacing, block=block
        )
    measured["region"] = measured["id"].map(region_of).fillna(0).astype(int)
    write_object_measures(out_objects, measured)
    write_region_densities(out_regions, regions)
    return {"objects": len(measured), "regions": len(regions)}
