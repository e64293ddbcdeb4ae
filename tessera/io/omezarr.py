"""OME-Zarr 0.5 (NGFF, zarr format 3) images: metadata, opening, level access; and the voxel
size a multiscale image's metadata (0.5, or 0.4 in zarr format 2) give one of its levels.

Axes are always z, y, x in nanometres (the project's spacing convention). Level ``k`` of a
multiscale image was reduced by ``factors[k]`` along each axis relative to level 0. Project
metadata that NGFF has no field for (intensity mapping, pyramid factors, provenance) is stored
under the ``"tessera"`` attribute key beside ``"ome"``.
"""

import math
from pathlib import Path

import zarr

from tessera.errors import TesseraInputError
from tessera.io.store_checksums import checked_store
from tessera.spacing import normalize_spacing

NGFF_VERSION = "0.5"
AXES = ("z", "y", "x")


def level_origin(spacing, factors):
    """Where the first voxel centre of a level made by averaging `factors` voxels lies, in nm
    from the first voxel centre of the unreduced image (z, y, x).

    `spacing` is the level's own voxel size. A working level of a pyramid is such a level: an
    image computed on it (a probability map, objects) records this as its level 0's
    translation, so that it overlays the raw pyramid in a viewer.

    Examples
    --------
    >>> level_origin((40.0, 16.0, 16.0), (1, 2, 2))
    [0.0, 4.0, 4.0]
    """
    spacing = normalize_spacing(spacing, 3)
    return [s / k * (k - 1) / 2 for s, k in zip(spacing, factors, strict=True)]


def multiscale_attrs(*, name, spacing, factors, origin=None):
    """Return the ``ome`` attribute dict of a z, y, x multiscale image.

    Parameters
    ----------
    name : str
        Image name.
    spacing : sequence of 3 float
        Level-0 voxel size in nm, ordered z, y, x.
    factors : sequence of sequence of 3 int
        Reduction factor of each level relative to level 0; the first must be (1, 1, 1).
    origin : sequence of 3 float, optional
        Translation (nm) of level 0, for an image on a reduced level of another
        (:func:`level_origin`); every level is shifted by it.

    Returns
    -------
    dict
        ``{"version": "0.5", "multiscales": [...]}``, to be stored under the ``ome`` key.

    Notes
    -----
    A level made by averaging ``f`` voxels has its first voxel centre ``(f - 1) / 2`` voxels of
    level 0 away from level 0's first centre; the translation records that offset so that all
    levels overlay exactly in a viewer.

    Examples
    --------
    >>> attrs = multiscale_attrs(name="a", spacing=(40, 8, 8), factors=[(1, 1, 1), (1, 2, 2)])
    >>> attrs["multiscales"][0]["datasets"][1]["coordinateTransformations"]
    [{'type': 'scale', 'scale': [40.0, 16.0, 16.0]}, {'type': 'translation', 'translation': [0.0, 4.0, 4.0]}]
    """
    spacing = normalize_spacing(spacing, 3)
    if tuple(factors[0]) != (1, 1, 1):
        raise TesseraInputError(f"the first level must be unreduced (1, 1, 1), got {factors[0]}")
    origin = [0.0] * 3 if origin is None else [float(o) for o in origin]
    datasets = []
    for level, f in enumerate(factors):
        transforms = [{"type": "scale", "scale": [s * k for s, k in zip(spacing, f, strict=False)]}]
        if level > 0 or any(origin):
            shift = [o + s * (k - 1) / 2 for o, s, k in zip(origin, spacing, f, strict=False)]
            transforms.append({"type": "translation", "translation": shift})
        datasets.append({"path": str(level), "coordinateTransformations": transforms})
    return {
        "version": NGFF_VERSION,
        "multiscales": [
            {
                "name": name,
                "axes": [{"name": a, "type": "space", "unit": "nanometer"} for a in AXES],
                "datasets": datasets,
            }
        ],
    }


