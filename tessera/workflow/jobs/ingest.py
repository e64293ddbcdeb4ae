"""The ingest job: one dataset's stack -> a single-level OME-Zarr 0.5 image of uint8 sections.

The stack is read one section at a time (:mod:`tessera.io.stacks`); nothing here holds more than
about 32 MiB of sections in memory. Data other than 8-bit are mapped to uint8
(:mod:`tessera.intensity`), and the mapping and the source are recorded in the image's metadata.
The voxel size comes from the datasets sheet where given, else from the file header; for
arrays in HDF5, N5 and zarr files and OME-Zarr images a voxel size in their attributes comes
first, and the sheet must agree with it (:func:`tessera.io.array_stacks.merge_spacing`). A TIFF
or MRC header's size that the sheet overrides is logged: such headers are often left at an
acquisition program's default, so they do not stop the run.

A section missing from a numbered slice folder becomes a blank (0) placeholder section, recorded
in the store's metadata (:mod:`tessera.workflow.files.missing_sections`) for section QC to
exclude, or stops the job, as ``missing_sections`` says.

The stack is checked first by a job of its own (:func:`check_stack_job`): the workflow removes a
job's earlier outputs when the job starts, so a damaged or unsuitable replacement of a stack is
refused there, and the dataset's earlier image survives it. Where such an image exists, the
check reads every section too (a compressed page can be damaged in a way only decoding finds).
"""

import logging
import math
from pathlib import Path

import numpy as np
import zarr

from tessera.errors import TesseraInputError
from tessera.intensity import choose_mapping, to_uint8
from tessera.io.array_stacks import MissingChunkError, merge_spacing
from tessera.io.atomic import atomic_path
from tessera.io.omezarr import AXES, multiscale_attrs
from tessera.io.stacks import open_stack
from tessera.io.store_checksums import record_checksums
from tessera.spacing import VOXEL_NM_RANGE
from tessera.workflow.files.missing_sections import missing_sections_entry
from tessera.workflow.files.stack_check import read_stack_check, write_stack_check

_log = logging.getLogger(__name__)


def resolve_spacing(sheet_spacing, header_spacing, *, source=None):
    """Voxel size per axis: the sheet's value where given, else the file header's.

    Parameters
    ----------
    sheet_spacing : sequence of 3 (float or None)
        From the datasets sheet, z, y, x in nm; None where left blank.
    header_spacing : sequence of 3 float or None
        From the file header, if the format carries one.

    Examples
    --------
    >>> resolve_spacing((50.0, None, None), (45.0, 4.6, 4.6))
    (50.0, 4.6, 4.6)
    >>> resolve_spacing((50.0, 8.0, None), (45.0, 4.6, 0.0046))  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    tessera.errors.TesseraInputError: voxel size along x is 0.0046 nm, outside 0.1-100000 nm ...
    """
    out = []
    for axis, given, fallback in zip(
        "zyx", sheet_spacing, header_spacing or (None,) * 3, strict=False
    ):
        value = given if given is not None else fallback
        if value is None:
            raise TesseraInputError(
                f"voxel size along {axis} is blank in the sheet and the file header has none; "
                f"fill voxel_{axis}_nm (nm, > 0)",
                source=source,
            )
        if not value > 0:
            raise TesseraInputError(
                f"voxel size along {axis} must be > 0 nm, got {value}", source=source
            )
        low, high = VOXEL_NM_RANGE
        if not low <= value <= high:
            # the sheet's own values are held to the range by its schema already; those read
            # from a file's header or array attributes are held to it here
            raise TesseraInputError(
                f"voxel size along {axis} is {value:g} nm, outside {low:g}-{high:g} nm (a size "
                f"in another unit in the file's metadata?); correct it, or for TIFF and MRC "
                f"set voxel_{axis}_nm in the sheet",
                source=source,
            )
        out.append(float(value))
    return tuple(out)


