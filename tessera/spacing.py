"""The one voxel-spacing convention of the project.

Spacing is given per array axis, in axis order (z, y, x for volumes), in nanometres, as a tuple
of positive finite floats. A scalar means isotropic spacing.
"""

import math

import numpy as np

from tessera.errors import TesseraInputError


def normalize_spacing(spacing, ndim, *, name="spacing"):
    """Return `spacing` as a tuple of `ndim` positive finite floats.

    Parameters
    ----------
    spacing : float or sequence of float
        One value for all axes, or one per axis in array-axis order.
    ndim : int
        Number of array axes.
    name : str, optional
        Parameter name used in error messages.

    Returns
    -------
    tuple of float

    Raises
    ------
    TesseraInputError
        If the length does not match `ndim` or a value is not positive and finite.

    Examples
    --------
    >>> normalize_spacing(8, 2)
    (8.0, 8.0)
    >>> normalize_spacing([40, 8, 8], 3)
    (40.0, 8.0, 8.0)
    """
    if np.isscalar(spacing):
        values = [spacing] * ndim
    else:
        values = list(spacing)
        if len(values) != ndim:
            raise TesseraInputError(
                f"{name} must have one value per axis ({ndim}), got {len(values)}: {values!r}"
            )
    out = []
    for v in values:
        try:
            f = float(v)
        except (TypeError, ValueError):
            raise TesseraInputError(f"{name} values must be numbers, got {v!r}") from None
        if not math.isfinite(f) or f <= 0:
            raise TesseraInputError(f"{name} values must be positive and finite, got {v!r}")
        out.append(f)
    return tuple(out)


#: The largest voxel aspect (z spacing over in-plane spacing, as acquired) that counts as
#: near-isotropic. FIB-SEM stacks (about 1) are filtered in 3D and pooled in z as well as in plane;
#: thicker sections (serial-section TEM, SBEM: 3-10x their pixels) are handled section by section
#: (common practice: FIB-SEM is segmented in 3D, ssTEM and SBEM section by section).
NEAR_ISOTROPIC_ASPECT = 2.0

#: Voxel sizes an EM stack can have, in nm: from below an atom's size (0.1 nm; no electron
#: micrograph is sampled finer, common practice) to 0.1 mm. A value outside is a size in another
#: unit (8 nm written as 0.008, in µm). The datasets schema holds the same range.
VOXEL_NM_RANGE = (0.1, 100000.0)


def micrometre_hint(value):
    """The hint for a voxel size below :data:`VOXEL_NM_RANGE` that reads as µm written for nm.

    Parameters
    ----------
    value : float
        A voxel size as given, meant in nm.

    Returns
    -------
    str or None
        The hint, the value read as µm and converted to nm (× 1000); None for a value that is
        not positive or not below the range.

    Examples
    --------
    >>> micrometre_hint(0.005)
    'voxel sizes are in nm (0.005 µm = 5 nm?)'
    >>> micrometre_hint(0.0375)
    'voxel sizes are in nm (0.0375 µm = 37.5 nm?)'
    >>> micrometre_hint(8) is None, micrometre_hint(0) is None, micrometre_hint(-0.005) is None
    (True, True, True)
    """
    if not 0 < value < VOXEL_NM_RANGE[0]:
        return None
    return f"voxel sizes are in nm ({value:g} µm = {value * 1000:.6g} nm?)"


def near_isotropic(spacing):
    """Whether a volume's voxels, `spacing` (z, y, x) as acquired, count as near-isotropic.

    Examples
    --------
    >>> near_isotropic((5, 5, 5)), near_isotropic((10, 6, 6)), near_isotropic((40, 8, 8))
    (True, True, False)
    """
    z, y, _ = normalize_spacing(spacing, 3)
    return z / y <= NEAR_ISOTROPIC_ASPECT
