"""Arrays inside container files (HDF5, zarr, N5), read one section at a time with damage checks.

The container readers (:mod:`tessera.io.hdf5_stacks`, :mod:`tessera.io.chunked_stacks`) open a
file and hand its array here. :class:`ArrayStack` refuses arrays that are not 3D, not of integer
or float type, or empty, and checks every section as it is read: its chunks must be stored, it
must decode, and float data must be finite. Every refusal is one :class:`TesseraInputError` line
naming the file and the array (or attribute) inside it.

Voxel sizes come from array attributes, in nm, ordered z, y, x (see :func:`spacing_from_attrs`).
"""

import math

import numpy as np

from tessera.errors import TesseraInputError

__all__ = [
    "ArrayStack",
    "MissingChunkError",
    "spacing_from_attrs",
    "merge_spacing",
    "inner_parts",
    "missing_chunk",
]

_TO_NM = {"nm": 1.0, "nanometer": 1.0, "nanometers": 1.0, "um": 1e3, "µm": 1e3, "micrometer": 1e3}
_TO_NM |= {"micrometers": 1e3, "micron": 1e3, "microns": 1e3, "\u03bcm": 1e3}


def inner_parts(internal_path, *, source):
    """The names of a path inside a container, refusing empty ones and ``..`` steps.

    Examples
    --------
    >>> inner_parts("/volumes/raw", source="a.h5")
    ['volumes', 'raw']
    """
    parts = [p for p in str(internal_path).strip("/").split("/") if p not in ("", ".")]
    if not parts or ".." in parts:
        raise TesseraInputError(
            f"internal_path {internal_path!r}: expected the array's path inside the file, "
            "e.g. volumes/raw (no '..' steps)",
            source=source,
        )
    return parts


def _values(value, *, count, where):
    try:
        out = [float(v) for v in value]
    except (TypeError, ValueError):
        out = []
    if len(out) != count or not all(math.isfinite(v) and v > 0 for v in out):
        raise TesseraInputError(
            f"attribute {where} = {value!r} is unusable: expected {count} finite numbers > 0"
        )
    return out


def _read_attribute(attrs, name, *, xyz):
    """One attribute as nm z, y, x, or None when absent."""
    if name not in attrs:
        return None
    value = attrs[name]
    if name == "pixelResolution":  # {"dimensions": [x, y, z], "unit": "nm"}
        if not isinstance(value, dict) or str(value.get("unit", "")).lower() not in _TO_NM:
            raise TesseraInputError(
                f"attribute pixelResolution = {value!r} is unusable: expected "
                "{'dimensions': [x, y, z], 'unit': 'nm' or 'um'}"
            )
        scale = _TO_NM[str(value["unit"]).lower()]
        x, y, z = _values(value.get("dimensions"), count=3, where="pixelResolution.dimensions")
        return (z * scale, y * scale, x * scale)
    values = _values(np.asarray(value).ravel().tolist(), count=3, where=name)
    if name == "element_size_um":  # z, y, x in micrometres
        return tuple(v * 1e3 for v in values)
    return tuple(values[::-1]) if xyz else tuple(values)  # resolution: nm


def spacing_from_attrs(attrs, *, xyz=False, source=None):
    """Voxel size (nm; z, y, x) stated by an array's attributes, and the attribute used.

    Read, in this order: ``resolution`` (nm; z, y, x, or x, y, z when `xyz`, the N5 habit),
    ``pixelResolution`` (``{"dimensions": [x, y, z], "unit": ...}``, nm or µm) and
    ``element_size_um`` (µm; z, y, x). When more than one is present they must agree within 1 %.

    Parameters
    ----------
    attrs : mapping
        The array's attributes.
    xyz : bool, optional
        ``resolution`` lists x first (N5 containers).
    source : str, optional
        Named in errors.

    Returns
    -------
    tuple of (tuple of 3 float or None, str or None)
        The voxel size and the name of the attribute it was read from (None, None when absent).

    Examples
    --------
    >>> spacing_from_attrs({"element_size_um": [0.04, 0.008, 0.008]})
    ((40.0, 8.0, 8.0), 'element_size_um')
    >>> spacing_from_attrs({"pixelResolution": {"dimensions": [4, 4, 30], "unit": "nm"}})
    ((30.0, 4.0, 4.0), 'pixelResolution')
    """
    found = []
    for name in ("resolution", "pixelResolution", "element_size_um"):
        try:
            spacing = _read_attribute(attrs, name, xyz=xyz)
        except TesseraInputError as exc:
            raise TesseraInputError(str(exc), source=source) from None
        if spacing is not None:
            found.append((spacing, name))
    if not found:
        return None, None
    first, name = found[0]
    for other, other_name in found[1:]:
        if not np.allclose(first, other, rtol=0.01, atol=0):
            raise TesseraInputError(
                f"attributes {name} and {other_name} disagree on the voxel size: "
                f"{_nm(first)} vs {_nm(other)} nm (z, y, x)",
                source=source,
            )
    return first, name


