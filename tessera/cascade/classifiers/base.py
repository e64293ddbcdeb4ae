"""The interface every classifier kind shares: input checks, chunked prediction, stored state.

:class:`BinaryClassifier` checks features, labels, sample weights and options, predicts in chunks
of :data:`CHUNK_ROWS` rows, and exports a fitted model as numeric arrays plus JSON-able metadata
(:meth:`BinaryClassifier.to_state`). Each kind subclasses it in a module of its own and supplies
the fitting, the prediction of one chunk and the layout of its arrays.
"""

import contextlib
import contextvars
import functools

import numpy as np
from threadpoolctl import ThreadpoolController

from tessera.errors import TesseraInputError

CHUNK_ROWS = 2**18
STATE_FORMAT = "tessera.cascade.classifier"
STATE_VERSION = 1

# The `source` of errors about a stored model (its arrays and metadata).
STATE_SOURCE = "classifier state"


@functools.cache
def _threadpools():
    # Finding the loaded thread pools reads the process's memory map (milliseconds); prediction
    # in bands sets the limit thousands of times, so the pools are found once. The BLAS a
    # prediction uses is numpy's, loaded with numpy, before this first runs.
    return ThreadpoolController()


# The thread count a limit set by this module holds in this context, None outside any: a limit
# asked for again inside one (a band of rows within a node's map) is then not set once more.
_LIMITED = contextvars.ContextVar("tessera_thread_limit", default=None)


@contextlib.contextmanager
def _thread_limit(threads):
    if _LIMITED.get() == threads:
        yield
        return
    token = _LIMITED.set(threads)
    try:
        with _threadpools().limit(limits=threads):
            yield
    finally:
        _LIMITED.reset(token)


# ---------------------------------------------------------------------------------------------
# Input checks
# ---------------------------------------------------------------------------------------------


def _check_features_shape(X, *, n_features=None, allow_empty=False):
    """Check `X` is a 2D floating array (cast later, chunk by chunk, to float32)."""
    X = np.asarray(X)
    if X.ndim != 2:
        raise TesseraInputError(f"X must be a 2D (samples, features) array, got shape {X.shape}")
    if X.dtype.kind != "f":
        raise TesseraInputError(f"X must have a floating dtype (float32 expected), got {X.dtype}")
    if X.shape[1] < 1 or (X.shape[0] < 1 and not allow_empty):
        raise TesseraInputError(f"X must have at least one sample and one feature, got {X.shape}")
    if n_features is not None and X.shape[1] != n_features:
        raise TesseraInputError(
            f"X has {X.shape[1]} features but the classifier was fitted on {n_features}"
        )
    return X


def _as_float32_finite(X):
    X = np.ascontiguousarray(X, dtype=np.float32)
    if not np.isfinite(X).all():
        raise TesseraInputError("X contains NaN or infinite values")
    return X


def _check_labels(y, n):
    y = np.asarray(y)
    if y.ndim != 1 or y.shape[0] != n:
        raise TesseraInputError(f"y must be a 1D array of {n} labels, got shape {y.shape}")
    if y.dtype.kind not in "biuf":
        raise TesseraInputError(f"y must hold numbers 0 and 1, got dtype {y.dtype}")
    is_one = y == 1
    if not (is_one | (y == 0)).all():
        raise TesseraInputError("y must hold only the labels 0 (background) and 1 (target)")
    if is_one.all() or not is_one.any():
        present = 1 if is_one.any() else 0
        raise TesseraInputError(f"y must contain both classes 0 and 1; only {present} is present")
    return is_one.astype(np.uint8)


def _check_weights(sample_weight, y):
    n = y.shape[0]
    if sample_weight is None:
        return np.ones(n, dtype=np.float64)
    w = np.asarray(sample_weight)
    if w.ndim != 1 or w.shape[0] != n:
        raise TesseraInputError(
            f"sample_weight must be a 1D array of {n} weights, got shape {w.shape}"
        )
    if w.dtype.kind not in "biuf":
        raise TesseraInputError(f"sample_weight must be numeric, got dtype {w.dtype}")
    w = w.astype(np.float64)
    if not np.isfinite(w).all() or (w < 0).any():
        raise TesseraInputError("sample_weight must be finite and non-negative")
    for label in (0, 1):
        if not w[y == label].sum() > 0:
            raise TesseraInputError(f"sample_weight gives class {label} a total weight of zero")
    return w