def _stack_found(source, source_path, *, fmt, internal_path, spacing):
    """What a check records of an opened stack; the voxel size resolved as ingest uses it."""
    if source.shape[0] < 2:
        # volumes, surfaces and the split into sections apart in z all need a stack
        how = (
            "put every section's file into the folder"
            if fmt == "slice_folder"
            else "save every section into one multi-page file, or use format slice_folder for "
            "one file per section"
        )
        raise TesseraInputError(
            f"holds a single section of {source.shape[1]} x {source.shape[2]} pixels; expected "
            f"a stack of sections (z, y, x): {how}",
            source=source_path,
        )
    given = merge_spacing(spacing, source)
    spacing = resolve_spacing(given, source.header_spacing, source=source_path)
    for axis, used, header in zip("zyx", spacing, source.header_spacing or (), strict=False):
        if header is not None and not math.isclose(used, header, rel_tol=0.01):
            _log.warning(
                "%s: the file header gives voxel size %g nm along %s; the sheet's voxel_%s_nm "
                "(%g nm) is used",
                source_path,
                header,
                axis,
                axis,
                used,
            )
    found = {"path": str(source_path), "format": fmt}
    if internal_path is not None:
        found["internal_path"] = internal_path
    return {
        **found,
        "shape": [int(n) for n in source.shape],
        "dtype": str(np.dtype(source.dtype)),
        "spacing": list(spacing),
        "missing_sections": [int(z) for z in getattr(source, "missing", ())],
    }


def check_stack_job(
    source_path,
    out_path,
    *,
    fmt,
    internal_path=None,
    spacing=(None, None, None),
    missing_sections="placeholder",
    earlier_image=None,
):
    """Open a dataset's stack, check it whole and write what was found (the stack check).

    The checks are those ingest makes when it opens a stack (:func:`tessera.io.stacks.open_stack`:
    the format, every page or file laid out like the first, pixel data inside the file, the
    numbering of slice files, the array of a container) and the voxel size
    (:func:`resolve_spacing`). Reading the pixels is left to ingest, unless an earlier image of
    the dataset exists: then every section is read and checked as ingest reads it (compressed
    pages decoded, float values finite), because ingest would remove that image before it met
    a section that cannot be read.

    Parameters
    ----------
    source_path, fmt, internal_path, spacing, missing_sections
        As for :func:`ingest_job`.
    out_path : str or Path
        The stack check to write (:mod:`tessera.workflow.files.stack_check`).
    earlier_image : str or Path, optional
        Where ingest writes this dataset's image; if it exists, the stack is read whole.

    Returns
    -------
    dict
        What was found (shape, dtype, spacing, placeholder sections) and ``sections_read``.
    """
    source = open_stack(
        source_path, fmt, internal_path=internal_path, missing_sections=missing_sections
    )
    try:
        found = _stack_found(
            source, source_path, fmt=fmt, internal_path=internal_path, spacing=spacing
        )
        read = 0
        if earlier_image is not None and Path(earlier_image).exists():
            for z in range(source.shape[0]):
                source.read(z)  # refuses a section it cannot read, naming the file
            read = source.shape[0]
    finally:
        source.close()
    write_stack_check(out_path, found)
    return {**found, "sections_read": read}