def _nm(spacing):
    return "(" + ", ".join(f"{v:g}" for v in spacing) + ")"


def merge_spacing(given, stack):
    """The voxel size: `stack`'s attribute where it has one (the sheet must agree), else `given`.

    Parameters
    ----------
    given : sequence of 3 (float or None)
        From the datasets sheet, z, y, x in nm; None where blank.
    stack : object
        A stack; its ``spacing_attribute`` (None for formats without one) names the attribute
        its ``header_spacing`` came from.

    Returns
    -------
    tuple of 3 (float or None)
        For each axis the attribute's value where present, else the given one.

    Examples
    --------
    >>> class Stack:
    ...     header_spacing, spacing_attribute, label = (40.0, 4.0, 4.0), "resolution", "a.h5:raw"
    >>> merge_spacing((None, 4.0, None), Stack())
    (40.0, 4.0, 4.0)
    """
    name = getattr(stack, "spacing_attribute", None)
    if name is None:
        return tuple(given)
    for axis, mine, theirs in zip("zyx", stack.header_spacing, given, strict=True):
        if theirs is not None and not math.isclose(mine, theirs, rel_tol=0.01):
            raise TesseraInputError(
                f"attribute {name} gives voxel size {mine:g} nm along {axis}, the sheet's "
                f"voxel_{axis}_nm says {theirs:g}; correct one of them or blank the sheet's cell",
                source=stack.label,
            )
    return tuple(stack.header_spacing)


class MissingChunkError(TesseraInputError):
    """A chunk of the array is not stored: it would read as fill value, not as data."""


class MissingChunk(str):
    """The problem text of a chunk absent from the store (a str that says it is one)."""


def missing_chunk(name):
    """The problem of a chunk absent from the store, told apart from a damaged one."""
    return MissingChunk(
        f"chunk {name} is missing from the store (it would read as fill value, not data)"
    )


def first_problem(problems, row, checked):
    """What a chunk check reports for one chunk row: damage first, then a missing chunk.

    `row` is added to the set `checked` when nothing is wrong, so it is not looked at again.

    Examples
    --------
    >>> checked = set()
    >>> first_problem([None, missing_chunk("'0.1'"), "chunk '0.2' is damaged"], 0, checked)
    "chunk '0.2' is damaged"
    >>> first_problem([None, None], 1, checked), checked
    (None, {1})
    """
    found = [p for p in problems if p is not None]
    if not found:
        checked.add(row)
        return None
    damaged = [p for p in found if not isinstance(p, MissingChunk)]
    return (damaged or found)[0]


