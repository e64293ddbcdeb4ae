"""Feature standardisation shared by the two network kinds (LDNN and MLP).

Both networks are fitted on standardised features and store the per-feature ``mean`` and
``scale``; at prediction time the standardisation is folded into the first layer instead of being
applied to every row.
"""

import numpy as np

from tessera.cascade.classifiers.base import STATE_SOURCE
from tessera.errors import TesseraInputError


def standardisation(X):
    """Per-feature mean and scale (standard deviation; 1 where a feature is constant), float32.

    Parameters
    ----------
    X : (N, C) ndarray of float32

    Returns
    -------
    mean, scale : (C,) ndarray of float32
        Computed in float64, then cast.

    Examples
    --------
    >>> mean, scale = standardisation(np.array([[1.0, 5.0], [3.0, 5.0]], dtype=np.float32))
    >>> mean, scale
    (array([2., 5.], dtype=float32), array([1., 1.], dtype=float32))
    """
    mean = X.mean(axis=0, dtype=np.float64)
    std = X.std(axis=0, dtype=np.float64)
    scale = np.where(std > 1e-12, std, 1.0)
    return mean.astype(np.float32), scale.astype(np.float32)


def standardise(X, mean, scale):
    """Standardised features ``(X - mean) / scale``.

    Parameters
    ----------
    X : (N, C) ndarray
    mean, scale : (C,) ndarray
        As returned by :func:`standardisation`.

    Returns
    -------
    (N, C) ndarray

    Examples
    --------
    >>> standardise(np.array([[1.0, 4.0]]), np.array([1.0, 2.0]), np.array([1.0, 2.0]))
    array([[0., 1.]])
    """
    return (X - mean) / scale


def folded_first_layer(W, b, mean, scale):
    """First-layer weights and bias that apply to raw features what (W, b) applies to
    standardised ones: ((X - mean) / scale) W + b = X (W / scale) + (b - (mean / scale) W).

    Saves standardising every predicted row (a full pass over the feature matrix).

    Parameters
    ----------
    W : (C, H) ndarray of float32
    b : (H,) ndarray of float32
    mean, scale : (C,) ndarray of float32

    Returns
    -------
    W, b : ndarray of float32
        Computed in float64, then cast.

    Examples
    --------
    >>> W, b = np.array([[2.0], [1.0]], np.float32), np.array([0.5], np.float32)
    >>> mean, scale = np.array([1.0, -1.0], np.float32), np.array([2.0, 1.0], np.float32)
    >>> Wf, bf = folded_first_layer(W, b, mean, scale)
    >>> X = np.array([[3.0, 2.0]], np.float32)
    >>> bool(np.allclose(X @ Wf + bf, standardise(X, mean, scale) @ W + b))
    True
    """
    W64 = W.astype(np.float64) / scale.astype(np.float64)[:, None]
    b64 = b.astype(np.float64) - mean.astype(np.float64) @ W64
    return W64.astype(np.float32), b64.astype(np.float32)


def check_scale(arrays):
    """Refuse a stored ``mean`` or ``scale`` that is not finite, or a scale that is not positive.

    Parameters
    ----------
    arrays : mapping of str to ndarray
        A stored state holding ``mean`` and ``scale``.

    Raises
    ------
    TesseraInputError

    Examples
    --------
    >>> check_scale({"mean": np.zeros(2), "scale": np.array([1.0, 0.0])})
    Traceback (most recent call last):
    ...
    tessera.errors.TesseraInputError: classifier state: 'mean' and 'scale' must be finite with scale > 0
    """
    if not (
        np.isfinite(arrays["mean"]).all()
        and np.isfinite(arrays["scale"]).all()
        and (arrays["scale"] > 0).all()
    ):
        raise TesseraInputError(
            "'mean' and 'scale' must be finite with scale > 0", source=STATE_SOURCE
        )