def ingest_job(
    source_path,
    out_path,
    *,
    fmt,
    internal_path=None,
    spacing=(None, None, None),
    name="raw",
    chunks=(1, 512, 512),
    percentiles=(0.1, 99.9),
    missing_chunks="refuse",
    missing_sections="placeholder",
    checked=None,
):
    """Convert an EM stack into a single-level OME-Zarr 0.5 image of uint8 sections.

    Parameters
    ----------
    source_path : str or Path
        The stack (see :mod:`tessera.io.stacks` for formats).
    out_path : str or Path
        The OME-Zarr store to create; written under a temporary name and renamed.
    fmt : str
        One of :data:`tessera.io.stacks.FORMATS`.
    internal_path : str, optional
        The array inside an hdf5, n5 or zarr container.
    spacing : sequence of 3 (float or None), optional
        Voxel size z, y, x in nm; None takes the value from the file header. A voxel size in
        the attributes of an hdf5, n5 or zarr array is used instead, and a given value must
        agree with it.
    name : str, optional
        Image name stored in the metadata.
    chunks : sequence of 3 int, optional
        Zarr chunk shape z, y, x (clipped to the image).
    percentiles : pair of float, optional
        Percentiles (in percent) mapped to 0 and 255 for data that are not uint8.
    missing_chunks : {'refuse', 'fill_value'}, optional
        A chunk missing from an hdf5, n5 or zarr array is refused, or read as the array's fill
        value (for writers that leave out chunks holding only the fill value); the sections
        read so are recorded in the image's metadata.
    missing_sections : {'placeholder', 'refuse'}, optional
        A section missing from a slice folder's numbering becomes a blank placeholder section
        (recorded for section QC to exclude), or stops the job with an error.
    checked : str or Path, optional
        The stack check of this stack (:func:`check_stack_job`); the stack is converted only if
        it is still the one checked.

    Returns
    -------
    dict
        Summary: shape, spacing, the intensity mapping used (None for uint8) and the z of the
        placeholder sections.
    """
    if missing_chunks not in ("refuse", "fill_value"):
        raise TesseraInputError(
            f"missing_chunks must be 'refuse' or 'fill_value', got {missing_chunks!r}"
        )
    source = open_stack(
        source_path, fmt, internal_path=internal_path, missing_sections=missing_sections
    )
    if hasattr(source, "missing_chunks"):  # arrays in containers (hdf5, n5, zarr)
        source.missing_chunks = missing_chunks
    try:
        found = _stack_found(
            source, source_path, fmt=fmt, internal_path=internal_path, spacing=spacing
        )
        if checked is not None and read_stack_check(checked) != found:
            raise TesseraInputError(
                "the stack is not the one rule check_stack checked (it changed since); run the "
                "workflow again to check it anew",
                source=source_path,
            )
        spacing = tuple(found["spacing"])
        lo_p, hi_p = percentiles
        if not 0 <= lo_p < hi_p <= 100:
            raise TesseraInputError(
                f"percentiles must satisfy 0 <= low < high <= 100, got {percentiles}"
            )
        mapping = choose_mapping(source, percentiles=(lo_p, hi_p))
        missing = tuple(getattr(source, "missing", ()))  # placeholders for lost sections
        shape = (source.shape[0] + len(missing), *source.shape[1:])
        chunks = tuple(int(min(c, s)) for c, s in zip(chunks, shape, strict=False))
        origin = {"path": str(source_path), "format": fmt}
        if internal_path is not None:
            origin["internal_path"] = internal_path
        extra = {
            "source": origin,
            "intensity_mapping": mapping,
            **missing_sections_entry(missing),
        }
        with atomic_path(out_path) as tmp:
            group = zarr.open_group(store=str(tmp), mode="w", zarr_format=3)
            group.attrs.update(
                {
                    "ome": multiscale_attrs(name=name, spacing=spacing, factors=[(1, 1, 1)]),
                    "tessera": extra,
                }
            )
            array = group.create_array(
                name="0", shape=shape, chunks=chunks, dtype="uint8", dimension_names=AXES
            )
            _copy_sections(source, array, chunks[0], mapping)
            filled = getattr(source, "sections_with_missing_chunks", None)
            if filled:
                origin["sections_with_missing_chunks"] = sorted(filled)
                group.attrs.update({"tessera": extra})
            record_checksums(tmp)
    except MissingChunkError as exc:
        raise TesseraInputError(
            f"{exc}; or, if its writer leaves out chunks that hold only the fill value "
            "(zarr-python does by default), set ingest.missing_chunks: fill_value in "
            "config/config.yaml"
        ) from None
    finally:
        source.close()
    return {
        "shape": list(shape),
        "spacing": list(spacing),
        "intensity_mapping": mapping,
        "missing_sections": list(missing),
    }


def _copy_sections(source, array, chunk_z, mapping, *, buffer_bytes=32 * 2**20):
    # Write whole chunk-rows of sections, several at once when they are small (zarr writes the
    # chunks of one call concurrently), but never buffer more than about `buffer_bytes`.
    # Output z of a missing section gets a blank placeholder; the others read the next section
    # present in the source.
    z_count = array.shape[0]
    missing = set(getattr(source, "missing", ()))
    present = iter(range(source.shape[0]))
    section_bytes = source.shape[1] * source.shape[2]
    slab_z = chunk_z * max(1, buffer_bytes // (chunk_z * section_bytes))
    for z0 in range(0, z_count, slab_z):
        z1 = min(z0 + slab_z, z_count)
        slab = np.zeros((z1 - z0, *source.shape[1:]), dtype=np.uint8)
        for i, z in enumerate(range(z0, z1)):
            if z in missing:
                continue
            section = source.read(next(present))
            if mapping is None or mapping["method"] == "exact":
                slab[i] = section
            else:
                slab[i] = to_uint8(section, mapping["low"], mapping["high"])
        array[z0:z1] = slab
