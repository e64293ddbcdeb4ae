"""The classifier kinds by name: their one list, creation, and rebuilding from a stored state.

:data:`KINDS` is the one list of kinds. The config schema's ``classifier`` enum and the names the
methods text gives the kinds follow it; tests/test_classifiers.py checks that they do.
"""

import numpy as np

from tessera.cascade.classifiers.base import (
    STATE_FORMAT,
    STATE_SOURCE,
    STATE_VERSION,
    BinaryClassifier,
)
from tessera.cascade.classifiers.boosting import HistGradientBoostingBinaryClassifier
from tessera.cascade.classifiers.ldnn import LDNNClassifier
from tessera.cascade.classifiers.mlp import MLPBinaryClassifier
from tessera.cascade.classifiers.trees import (
    ExtraTreesBinaryClassifier,
    RandomForestBinaryClassifier,
)
from tessera.errors import TesseraInputError

_CLASSES = {
    cls.kind: cls
    for cls in (
        LDNNClassifier,
        MLPBinaryClassifier,
        ExtraTreesBinaryClassifier,
        RandomForestBinaryClassifier,
        HistGradientBoostingBinaryClassifier,
    )
}
KINDS = tuple(_CLASSES)


def linear_first_step(kind):
    """Whether models of `kind` start with a product of the features with a matrix, which
    prediction forms in parts (:meth:`BinaryClassifier.linear_weights`).

    Examples
    --------
    >>> linear_first_step("mlp"), linear_first_step("random_forest")
    (True, False)
    """
    if kind not in _CLASSES:
        raise TesseraInputError(f"unknown classifier kind {kind!r}; known: {list(KINDS)}")
    # the kinds that provide the first step's weights
    return _CLASSES[kind]._linear_weights is not BinaryClassifier._linear_weights


def make_classifier(kind, *, seed, threads=1, **options):
    """Create an unfitted binary classifier of one kind.

    Parameters
    ----------
    kind : str
        One of :data:`KINDS`.
    seed : int
        Seed of every random choice (initialisation, shuffling, bootstrap, feature draws). A fixed
        seed and thread count give the same model on the same machine.
    threads : int, optional
        Threads for fitting and predicting (BLAS, OpenMP or joblib, depending on the kind).
    **options
        Kind-specific settings; see the class of each kind for names and defaults. Unknown names
        raise :class:`TesseraInputError`.

    Returns
    -------
    BinaryClassifier

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> X = rng.normal(size=(400, 2)).astype(np.float32)
    >>> y = (X[:, 0] > 0).astype(np.uint8)
    >>> clf = make_classifier("ldnn", seed=0, n_groups=2, n_per_group=2, epochs=5).fit(X, y)
    >>> p = clf.predict(X)
    >>> p.dtype, p.shape, bool(((p > 0.5) == y).mean() > 0.9)
    (dtype('float32'), (400,), True)
    """
    if kind not in _CLASSES:
        raise TesseraInputError(f"unknown classifier kind {kind!r}; expected one of {KINDS}")
    return _CLASSES[kind](seed=seed, threads=threads, **options)


