"""Section defects injected into a demo volume: one lost (blank or torn) and one blurred.

Labels stay the true geometry; only the image is damaged, so quality control has something to
find and the truth says what it should find.
"""

import math

import numpy as np
from scipy import ndimage

__all__ = ["defocus", "plan_defects", "remove_material"]

_DEFECT_BLUR_SIGMA_PX = 4.0
_TORN_FRACTION = (0.35, 0.6)
_MISSING_VALUE = 0.0


def plan_defects(rng, grid):
    """Where the lost (blank or torn) and the out-of-focus sections are, and how torn.

    Parameters
    ----------
    rng : numpy.random.Generator
        The dataset's ``defects`` stream.
    grid : tessera_demo.geometry.Grid
        The volume; defects keep 2 sections from the top and bottom, 2 sections apart.

    Returns
    -------
    dict
        ``lost`` and ``blurred`` section indices, ``torn`` (bool: partly rather than wholly
        lost) and, when torn, the lost ``fraction`` and the tear's direction ``theta``.

    Examples
    --------
    >>> from tessera_demo.geometry import Grid
    >>> plan = plan_defects(np.random.default_rng(0), Grid((10, 64, 64), (40.0, 8.0, 8.0)))
    >>> 2 <= plan["lost"] <= 7 and abs(plan["lost"] - plan["blurred"]) >= 2
    True
    """
    nz = grid.shape[0]
    allowed = list(range(2, nz - 2))
    lost = int(rng.choice(allowed))
    blurred = int(rng.choice([z for z in allowed if abs(z - lost) >= 2]))
    torn = bool(rng.random() < 0.5)
    plan = {"lost": lost, "blurred": blurred, "torn": torn}
    if torn:
        plan["fraction"] = rng.uniform(*_TORN_FRACTION)
        plan["theta"] = rng.uniform(0, 2 * math.pi)
    return plan


def defocus(img, plan):
    """Blur the planned out-of-focus section of the float image `img`, in place.

    Parameters
    ----------
    img : ndarray of float32, shape (P, M, N)
        The image before noise.
    plan : dict
        As returned by :func:`plan_defects` (only ``blurred`` is used).

    Examples
    --------
    >>> img = np.zeros((3, 9, 9), dtype=np.float32)
    >>> img[1, 4, 4] = 1.0
    >>> defocus(img, {"blurred": 1})
    >>> bool(img[1, 4, 4] < 1.0 and img[1, 4, 5] > 0.0)
    True
    """
    # Out-of-focus blur happens in the optics, before the detector adds its noise.
    z = plan["blurred"]
    img[z] = ndimage.gaussian_filter(img[z], sigma=_DEFECT_BLUR_SIGMA_PX)


def remove_material(grid, img, plan):
    """Blank the planned lost section of `img` (wholly, or the torn part), in place.

    Parameters
    ----------
    grid : tessera_demo.geometry.Grid
        The volume.
    img : ndarray of float32, shape (P, M, N)
        The image after noise and drift.
    plan : dict
        As returned by :func:`plan_defects`; a torn section loses the part beyond a straight
        cut at angle ``theta`` that leaves out ``fraction`` of it.

    Returns
    -------
    dict
        Lists of section indices: ``blank`` (missing data), ``torn`` (partly missing),
        ``blurred``, as recorded in ``truth.json``.

    Examples
    --------
    >>> from tessera_demo.geometry import Grid
    >>> img = np.ones((4, 8, 8), dtype=np.float32)
    >>> plan = {"lost": 1, "blurred": 3, "torn": False}
    >>> remove_material(Grid((4, 8, 8), (40.0, 8.0, 8.0)), img, plan)
    {'blank': [1], 'torn': [], 'blurred': [3]}
    >>> float(img[1].max()), float(img[0].min())
    (0.0, 1.0)
    """
    lost = plan["lost"]
    if plan["torn"]:
        yy, xx = np.mgrid[0 : grid.shape[1], 0 : grid.shape[2]]
        proj = yy * math.cos(plan["theta"]) + xx * math.sin(plan["theta"])
        cut = np.quantile(proj, 1 - plan["fraction"])
        img[lost][proj > cut] = _MISSING_VALUE
    else:
        img[lost] = _MISSING_VALUE
    return {"blank": [lost], "torn": [lost] if plan["torn"] else [], "blurred": [plan["blurred"]]}