def int_option(name, value, low):
    """Check an integer option of a classifier kind.

    Parameters
    ----------
    name : str
        The option's name, for the message.
    value : object
        The value given; booleans are refused (they are integers to Python, not to a user).
    low : int
        The smallest value allowed.

    Returns
    -------
    int

    Raises
    ------
    TesseraInputError
        `value` is not an integer or is below `low`.

    Examples
    --------
    >>> int_option("epochs", np.int64(5), 1)
    5
    >>> int_option("epochs", True, 1)
    Traceback (most recent call last):
    ...
    tessera.errors.TesseraInputError: option 'epochs' must be an integer >= 1, got True
    """
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
        raise TesseraInputError(f"option {name!r} must be an integer >= {low}, got {value!r}")
    return int(value)


def float_option(name, value, *, low=0.0, inclusive=False):
    """Check a real-valued option of a classifier kind.

    Parameters
    ----------
    name : str
        The option's name, for the message.
    value : object
        The value given: an integer or float (not a boolean), finite.
    low : float, optional
        The lower bound.
    inclusive : bool, optional
        Whether `low` itself is allowed.

    Returns
    -------
    float

    Raises
    ------
    TesseraInputError
        `value` is not a number, not finite, or not above (or at, with `inclusive`) `low`.

    Examples
    --------
    >>> float_option("alpha", 0, inclusive=True)
    0.0
    >>> float_option("learning_rate", 0)
    Traceback (most recent call last):
    ...
    tessera.errors.TesseraInputError: option 'learning_rate' must be > 0.0, got 0.0
    """
    if isinstance(value, bool) or not isinstance(value, (int, float, np.floating, np.integer)):
        raise TesseraInputError(f"option {name!r} must be a number, got {value!r}")
    value = float(value)
    ok = np.isfinite(value) and (value >= low if inclusive else value > low)
    if not ok:
        raise TesseraInputError(
            f"option {name!r} must be {'>=' if inclusive else '>'} {low}, got {value!r}"
        )
    return value


# ---------------------------------------------------------------------------------------------
# The common interface
# ---------------------------------------------------------------------------------------------


