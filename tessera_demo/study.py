"""The demo study's seeds and its built-in effect.

Each dataset's seed derives from the study seed and the dataset's name; each rendering step
draws from its own generator spawned from that seed, so a step's draws do not depend on how
many numbers another step used. The per-condition factors, the animal spread and the study
seed are the ``demo:`` section of the workflow's config (``config/config.yaml``); they reach
these functions as arguments.
"""

import math
import zlib

import numpy as np

from tessera.errors import TesseraInputError
from tessera_demo.checks import check_scale, check_seed

__all__ = ["STREAMS", "dataset_seed", "streams", "subject_volume_scale"]

#: The rendering steps with a random generator of their own, in the order they are spawned.
STREAMS = (
    "cells",
    "nuclei",
    "lipids",
    "mito_count",
    "mito_shape",
    "mito_place",
    "vesicles",
    "texture",
    "noise",
    "defects",
    "tiles",
)


def dataset_seed(study_seed, dataset):
    """Return the seed of one dataset of a study, stable across runs and platforms.

    Parameters
    ----------
    study_seed : int
        Non-negative seed of the whole study.
    dataset : str
        Dataset name.

    Returns
    -------
    int
        CRC-32 (``zlib.crc32``) of the UTF-8 text ``"<study_seed>:<dataset>"``, in
        ``[0, 2**32)``. Python's ``hash()`` is salted per process and is not used.

    Examples
    --------
    >>> import zlib
    >>> dataset_seed(7, "tn1") == zlib.crc32(b"7:tn1")
    True
    >>> dataset_seed(7, "tn1") != dataset_seed(7, "tn2")
    True
    """
    study_seed = check_seed(study_seed, name="study_seed")
    if not isinstance(dataset, str) or not dataset:
        raise TesseraInputError(f"dataset must be a non-empty string, got {dataset!r}")
    return zlib.crc32(f"{study_seed}:{dataset}".encode())


def subject_volume_scale(subject, condition, *, study_seed, condition_scales, animal_sd):
    """Return the mitochondrial volume factor of one animal: condition effect times animal effect.

    Parameters
    ----------
    subject : str
        Animal name (for example ``"cd2"``).
    condition : str
        Condition name, a key of `condition_scales`.
    study_seed : int
        Non-negative seed of the study; the animal factor is drawn from it and `subject` only.
    condition_scales : dict of str to float
        Volume factor per condition (the config's ``demo: mito_volume_scale``).
    animal_sd : float
        Standard deviation of the natural log of the animal factor (log-normal, median 1).

    Returns
    -------
    float
        ``condition_scales[condition] * exp(e)`` with ``e ~ Normal(0, animal_sd**2)`` drawn by
        ``numpy.random.default_rng(dataset_seed(study_seed, "animal:" + subject))``.

    Examples
    --------
    >>> scales = {"thermoneutral": 1.0, "cold": 1.25}
    >>> subject_volume_scale("cd1", "cold", study_seed=1, condition_scales=scales, animal_sd=0.0)
    1.25
    """
    scales = dict(condition_scales)
    if condition not in scales:
        raise TesseraInputError(f"condition must be one of {sorted(scales)}, got {condition!r}")
    base = check_scale(scales[condition], name=f"condition_scales[{condition!r}]")
    try:
        sd = float(animal_sd)
    except (TypeError, ValueError):
        raise TesseraInputError(f"animal_sd must be a number, got {animal_sd!r}") from None
    if not math.isfinite(sd) or sd < 0:
        raise TesseraInputError(f"animal_sd must be finite and >= 0, got {animal_sd!r}")
    if not isinstance(subject, str) or not subject:
        raise TesseraInputError(f"subject must be a non-empty string, got {subject!r}")
    rng = np.random.default_rng(dataset_seed(study_seed, "animal:" + subject))
    eps = float(rng.normal(0.0, sd)) if sd > 0 else 0.0
    return float(base * math.exp(eps))


def streams(seed):
    """One independent random generator per rendering step, all derived from `seed`.

    Parameters
    ----------
    seed : int
        Non-negative seed of one dataset (see :func:`dataset_seed`).

    Returns
    -------
    dict of str to numpy.random.Generator
        One generator per name in :data:`STREAMS`, spawned in that order from
        ``numpy.random.SeedSequence(seed)``.

    Examples
    --------
    >>> a, b = streams(3), streams(3)
    >>> a["noise"].random() == b["noise"].random() != a["cells"].random()
    True
    """
    children = np.random.SeedSequence(check_seed(seed)).spawn(len(STREAMS))
    return {name: np.random.default_rng(c) for name, c in zip(STREAMS, children, strict=True)}