class ArrayStack:
    """A 3D array (z, y, x) inside a container, read one checked section at a time.

    Parameters
    ----------
    array : array_like
        Anything with ``shape``, ``dtype``, ``ndim`` and numpy indexing (h5py, zarr, ...).
    label : str
        The file and the array's path inside it, named in every error.
    errors : tuple of exception types
        What the container's library raises for damaged data; turned into one clear error.
    header_spacing, spacing_attribute : optional
        Voxel size (nm; z, y, x) from the attributes and the attribute's name.
    chunk_problem : callable, optional
        ``chunk_problem(z)`` returns None when every chunk holding section z is stored whole,
        else what is wrong (a damaged chunk before a missing one; a missing chunk reads as fill
        value, not as data, and is told by a :class:`MissingChunk` text).

    Attributes
    ----------
    missing_chunks : {'refuse', 'fill_value'}
        What a section with a missing chunk does: raise :class:`MissingChunkError` (the
        default), or read as the array's fill value there (for writers that leave out chunks
        holding only the fill value, as zarr-python does by default).
    sections_with_missing_chunks : list of int
        The sections read with fill value in place of a missing chunk.
    on_close : callable, optional
        Called by :meth:`close` (closes the file).

    Examples
    --------
    >>> stack = ArrayStack(np.ones((2, 3, 4), np.float32), label="demo.h5:raw")
    >>> stack.shape, stack.read(1).sum()
    ((2, 3, 4), np.float32(12.0))
    >>> ArrayStack(np.ones((3, 4), np.uint8), label="demo.h5:raw")
    Traceback (most recent call last):
    ...
    tessera.errors.TesseraInputError: demo.h5:raw: expected a 3D z, y, x array, got shape (3, 4)
    """

    def __init__(
        self,
        array,
        *,
        label,
        errors=(),
        header_spacing=None,
        spacing_attribute=None,
        chunk_problem=None,
        on_close=None,
    ):
        self.label = label
        self._errors = (OSError, ValueError, RuntimeError, *errors)
        self._chunk_problem = chunk_problem
        self._on_close = on_close
        self.header_spacing = header_spacing
        self.spacing_attribute = spacing_attribute
        self.missing_chunks = "refuse"
        self.sections_with_missing_chunks = []
        try:
            _check_array(array, label)
        except TesseraInputError:
            self.close()
            raise
        self._array = array
        self.shape = tuple(int(n) for n in array.shape)
        self.dtype = np.dtype(array.dtype).newbyteorder("=")

    def read(self, z):
        """Section `z` as a native-endian 2D array, after the chunk, decode and finite checks."""
        try:
            # the chunk index is read from the file too: h5py reports a damaged B-tree here
            problem = self._chunk_problem(z) if self._chunk_problem is not None else None
        except self._errors as exc:
            text = str(exc).replace("\n", " ")
            raise TesseraInputError(
                f"section {z}: the chunk index cannot be read (damaged?): {text}",
                source=self.label,
            ) from None
        if isinstance(problem, MissingChunk) and self.missing_chunks == "fill_value":
            if z not in self.sections_with_missing_chunks:
                self.sections_with_missing_chunks.append(z)
        elif problem is not None:
            error = MissingChunkError if isinstance(problem, MissingChunk) else TesseraInputError
            raise error(
                f"section {z}: {problem}; copy the array again or restore the chunk",
                source=self.label,
            )
        try:
            section = np.asarray(self._array[z])
        except self._errors as exc:  # the library's own damage report, one line
            text = str(exc).replace("\n", " ")
            raise TesseraInputError(
                f"section {z} cannot be read (truncated or damaged chunk?): {text}",
                source=self.label,
            ) from None
        if section.shape != self.shape[1:]:
            raise TesseraInputError(
                f"section {z} has shape {section.shape}, expected {self.shape[1:]}",
                source=self.label,
            )
        if section.dtype.kind == "f" and not np.isfinite(section).all():
            bad = int(np.size(section) - np.count_nonzero(np.isfinite(section)))
            raise TesseraInputError(
                f"section {z} holds {bad} NaN or infinite values; expected finite grey values",
                source=self.label,
            )
        return section.astype(self.dtype, copy=False)

    def close(self):
        if self._on_close is not None:
            self._on_close()
            self._on_close = None


def _check_array(array, label):
    dtype = np.dtype(array.dtype)
    if len(array.shape) != 3:
        raise TesseraInputError(
            f"expected a 3D z, y, x array, got shape {tuple(array.shape)}", source=label
        )
    if dtype.kind not in "iuf":
        raise TesseraInputError(
            f"expected integer or float grey values, got dtype {dtype}", source=label
        )
    if min(array.shape) < 1:
        raise TesseraInputError(
            f"the array is empty (shape {tuple(array.shape)}); every axis needs length >= 1",
            source=label,
        )