def level_zero_origin(ome):
    """The translation (nm, z y x) of level 0 in an image's ``ome`` attributes; zeros if none.

    Examples
    --------
    >>> level_zero_origin(multiscale_attrs(name="a", spacing=(1, 2, 2), factors=[(1, 1, 1)]))
    [0.0, 0.0, 0.0]
    >>> attrs = multiscale_attrs(name="a", spacing=(1, 2, 2), factors=[(1, 1, 1)], origin=(0, 1, 1))
    >>> level_zero_origin(attrs)
    [0.0, 1.0, 1.0]
    """
    for transform in ome["multiscales"][0]["datasets"][0]["coordinateTransformations"]:
        if transform["type"] == "translation":
            return [float(t) for t in transform["translation"]]
    return [0.0, 0.0, 0.0]


def open_image(path, *, checksums="required"):
    """Open an OME-Zarr image written by this package, read-only, verifying what is read.

    Every file zarr reads from the image (metadata and chunks) is first compared with the
    SHA-256 recorded when the store was written (:mod:`tessera.io.store_checksums`), so a damaged chunk
    is refused the moment a job touches it and chunks a job never reads cost nothing.

    Parameters
    ----------
    path : str or Path
    checksums : {'required', 'if-present'}, optional
        ``'required'`` (the pipeline's own stores) refuses files without a record;
        ``'if-present'`` (images given as input) checks only what carries records.

    Returns
    -------
    group : zarr.Group
    info : dict
        ``spacing`` (level-0 nm, z y x; converted from the axes' units, taken as nm where
        an axis states none), ``units_given`` (whether every axis states its unit),
        ``factors`` (per level), ``levels`` (list of zarr.Array) and ``extra`` (the
        ``tessera`` attributes).

    Examples
    --------
    >>> import tempfile, numpy as np
    >>> from tessera.io.store_checksums import record_checksums
    >>> d = Path(tempfile.mkdtemp()) / "raw.ome.zarr"
    >>> g = zarr.open_group(str(d), mode="w", zarr_format=3)
    >>> g.attrs["ome"] = multiscale_attrs(name="raw", spacing=(40, 8, 8), factors=[(1, 1, 1)])
    >>> _ = g.create_array("0", data=np.ones((2, 4, 4), np.uint8), dimension_names=AXES)
    >>> _ = record_checksums(d)
    >>> group, info = open_image(d)
    >>> info["spacing"], info["factors"], int(info["levels"][0][:].sum())
    ((40.0, 8.0, 8.0), [(1, 1, 1)], 32)
    """
    path = Path(path)
    if checksums not in ("required", "if-present"):
        raise TesseraInputError(f"checksums must be 'required' or 'if-present', got {checksums!r}")
    if not path.is_dir():
        raise TesseraInputError(
            "not an OME-Zarr image (zarr v3 group): no such folder", source=path
        )
    try:
        store = checked_store(path, required=checksums == "required")
        group = zarr.open_group(store=store, mode="r", zarr_format=3)
    except (FileNotFoundError, zarr.errors.GroupNotFoundError, ValueError) as exc:
        raise TesseraInputError(
            f"not an OME-Zarr image (zarr v3 group): {exc}", source=path
        ) from None
    attrs = group.attrs.asdict()
    try:
        ms = attrs["ome"]["multiscales"][0]
        datasets = ms["datasets"]
        scales = [d["coordinateTransformations"][0]["scale"] for d in datasets]
    except (KeyError, IndexError, TypeError):
        raise TesseraInputError(
            "missing OME-Zarr 'ome.multiscales' metadata with a scale per level", source=path
        ) from None
    _check_axis_names(ms, source=path)
    _check_finest_first(datasets, scales, source=path)
    factors = [
        tuple(int(round(s / s0)) for s, s0 in zip(sc, scales[0], strict=False)) for sc in scales
    ]
    units = axis_units(ms, source=path)
    spacing = _in_nm(scales[0], units)
    levels = []
    for d in datasets:
        try:
            levels.append(group[d["path"]])
        except (KeyError, FileNotFoundError, zarr.errors.BaseZarrError):
            raise TesseraInputError(
                f"the multiscale metadata lists level {d['path']!r}, but the image has no such "
                "array (a level lost in copying?)",
                source=path,
            ) from None
    return group, {
        "spacing": spacing,
        "units_given": all(unit is not None for unit in units),
        "factors": factors,
        "levels": levels,
        "extra": attrs.get("tessera", {}),
    }