class BinaryClassifier:
    """Common interface of the cascade's binary classifiers; create with ``make_classifier``.

    Attributes
    ----------
    kind : str
        One of ``KINDS`` (:mod:`tessera.cascade.classifiers.registry`).
    options : dict
        Every option of the kind, defaults filled in (JSON-able).
    seed, threads : int
    n_features_ : int or None
        Number of features seen in `fit` (None before fitting).

    Examples
    --------
    >>> from tessera.cascade.classifiers import make_classifier
    >>> rng = np.random.default_rng(1)
    >>> X = rng.normal(size=(300, 3)).astype(np.float32)
    >>> y = (X[:, 1] > 0).astype(np.uint8)
    >>> clf = make_classifier("ldnn", seed=0, n_groups=2, n_per_group=2, epochs=5)
    >>> clf.fit(X, y, sample_weight=np.where(y == 1, 2.0, 1.0)).n_features_
    3
    >>> arrays, meta = clf.to_state()
    >>> sorted(arrays), meta["kind"], meta["n_features"]
    (['bias', 'mean', 'scale', 'weights'], 'ldnn', 3)
    """

    kind = None
    _defaults = {}

    def __init__(self, *, seed, threads=1, **options):
        if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
            raise TesseraInputError(f"seed must be a non-negative integer, got {seed!r}")
        self.seed = int(seed)
        self.threads = int_option("threads", threads, 1)
        unknown = sorted(set(options) - set(self._defaults))
        if unknown:
            raise TesseraInputError(
                f"unknown option(s) {unknown} for {self.kind}; allowed: {sorted(self._defaults)}"
            )
        merged = {**self._defaults, **options}
        self.options = self._check_options(merged)
        self.n_features_ = None
        self._folded = None  # first layer with the standardisation folded in (networks)

    # -- to be provided by each kind --------------------------------------------------------
    def _check_options(self, options):
        raise NotImplementedError

    def _fit(self, X, y, w):
        raise NotImplementedError

    def _predict_chunk(self, X):
        raise NotImplementedError

    def _arrays(self):
        raise NotImplementedError

    def _array_spec(self, meta):
        """Map array name -> (dtype, shape); shape items are ints, None (any) or size symbols."""
        raise NotImplementedError

    def _load(self, arrays, meta):
        raise NotImplementedError

    def _linear_weights(self):
        return None  # kinds whose first step is a product with a matrix return (W, b)

    def _predict_from_linear(self, Z):
        raise NotImplementedError

    def _versions(self):
        import sklearn  # noqa: PLC0415 - scikit-learn (~1 s) stays out of workflow planning

        return {"numpy": np.__version__, "scikit-learn": sklearn.__version__}

    # -- shared ---------------------------------------------------------------------------------
    def fit(self, X, y, *, sample_weight=None):
        """Fit on features `X` and binary labels `y`.

        Parameters
        ----------
        X : (N, C) ndarray of float
            Features; cast to float32. Must be finite.
        y : (N,) ndarray
            Labels, 0 (background) or 1 (target); both must occur.
        sample_weight : (N,) ndarray, optional
            Non-negative weight of every sample (class balancing goes here); each class must keep
            a positive total weight.

        Returns
        -------
        self
        """
        X = _as_float32_finite(_check_features_shape(X))
        y = _check_labels(y, X.shape[0])
        w = _check_weights(sample_weight, y)
        self._folded = None
        self._fit(X, y, w)
        self.n_features_ = X.shape[1]
        return self

    def predict(self, X):
        """Probability of class 1 for every row of `X`.

        Parameters
        ----------
        X : (N, C) ndarray of float
            Same features as in `fit`; any N (processed in chunks of :data:`CHUNK_ROWS` rows so
            that memory stays bounded).

        Returns
        -------
        (N,) ndarray of float32
        """
        if self.n_features_ is None:
            raise TesseraInputError(f"this {self.kind} classifier is not fitted yet")
        X = _check_features_shape(X, n_features=self.n_features_, allow_empty=True)
        out = np.empty(X.shape[0], dtype=np.float32)
        with self.thread_limit():
            for start in range(0, X.shape[0], CHUNK_ROWS):
                chunk = _as_float32_finite(X[start : start + CHUNK_ROWS])
                out[start : start + chunk.shape[0]] = self._predict_chunk(chunk)
        return out

    def linear_weights(self):
        """(W, b): (C, K) and (K,) float32 when the model's first step is ``X @ W + b``, a
        product of the features with a matrix (networks); else None.

        A caller that can form the product from parts of X (column blocks, or columns that
        repeat over pixels) passes it to :meth:`predict_from_linear` instead of building X: the
        same model, its sums taken in another order (float32 rounding, about 1e-7 relative).
        """
        if self.n_features_ is None:
            raise TesseraInputError(f"this {self.kind} classifier is not fitted yet")
        return self._linear_weights()

    def predict_from_linear(self, Z):
        """Probability of class 1 for rows whose first step ``X @ W + b`` (:meth:`linear_weights`)
        is `Z`.

        Parameters
        ----------
        Z : (N, K) ndarray of float32
            C-contiguous; used as working space and overwritten. Must be finite.

        Returns
        -------
        (N,) ndarray of float32

        Examples
        --------
        >>> from tessera.cascade.classifiers import make_classifier
        >>> rng = np.random.default_rng(0)
        >>> X = rng.normal(size=(200, 3)).astype(np.float32)
        >>> clf = make_classifier("mlp", seed=0, max_iter=2).fit(X, X[:, 0] > 0)
        >>> W, b = clf.linear_weights()
        >>> bool(np.allclose(clf.predict_from_linear(X @ W + b), clf.predict(X), atol=1e-6))
        True
        """
        if not np.isfinite(Z).all():
            raise TesseraInputError("X contains NaN or infinite values")
        with self.thread_limit():
            return self._predict_from_linear(Z)

    def thread_limit(self):
        """Context that limits BLAS threads to the model's ``threads`` (as :meth:`predict`);
        inside a limit of the same count already set, it sets nothing again."""
        return _thread_limit(self.threads)

    def to_state(self):
        """Export the fitted model as numeric arrays plus JSON-able metadata.

        Returns
        -------
        arrays : dict of str to ndarray
            Numeric arrays only (no object dtype), ready for ``np.savez``.
        meta : dict
            ``format``, ``format_version``, ``kind``, ``options``, ``seed``, ``n_features`` and
            the ``versions`` of the libraries involved.
        """
        if self.n_features_ is None:
            raise TesseraInputError(f"this {self.kind} classifier is not fitted yet")
        arrays = self._arrays()
        meta = {
            "format": STATE_FORMAT,
            "format_version": STATE_VERSION,
            "kind": self.kind,
            "options": _jsonable(self.options),
            "seed": self.seed,
            "n_features": int(self.n_features_),
            "versions": self._versions(),
        }
        return arrays, meta

    def __repr__(self):
        name = type(self).__name__
        return f"{name}(kind={self.kind!r}, seed={self.seed}, options={self.options})"


def _jsonable(options):
    return {k: list(v) if isinstance(v, tuple) else v for k, v in options.items()}
