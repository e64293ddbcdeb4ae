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
from tessera.workflow.files.roi_check import read_roi_check, write_roi_check


def read_region_mask(path, *, shape, factors, out, full_shape=None):
    """Copy a region label TIFF (full resolution) into `out` at a working level, page by page.

    Coarser levels take every f-th voxel (labels are not averaged). The TIFF's shape must be
    `full_shape` (the stack's, when known), and reduced by `factors` it must equal `shape`. Its
    pages hold integer labels >= 0 (0 outside every region), and at least one region. With
    `out` None every page is read and checked, and nothing kept.

    Returns
    -------
    tuple
        (`out`, the TIFF's full-resolution shape, its dtype, the number of distinct labels > 0
        in the pages read).
    """
    # checked whole first: a damaged mask is refused in one line, never read short or altered
    with contextlib.closing(open_checked_tiff(Path(path))) as tif:
        full = (len(tif.pages), *tif.pages[0].shape)
        reduced = tuple(-(-n // f) for n, f in zip(full, factors, strict=False))
        if full_shape is not None and full != tuple(full_shape):
            # a mask one row off reduces to the same working shape: compare at full resolution
            raise TesseraInputError(
                f"region mask has shape {full}, the stack {tuple(full_shape)} (same stack and "
                "voxel size expected)",
                source=path,
            )
        if reduced != tuple(shape):
            raise TesseraInputError(
                f"region mask has shape {full}, which at the working level ({'x'.join(map(str, factors))} smaller) "
                f"is {reduced}; the image there is {tuple(shape)} (same stack and voxel size expected)",
                source=path,
            )
        dtype = tif.pages[0].dtype
        if dtype is None or dtype.kind not in "iub":
            raise TesseraInputError(
                f"region mask must hold integer labels (0 outside every region), got {dtype}",
                source=path,
            )
        ids = set()
        for oz in range(shape[0]):
            page = read_checked_page(tif, oz * factors[0], path)
            if dtype.kind == "i" and page.size and page.min() < 0:
                raise TesseraInputError(
                    f"region mask holds negative values (lowest {page.min()}, page "
                    f"{oz * factors[0]}); expected 0 outside every region and labels > 0",
                    source=path,
                )
            if out is not None:
                out[oz] = page[:: factors[1], :: factors[2]]
            ids.update(_labels_present(page))
    ids.discard(0)
    if not ids:
        raise TesseraInputError(
            "region mask has no region (every voxel is 0); expected a label > 0 for each cell "
            "or region, or leave roi_mask blank to measure the whole volume",
            source=path,
        )
    return out, full, str(dtype), len(ids)


def _labels_present(page):
    """The distinct values of an integer page: counted in one pass where they are small (cell
    labels), sorted otherwise."""
    top = int(page.max()) if page.size else 0
    if page.dtype.kind in "ub" and top < 2**20:
        return np.flatnonzero(np.bincount(page.ravel().astype(np.intp, copy=False))).tolist()
    return np.unique(page).tolist()


def check_roi_job(roi_path, image_path, out_path):
    """Read a dataset's region mask whole and check it against the stack; write the check.

    The mask must have the stack's full-resolution shape and hold integer labels >= 0 with at
    least one region (:func:`read_region_mask`).
    """
    shape = tuple(open_image(image_path)[1]["levels"][0].shape)
    _, full, dtype, n_ids = read_region_mask(
        roi_path, shape=shape, factors=(1, 1, 1), out=None, full_shape=shape
    )
    found = {"path": str(roi_path), "shape": list(full), "dtype": dtype, "region_ids": n_ids}
    write_roi_check(out_path, found)
    return found


def morphometry_job(
    objects_image,
    objects_table,
    out_objects,
    out_regions,
    *,
    target,
    roi_mask=None,
    roi_check=None,
    raw_image=None,
    block=(16, 512, 512),
):
    """Measure every object of one dataset and target; densities per region (ROI labels) or volume.

    Writes the object table with the measures and its ``region`` column, and the region table.
    `raw_image` (the dataset's pyramid) gives the full-resolution shape the region mask must
    have; with `roi_check` (rule check_roi's record) the mask must still be the one checked.
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
            full_shape = None
            if raw_image is not None:
                full_shape = open_image(raw_image)[1]["levels"][0].shape
            _, full, dtype, _ = read_region_mask(
                roi_mask,
                shape=labels.shape,
                factors=factors,
                out=region_labels,
                full_shape=full_shape,
            )
            if roi_check is not None:
                checked = read_roi_check(roi_check)
                if checked["shape"] != list(full) or checked["dtype"] != dtype:
                    raise TesseraInputError(
                        f"the region mask changed since it was checked (shape "
                        f"{checked['shape']}, dtype {checked['dtype']}; now {list(full)}, "
                        f"{dtype}); run the workflow again so that rule check_roi checks it",
                        source=roi_mask,
                    )
        regions, region_of = region_densities(
            labels, region_labels, measured, spacing=spacing, block=block
        )
    measured["region"] = measured["id"].map(region_of).fillna(0).astype(int)
    write_object_measures(out_objects, measured)
    write_region_densities(out_regions, regions)
    return {"objects": len(measured), "regions": len(regions)}