def _check_axis_names(multiscale, *, source):
    """Refuse axes other than z, y, x in that order: arrays are read as (z, y, x), so an image
    stored as (x, y, z) would otherwise come in transposed, without a word."""
    axes = multiscale.get("axes")
    if axes is None:
        return
    names = [a.get("name") if isinstance(a, dict) else a for a in axes]
    if names != list(AXES):
        raise TesseraInputError(
            f"its axes are {names}; expected the three space axes {list(AXES)} in that order "
            "(arrays are read as z, y, x): save the image with axes z, y, x",
            source=source,
        )


def _check_finest_first(datasets, scales, *, source):
    """Refuse levels not listed from the finest to coarser ones: the first is read as level 0."""
    for d, scale in zip(datasets[1:], scales[1:], strict=True):
        if any(float(s) < float(s0) for s, s0 in zip(scale, scales[0], strict=False)):
            raise TesseraInputError(
                f"level {d.get('path')!r} (scale {list(scale)}) is finer than the first level "
                f"{datasets[0].get('path')!r} (scale {list(scales[0])}); expected the levels "
                "listed from the finest to coarser ones, as OME-Zarr orders them",
                source=source,
            )


#: Nanometres per length unit of the OME-Zarr axes (the specification's UDUNITS-2 names).
NM_PER_UNIT = {
    "angstrom": 0.1,
    "attometer": 1e-9,
    "centimeter": 1e7,
    "decimeter": 1e8,
    "femtometer": 1e-6,
    "foot": 3.048e8,
    "inch": 2.54e7,
    "meter": 1e9,
    "micrometer": 1e3,
    "millimeter": 1e6,
    "nanometer": 1.0,
    "picometer": 1e-3,
}


def axis_units(multiscale, *, source=None):
    """The unit of each axis of a multiscale's ``axes`` (None where an axis states none).

    Parameters
    ----------
    multiscale : dict
        One entry of an image's ``ome.multiscales``.
    source : str or Path, optional
        The image, named in the error message.

    Returns
    -------
    list of (str or None)
        One per axis; each a key of :data:`NM_PER_UNIT`.

    Raises
    ------
    TesseraInputError
        For a unit that is not a length unit of the specification.

    Examples
    --------
    >>> axis_units({"axes": [{"name": "z", "unit": "micrometer"}, {"name": "y"}, {"name": "x"}]})
    ['micrometer', None, None]
    """
    axes = multiscale.get("axes") or [{} for _ in AXES]
    units = []
    for axis in axes:
        unit = axis.get("unit") if isinstance(axis, dict) else None
        if unit is not None and unit not in NM_PER_UNIT:
            name = axis.get("name", "?")
            raise TesseraInputError(
                f"axis {name!r} has unit {unit!r}; expected a length unit of OME-Zarr "
                f"({', '.join(sorted(NM_PER_UNIT))})",
                source=source,
            )
        units.append(unit)
    return units


def _in_nm(scale, units):
    """A level's scale converted to nm from its axes' units (an axis without one: taken as nm)."""
    return tuple(
        float(s) * (1.0 if unit is None else NM_PER_UNIT[unit])
        for s, unit in zip(scale, units, strict=False)
    )


def _multiscales(attrs):
    """(the attribute key, the list of multiscales) of a group: 0.5 keeps them under ``ome``,
    0.4 at the top of the attributes; (None, []) for a group without."""
    ome = attrs.get("ome")
    if isinstance(ome, dict) and isinstance(ome.get("multiscales"), list):
        return "ome.multiscales", ome["multiscales"]
    if isinstance(attrs.get("multiscales"), list):
        return "multiscales", attrs["multiscales"]
    return None, []


def _positive_number(value):
    return (
        isinstance(value, (int, float))
        and not isinstance(value, bool)
        and math.isfinite(value)
        and value > 0
    )


def _scale_of(transforms, *, where, source):
    """The ``scale`` of a list of coordinate transformations (None when it holds none)."""
    for transform in transforms if isinstance(transforms, list) else []:
        if isinstance(transform, dict) and transform.get("type") == "scale":
            scale = transform.get("scale")
            if (
                not isinstance(scale, list)
                or len(scale) != len(AXES)
                or not all(_positive_number(v) for v in scale)
            ):
                raise TesseraInputError(
                    f"{where} has scale {scale!r}; expected {len(AXES)} numbers > 0 (z, y, x)",
                    source=source,
                )
            return [float(v) for v in scale]
    return None