def classifier_from_state(arrays, meta, *, threads=1):
    """Rebuild a fitted classifier from the output of :meth:`BinaryClassifier.to_state`.

    Parameters
    ----------
    arrays : mapping of str to ndarray
        For example the ``NpzFile`` of ``np.load(path, allow_pickle=False)``. Must hold exactly the
        arrays the kind stores.
    meta : dict
        The metadata dict (as written, or read back from JSON).
    threads : int, optional
        Threads for prediction.

    Returns
    -------
    BinaryClassifier

    Raises
    ------
    TesseraInputError
        Unknown kind or format, missing or unexpected arrays, wrong dtypes or shapes, object
        arrays, inconsistent feature counts or a malformed tree.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> X = rng.normal(size=(300, 3)).astype(np.float32)
    >>> y = (X[:, 0] > 0).astype(np.uint8)
    >>> clf = make_classifier("random_forest", seed=0, n_estimators=4).fit(X, y)
    >>> arrays, meta = clf.to_state()
    >>> loaded = classifier_from_state(arrays, meta)
    >>> loaded.kind, bool((loaded.predict(X) == clf.predict(X)).all())
    ('random_forest', True)
    >>> classifier_from_state({}, meta)  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    tessera.errors.TesseraInputError: classifier state: random_forest state lacks arrays [...]
    """
    kind, n_features = _check_meta(meta)
    clf = _CLASSES[kind](seed=meta.get("seed"), threads=threads, **meta["options"])
    if not hasattr(arrays, "keys"):
        raise TesseraInputError("arrays must be a mapping of names to arrays", source=STATE_SOURCE)
    names = set(arrays.keys())
    expected = clf._array_spec(meta)
    missing = sorted(set(expected) - names)
    if missing:
        raise TesseraInputError(f"{kind} state lacks arrays {missing}", source=STATE_SOURCE)
    extra = sorted(names - set(expected))
    if extra:
        raise TesseraInputError(f"{kind} state has unexpected arrays {extra}", source=STATE_SOURCE)
    sizes = {"C": n_features}
    loaded = {
        name: _checked_array(name, arrays[name], dtype, shape, sizes)
        for name, (dtype, shape) in expected.items()
    }
    clf._load(loaded, meta)
    clf.n_features_ = n_features
    return clf


def _check_meta(meta):
    """Check the metadata of a stored classifier; return its kind and feature count."""
    if not isinstance(meta, dict):
        raise TesseraInputError(
            f"metadata must be a dict, got {type(meta).__name__}", source=STATE_SOURCE
        )
    if meta.get("format") != STATE_FORMAT or meta.get("format_version") != STATE_VERSION:
        raise TesseraInputError(
            f"metadata format must be {STATE_FORMAT!r} version {STATE_VERSION}, got "
            f"{meta.get('format')!r} version {meta.get('format_version')!r}",
            source=STATE_SOURCE,
        )
    kind = meta.get("kind")
    if kind not in _CLASSES:
        raise TesseraInputError(
            f"unknown classifier kind {kind!r}; expected one of {KINDS}", source=STATE_SOURCE
        )
    n_features = meta.get("n_features")
    if isinstance(n_features, bool) or not isinstance(n_features, int) or n_features < 1:
        raise TesseraInputError(
            f"meta 'n_features' must be an integer >= 1, got {n_features!r}", source=STATE_SOURCE
        )
    if not isinstance(meta.get("options"), dict):
        raise TesseraInputError("meta 'options' must be a dict", source=STATE_SOURCE)
    return kind, n_features


def _checked_array(name, arr, dtype, shape, sizes):
    """One stored array as an ndarray, checked against its ``(dtype, shape)`` spec.

    `sizes` maps the symbolic sizes of the specs to their values; the first array that uses a
    symbol fixes it for the others (the dict is updated in place).
    """
    arr = np.asarray(arr)
    if arr.dtype.hasobject or arr.dtype.kind not in "biuf":
        raise TesseraInputError(
            f"array {name!r} has non-numeric dtype {arr.dtype}", source=STATE_SOURCE
        )
    if arr.dtype != np.dtype(dtype):
        raise TesseraInputError(
            f"array {name!r} must have dtype {np.dtype(dtype)}, got {arr.dtype}",
            source=STATE_SOURCE,
        )
    if arr.ndim != len(shape):
        raise TesseraInputError(
            f"array {name!r} must have {len(shape)} dimensions, got shape {arr.shape}",
            source=STATE_SOURCE,
        )
    for axis, (want, got) in enumerate(zip(shape, arr.shape, strict=True)):
        if isinstance(want, str):
            # A symbolic size: the first array that uses it fixes it for the others.
            want = sizes.setdefault(want, got)
        if want is not None and got != want:
            raise TesseraInputError(
                f"array {name!r} must have shape {_shape_text(shape, sizes)}, got {arr.shape} "
                f"(axis {axis})",
                source=STATE_SOURCE,
            )
    return arr


def _shape_text(shape, sizes):
    return "(" + ", ".join(str(sizes.get(s, s)) if s is not None else "any" for s in shape) + ")"