def level_spacing(attrs, level_path, *, source=None):
    """The voxel size that a multiscale image's metadata give one of its levels.

    Reads OME-Zarr 0.5 (``ome.multiscales``) and 0.4 (``multiscales`` at the top of the
    group's attributes): the ``scale`` transformation of the dataset whose ``path`` is
    `level_path`, times the multiscale's own scale where it has one, converted to nm from the
    axes' units. The axes must be z, y, x in that order.

    Parameters
    ----------
    attrs : dict
        The attributes of the group holding the multiscale image.
    level_path : str
        The level's array path relative to that group, e.g. ``"0"``.
    source : str or Path, optional
        Named in error messages.

    Returns
    -------
    dict or None
        ``spacing`` (nm; z, y, x), ``units_given`` (whether every axis states its unit) and
        ``attribute`` (the key read); None when no multiscale of the group lists the level.

    Raises
    ------
    TesseraInputError
        Axes other than z, y, x, a unit that is not a length, or a scale that is not three
        numbers > 0.

    Examples
    --------
    >>> axes = [{"name": a, "type": "space", "unit": "micrometer"} for a in "zyx"]
    >>> level = {"path": "0", "coordinateTransformations": [
    ...     {"type": "scale", "scale": [0.04, 0.008, 0.008]}]}
    >>> found = level_spacing({"multiscales": [{"axes": axes, "datasets": [level]}]}, "0")
    >>> tuple(round(v, 6) for v in found["spacing"]), found["units_given"], found["attribute"]
    ((40.0, 8.0, 8.0), True, 'multiscales')
    >>> level_spacing({"multiscales": [{"axes": axes, "datasets": [level]}]}, "1") is None
    True
    """
    key, multiscales = _multiscales(attrs)
    for ms in multiscales:
        datasets = ms.get("datasets") if isinstance(ms, dict) else None
        for dataset in datasets if isinstance(datasets, list) else []:
            if isinstance(dataset, dict) and str(dataset.get("path")).strip("/") == level_path:
                return _level_found(key, ms, dataset, level_path, source=source)
    return None


def _level_found(key, multiscale, dataset, level_path, *, source):
    _check_axis_names(multiscale, source=source)
    units = axis_units(multiscale, source=source)
    where = f"attribute {key}, level {level_path!r},"
    scale = _scale_of(dataset.get("coordinateTransformations"), where=where, source=source)
    if scale is None:
        return None
    # a multiscale-wide scale applies after each level's own (OME-Zarr 0.4 and 0.5)
    overall = _scale_of(
        multiscale.get("coordinateTransformations"), where=f"attribute {key}", source=source
    )
    if overall is not None:
        scale = [a * b for a, b in zip(scale, overall, strict=True)]
    return {
        "spacing": _in_nm(scale, units),
        "units_given": all(unit is not None for unit in units),
        "attribute": key,
    }


def working_level(factors, downsample, *, source=None):
    """Index of the pyramid level reduced in-plane by `downsample`.

    A target's downsampling factor (1, 2, 4, ...) selects the level it is trained and predicted at.

    Parameters
    ----------
    factors : sequence of sequence of 3 int
        Reduction factor (z, y, x) of each level, as ``open_image`` reports them.
    downsample : int
        The in-plane (y and x) factor wanted.
    source : str or Path, optional
        The image, named in the error message.

    Returns
    -------
    int

    Raises
    ------
    TesseraInputError
        When no level has that in-plane factor; the message lists the factors there are.

    Examples
    --------
    >>> working_level([(1, 1, 1), (1, 2, 2), (1, 4, 4)], 4)
    2
    """
    for level, f in enumerate(factors):
        if f[1] == downsample and f[2] == downsample:
            return level
    available = sorted({f[2] for f in factors})
    raise TesseraInputError(
        f"no pyramid level is downsampled {downsample}x in-plane; levels have {available} "
        "(raise pyramid.levels or choose one of these)",
        source=source,
    )
