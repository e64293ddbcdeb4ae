"""Binary pixel classifiers of the cascade, stored as plain arrays plus JSON metadata.

Every classifier separates one target class (label 1) from background (label 0) on a float32
feature matrix ``X`` of shape ``(N, C)`` and predicts a float32 probability of class 1. Class
balancing is the caller's business, through ``sample_weight``.

Five kinds share one interface (:class:`BinaryClassifier`):

``ldnn``
    The logistic disjunctive normal network of the cascaded hierarchical model [1]_, written here
    in numpy from its published formula.
``mlp``
    A small multilayer perceptron trained by scikit-learn's ``MLPClassifier``; predicted by our own
    numpy forward pass.
``extra_trees``, ``random_forest``
    scikit-learn's ``ExtraTreesClassifier`` / ``RandomForestClassifier``.
``hist_gradient_boosting``
    scikit-learn's ``HistGradientBoostingClassifier``.

A fitted model is stored by :meth:`BinaryClassifier.to_state` as a dict of numeric numpy arrays
(for ``np.savez``; load with ``allow_pickle=False``) and a JSON-able dict of metadata. Nothing in
a stored model can run code when it is loaded: no pickle, no joblib, no object arrays. Loading
(:func:`classifier_from_state`) checks the kind, every array's presence, dtype and shape, and the
tree structure (children always after their parent, so that descent must end), and raises
:class:`~tessera.errors.TesseraInputError` naming what is wrong.

References
----------
.. [1] M. Seyedhosseini, M. Sajjadi and T. Tasdizen, "Image segmentation with cascaded
   hierarchical models and logistic disjunctive normal networks", ICCV 2013.
"""

import warnings
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import scipy
from scipy.special import expit
from threadpoolctl import threadpool_limits

from tessera.errors import TesseraInputError

KINDS = ("ldnn", "mlp", "extra_trees", "random_forest", "hist_gradient_boosting")
CHUNK_ROWS = 2**18
STATE_FORMAT = "tessera.cascade.classifier"
STATE_VERSION = 1

_SOURCE = "classifier state"


# ---------------------------------------------------------------------------------------------
# Public entry points
# ---------------------------------------------------------------------------------------------


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
    """
    if not isinstance(meta, dict):
        raise TesseraInputError(
            f"metadata must be a dict, got {type(meta).__name__}", source=_SOURCE
        )
    if meta.get("format") != STATE_FORMAT or meta.get("format_version") != STATE_VERSION:
        raise TesseraInputError(
            f"metadata format must be {STATE_FORMAT!r} version {STATE_VERSION}, got "
            f"{meta.get('format')!r} version {meta.get('format_version')!r}",
            source=_SOURCE,
        )
    kind = meta.get("kind")
    if kind not in _CLASSES:
        raise TesseraInputError(
            f"unknown classifier kind {kind!r}; expected one of {KINDS}", source=_SOURCE
        )
    n_features = meta.get("n_features")
    if isinstance(n_features, bool) or not isinstance(n_features, int) or n_features < 1:
        raise TesseraInputError(
            f"meta 'n_features' must be an integer >= 1, got {n_features!r}", source=_SOURCE
        )
    options = meta.get("options")
    if not isinstance(options, dict):
        raise TesseraInputError("meta 'options' must be a dict", source=_SOURCE)
    seed = meta.get("seed")
    clf = _CLASSES[kind](seed=seed, threads=threads, **options)
    if not hasattr(arrays, "keys"):
        raise TesseraInputError("arrays must be a mapping of names to arrays", source=_SOURCE)
    names = set(arrays.keys())
    expected = clf._array_spec(meta)
    missing = sorted(set(expected) - names)
    if missing:
        raise TesseraInputError(f"{kind} state lacks arrays {missing}", source=_SOURCE)
    extra = sorted(names - set(expected))
    if extra:
        raise TesseraInputError(f"{kind} state has unexpected arrays {extra}", source=_SOURCE)
    loaded = {}
    sizes = {"C": n_features}
    for name, (dtype, shape) in expected.items():
        arr = np.asarray(arrays[name])
        if arr.dtype.hasobject or arr.dtype.kind not in "biuf":
            raise TesseraInputError(
                f"array {name!r} has non-numeric dtype {arr.dtype}", source=_SOURCE
            )
        if arr.dtype != np.dtype(dtype):
            raise TesseraInputError(
                f"array {name!r} must have dtype {np.dtype(dtype)}, got {arr.dtype}", source=_SOURCE
            )
        if arr.ndim != len(shape):
            raise TesseraInputError(
                f"array {name!r} must have {len(shape)} dimensions, got shape {arr.shape}",
                source=_SOURCE,
            )
        for axis, (want, got) in enumerate(zip(shape, arr.shape)):
            if isinstance(want, str):
                # A symbolic size: the first array that uses it fixes it for the others.
                want = sizes.setdefault(want, got)
            if want is not None and got != want:
                raise TesseraInputError(
                    f"array {name!r} must have shape {_shape_text(shape, sizes)}, got {arr.shape} "
                    f"(axis {axis})",
                    source=_SOURCE,
                )
        loaded[name] = arr
    clf._load(loaded, meta)
    clf.n_features_ = n_features
    return clf


def _shape_text(shape, sizes):
    return "(" + ", ".join(str(sizes.get(s, s)) if s is not None else "any" for s in shape) + ")"


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


def _int_option(name, value, low):
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
        raise TesseraInputError(f"option {name!r} must be an integer >= {low}, got {value!r}")
    return int(value)


def _float_option(name, value, *, low=0.0, inclusive=False):
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
    """Common interface of the cascade's binary classifiers; create with :func:`make_classifier`.

    Attributes
    ----------
    kind : str
        One of :data:`KINDS`.
    options : dict
        Every option of the kind, defaults filled in (JSON-able).
    seed, threads : int
    n_features_ : int or None
        Number of features seen in `fit` (None before fitting).
    """

    kind = None
    _defaults = {}

    def __init__(self, *, seed, threads=1, **options):
        if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
            raise TesseraInputError(f"seed must be a non-negative integer, got {seed!r}")
        self.seed = int(seed)
        self.threads = _int_option("threads", threads, 1)
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

    def _versions(self):
        # imported here: the workflow imports this module to plan jobs, which needs no scikit-learn
        import sklearn

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
        with threadpool_limits(limits=self.threads):
            for start in range(0, X.shape[0], CHUNK_ROWS):
                chunk = _as_float32_finite(X[start : start + CHUNK_ROWS])
                out[start : start + chunk.shape[0]] = self._predict_chunk(chunk)
        return out

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


def _standardisation(X):
    """Per-feature mean and scale (standard deviation; 1 where a feature is constant), float32."""
    mean = X.mean(axis=0, dtype=np.float64)
    std = X.std(axis=0, dtype=np.float64)
    scale = np.where(std > 1e-12, std, 1.0)
    return mean.astype(np.float32), scale.astype(np.float32)


def _standardise(X, mean, scale):
    return (X - mean) / scale


def _folded_first_layer(W, b, mean, scale):
    """First-layer weights and bias that apply to raw features what (W, b) applies to
    standardised ones: ((X - mean) / scale) W + b = X (W / scale) + (b - (mean / scale) W).

    Saves standardising every predicted row (a full pass over the feature matrix).
    """
    W64 = W.astype(np.float64) / scale.astype(np.float64)[:, None]
    b64 = b.astype(np.float64) - mean.astype(np.float64) @ W64
    return W64.astype(np.float32), b64.astype(np.float32)


# ---------------------------------------------------------------------------------------------
# Logistic disjunctive normal network
# ---------------------------------------------------------------------------------------------


def _kmeans(points, k, rng, *, n_iter=15, max_points=20000):
    """Centres of `k` clusters: k-means++ seeding then Lloyd iterations (float64).

    Fewer distinct points than `k` give repeated centres, which is harmless here.
    """
    if points.shape[0] > max_points:
        points = points[rng.choice(points.shape[0], max_points, replace=False)]
    points = points.astype(np.float64)
    n = points.shape[0]
    sq = (points**2).sum(axis=1)
    centres = np.empty((k, points.shape[1]))
    centres[0] = points[rng.integers(n)]
    d2 = np.maximum(sq - 2 * points @ centres[0] + centres[0] @ centres[0], 0.0)
    for c in range(1, k):
        total = d2.sum()
        pick = rng.choice(n, p=d2 / total) if total > 0 else rng.integers(n)
        centres[c] = points[pick]
        d2 = np.minimum(d2, np.maximum(sq - 2 * points @ centres[c] + centres[c] @ centres[c], 0))
    for _ in range(n_iter):
        dist = sq[:, None] - 2 * points @ centres.T + (centres**2).sum(axis=1)[None, :]
        assign = dist.argmin(axis=1)
        counts = np.bincount(assign, minlength=k)
        sums = np.zeros_like(centres)
        np.add.at(sums, assign, points)
        filled = counts > 0
        new = centres.copy()
        new[filled] = sums[filled] / counts[filled, None]
        if np.allclose(new, centres):
            centres = new
            break
        centres = new
    return centres


def _ldnn_forward(Xs, W, b, n_groups, n_per_group):
    """Return f, the sigmoids s (B, N*M), conjunctions g (B, N) and 1 - g, for standardised Xs.

    ``f = 1 - Π(1 - g_i)`` is evaluated as ``-expm1(Σ log1p(-g_i))``, which keeps small
    probabilities accurate.
    """
    s = expit(Xs @ W + b)
    g = s.reshape(-1, n_groups, n_per_group).prod(axis=2)
    one_minus_g = 1.0 - g
    with np.errstate(divide="ignore"):  # g == 1 gives log1p(-1) = -inf, hence f = 1: intended
        f = -np.expm1(np.log1p(-g).sum(axis=1))
    return f, s, g, one_minus_g


class LDNNClassifier(BinaryClassifier):
    """Logistic disjunctive normal network (Seyedhosseini, Sajjadi & Tasdizen, ICCV 2013).

    .. math::
        f(x) = 1 - \\prod_{i=1}^{N} \\Big(1 - \\prod_{j=1}^{M} \\sigma(w_{ij}^T x + b_{ij})\\Big)

    a disjunction (OR) of `N` conjunctions (AND) of `M` logistic sigmoids, on standardised
    features.

    Options
    -------
    n_groups : int, default 8
        N, the number of conjunctions.
    n_per_group : int, default 8
        M, the sigmoids in each conjunction.
    epochs : int, default 20
        Passes over the training set.
    batch_size : int, default 256
    learning_rate : float, default 0.01
        Step size of Adam.

    Notes
    -----
    *Initialisation.* Positives are clustered into N groups and negatives into M groups by a
    seeded k-means (k-means++ seeding, Lloyd iterations, on at most 20 000 samples per class).
    Discriminant ``(i, j)`` starts as the hyperplane halfway between positive centre ``p_i`` and
    negative centre ``q_j``: ``w = 4 (p_i - q_j) / |p_i - q_j|^2``, ``b = -w . (p_i + q_j) / 2``,
    so that its sigmoid is ``σ(2)`` at ``p_i`` and ``σ(-2)`` at ``q_j`` (the factor is our choice).

    *Training.* Minibatch Adam (β1 = 0.9, β2 = 0.999) on the sample-weighted binary cross-entropy
    ``-Σ w [y log f + (1 - y) log(1 - f)] / Σ w`` with ``f`` clipped to ``[1e-7, 1 - 1e-7]``.
    The paper minimised, from memory, a squared error by gradient descent; cross-entropy is used
    here because it matches the probabilistic output and the other kinds. Gradients are exact:
    ``∂f/∂z_ij = Π_{k≠i}(1 - g_k) · g_i · (1 - σ(z_ij))`` with ``g_i`` the i-th conjunction.

    Prediction is one ``(C, N*M)`` matrix product per chunk, in float32.
    """

    kind = "ldnn"
    _defaults = {
        "n_groups": 8,
        "n_per_group": 8,
        "epochs": 20,
        "batch_size": 256,
        "learning_rate": 0.01,
    }

    def _check_options(self, o):
        return {
            "n_groups": _int_option("n_groups", o["n_groups"], 1),
            "n_per_group": _int_option("n_per_group", o["n_per_group"], 1),
            "epochs": _int_option("epochs", o["epochs"], 1),
            "batch_size": _int_option("batch_size", o["batch_size"], 1),
            "learning_rate": _float_option("learning_rate", o["learning_rate"]),
        }

    def _versions(self):
        return {"numpy": np.__version__, "scipy": scipy.__version__}

    def _fit(self, X, y, w):
        n_groups, n_per_group = self.options["n_groups"], self.options["n_per_group"]
        rng = np.random.default_rng(self.seed)
        self.mean_, self.scale_ = _standardisation(X)
        Xs = _standardise(X, self.mean_, self.scale_)
        with threadpool_limits(limits=self.threads):
            pos = _kmeans(Xs[(y == 1) & (w > 0)], n_groups, rng)
            neg = _kmeans(Xs[(y == 0) & (w > 0)], n_per_group, rng)
            diff = pos[:, None, :] - neg[None, :, :]  # (N, M, C)
            d2 = (diff**2).sum(axis=2, keepdims=True)
            # Coincident centres: fall back to a small random direction.
            tiny = d2[..., 0] < 1e-12
            diff[tiny] = rng.normal(scale=1e-2, size=(int(tiny.sum()), X.shape[1]))
            d2 = np.maximum((diff**2).sum(axis=2, keepdims=True), 1e-12)
            weights = 4.0 * diff / d2
            mid = 0.5 * (pos[:, None, :] + neg[None, :, :])
            bias = -(weights * mid).sum(axis=2)
            W = weights.reshape(-1, X.shape[1]).T.copy()  # (C, N*M), column i*M + j
            b = bias.reshape(-1).copy()
            self._train(Xs, y.astype(np.float64), w / w.mean(), W, b, rng)
        self.weights_ = W.astype(np.float32)
        self.bias_ = b.astype(np.float32)

    def _train(self, Xs, y, w, W, b, rng):
        o = self.options
        n_groups, n_per_group = o["n_groups"], o["n_per_group"]
        lr, batch = o["learning_rate"], o["batch_size"]
        beta1, beta2, eps_adam, clip = 0.9, 0.999, 1e-8, 1e-7
        mW, vW = np.zeros_like(W), np.zeros_like(W)
        mb, vb = np.zeros_like(b), np.zeros_like(b)
        step = 0
        n = Xs.shape[0]
        for _ in range(o["epochs"]):
            order = rng.permutation(n)
            for start in range(0, n, batch):
                idx = order[start : start + batch]
                xb, yb, wb = Xs[idx].astype(np.float64), y[idx], w[idx]
                f, sig, g, omg = _ldnn_forward(xb, W, b, n_groups, n_per_group)
                f = np.clip(f, clip, 1 - clip)
                dl_df = wb * (f - yb) / (f * (1 - f)) / idx.shape[0]
                # Π_{k≠i}(1 - g_k) from prefix and suffix products (no division by 1 - g_i).
                prefix = np.ones_like(omg)
                prefix[:, 1:] = np.cumprod(omg[:, :-1], axis=1)
                suffix = np.ones_like(omg)
                suffix[:, :-1] = np.cumprod(omg[:, ::-1], axis=1)[:, ::-1][:, 1:]
                dl_dg = dl_df[:, None] * prefix * suffix  # (B, N)
                one_minus_s = 1.0 - sig
                grad_z = (dl_dg * g)[:, :, None] * one_minus_s.reshape(-1, n_groups, n_per_group)
                grad_z = grad_z.reshape(idx.shape[0], -1)
                gW = xb.T @ grad_z
                gb = grad_z.sum(axis=0)
                step += 1
                for p, gr, m, v in ((W, gW, mW, vW), (b, gb, mb, vb)):
                    m *= beta1
                    m += (1 - beta1) * gr
                    v *= beta2
                    v += (1 - beta2) * gr * gr
                    mhat = m / (1 - beta1**step)
                    vhat = v / (1 - beta2**step)
                    p -= lr * mhat / (np.sqrt(vhat) + eps_adam)

    def _predict_chunk(self, X):
        if self._folded is None:
            self._folded = _folded_first_layer(self.weights_, self.bias_, self.mean_, self.scale_)
        f, *_ = _ldnn_forward(
            X, *self._folded, self.options["n_groups"], self.options["n_per_group"]
        )
        return f.astype(np.float32)

    def _arrays(self):
        return {
            "mean": self.mean_,
            "scale": self.scale_,
            "weights": self.weights_,
            "bias": self.bias_,
        }

    def _array_spec(self, meta):
        k = self.options["n_groups"] * self.options["n_per_group"]
        return {
            "mean": (np.float32, ("C",)),
            "scale": (np.float32, ("C",)),
            "weights": (np.float32, ("C", k)),
            "bias": (np.float32, (k,)),
        }

    def _load(self, arrays, meta):
        _check_scale(arrays)
        for name in ("weights", "bias"):
            if not np.isfinite(arrays[name]).all():
                raise TesseraInputError(f"array {name!r} has non-finite values", source=_SOURCE)
        self.mean_, self.scale_ = arrays["mean"], arrays["scale"]
        self.weights_, self.bias_ = arrays["weights"], arrays["bias"]


def _check_scale(arrays):
    if not (
        np.isfinite(arrays["mean"]).all()
        and np.isfinite(arrays["scale"]).all()
        and (arrays["scale"] > 0).all()
    ):
        raise TesseraInputError("'mean' and 'scale' must be finite with scale > 0", source=_SOURCE)


# ---------------------------------------------------------------------------------------------
# Multilayer perceptron
# ---------------------------------------------------------------------------------------------


class MLPBinaryClassifier(BinaryClassifier):
    """Small multilayer perceptron: scikit-learn ``MLPClassifier`` to fit, numpy to predict.

    Options
    -------
    hidden_layer_sizes : tuple of int, default (32, 16)
    alpha : float, default 1e-4
        L2 penalty.
    batch_size : int, default 256
    learning_rate_init : float, default 1e-3
        Step size of Adam.
    max_iter : int, default 30
        Epochs. Fitting stops here even when the loss still falls, so scikit-learn's
        ``ConvergenceWarning`` is silenced on purpose: a capped budget is the intended behaviour.

    Notes
    -----
    Features are standardised (mean and scale stored). scikit-learn 1.9 accepts ``sample_weight``
    in ``MLPClassifier.fit``; it is passed through. Hidden units are ReLU and the output is
    logistic, as in scikit-learn's binary ``MLPClassifier``; the state is its ``coefs_`` and
    ``intercepts_`` as float32.
    """

    kind = "mlp"
    _defaults = {
        "hidden_layer_sizes": (32, 16),
        "alpha": 1e-4,
        "batch_size": 256,
        "learning_rate_init": 1e-3,
        "max_iter": 30,
    }

    def _check_options(self, o):
        sizes = o["hidden_layer_sizes"]
        if not isinstance(sizes, (list, tuple)) or len(sizes) < 1:
            raise TesseraInputError(
                f"option 'hidden_layer_sizes' must be a non-empty list of integers, got {sizes!r}"
            )
        return {
            "hidden_layer_sizes": tuple(_int_option("hidden_layer_sizes", s, 1) for s in sizes),
            "alpha": _float_option("alpha", o["alpha"], inclusive=True),
            "batch_size": _int_option("batch_size", o["batch_size"], 1),
            "learning_rate_init": _float_option("learning_rate_init", o["learning_rate_init"]),
            "max_iter": _int_option("max_iter", o["max_iter"], 1),
        }

    def _fit(self, X, y, w):
        from sklearn.exceptions import ConvergenceWarning
        from sklearn.neural_network import MLPClassifier

        o = self.options
        self.mean_, self.scale_ = _standardisation(X)
        model = MLPClassifier(
            hidden_layer_sizes=o["hidden_layer_sizes"],
            activation="relu",
            solver="adam",
            alpha=o["alpha"],
            batch_size=min(o["batch_size"], X.shape[0]),
            learning_rate_init=o["learning_rate_init"],
            max_iter=o["max_iter"],
            early_stopping=False,
            shuffle=True,
            random_state=self.seed,
        )
        with threadpool_limits(limits=self.threads), warnings.catch_warnings():
            # The epoch budget is a deliberate cap (see the class notes), not a failure.
            warnings.filterwarnings("ignore", category=ConvergenceWarning)
            model.fit(_standardise(X, self.mean_, self.scale_), y, sample_weight=w)
        self.estimator_ = model
        self.coefs_ = [c.astype(np.float32) for c in model.coefs_]
        self.intercepts_ = [c.astype(np.float32) for c in model.intercepts_]

    def _predict_chunk(self, X):
        if self._folded is None:
            self._folded = _folded_first_layer(
                self.coefs_[0], self.intercepts_[0], self.mean_, self.scale_
            )
        layers = [self._folded, *zip(self.coefs_[1:], self.intercepts_[1:])]
        h = X
        last = len(layers) - 1
        for layer, (W, b) in enumerate(layers):
            h = h @ W + b
            if layer < last:
                np.maximum(h, 0, out=h)
        return expit(h[:, 0]).astype(np.float32)

    def _arrays(self):
        arrays = {"mean": self.mean_, "scale": self.scale_}
        for i, (W, b) in enumerate(zip(self.coefs_, self.intercepts_)):
            arrays[f"coef_{i}"] = W
            arrays[f"intercept_{i}"] = b
        return arrays

    def _array_spec(self, meta):
        sizes = ["C", *self.options["hidden_layer_sizes"], 1]
        spec = {"mean": (np.float32, ("C",)), "scale": (np.float32, ("C",))}
        for i in range(len(sizes) - 1):
            spec[f"coef_{i}"] = (np.float32, (sizes[i], sizes[i + 1]))
            spec[f"intercept_{i}"] = (np.float32, (sizes[i + 1],))
        return spec

    def _load(self, arrays, meta):
        _check_scale(arrays)
        n = len(self.options["hidden_layer_sizes"]) + 1
        self.mean_, self.scale_ = arrays["mean"], arrays["scale"]
        self.coefs_ = [arrays[f"coef_{i}"] for i in range(n)]
        self.intercepts_ = [arrays[f"intercept_{i}"] for i in range(n)]
        if not all(np.isfinite(a).all() for a in self.coefs_ + self.intercepts_):
            raise TesseraInputError("MLP weights have non-finite values", source=_SOURCE)
        self.estimator_ = None


# ---------------------------------------------------------------------------------------------
# Trees: shared storage and descent
# ---------------------------------------------------------------------------------------------


def _descend_numpy(X, offsets, feature, threshold, left, right, is_leaf, values):
    """Sum of leaf values over all trees by vectorised level-by-level descent (numpy only).

    Node arrays are global (children already shifted by their tree's offset). At each step every
    sample still at an internal node moves one level down; samples that reached a leaf drop out.
    Comparisons are ``x <= threshold`` in float64, as in scikit-learn.
    """
    total = np.zeros(X.shape[0], dtype=np.float64)
    for root in offsets[:-1]:
        node = np.full(X.shape[0], root, dtype=np.int64)
        rows = np.arange(X.shape[0]) if not is_leaf[root] else np.empty(0, dtype=np.int64)
        while rows.size:
            at = node[rows]
            go_left = X[rows, feature[at]] <= threshold[at]
            nxt = np.where(go_left, left[at], right[at])
            node[rows] = nxt
            rows = rows[~is_leaf[nxt]]
        total += values[node]
    return total


def _tree_spec():
    return {
        "tree_offsets": (np.int64, ("T+1",)),
        "left": (np.int32, ("nodes",)),
        "right": (np.int32, ("nodes",)),
        "feature": (np.int32, ("nodes",)),
        "threshold": (np.float64, ("nodes",)),
        "value": (np.float64, ("nodes",)),
        "split_counts": (np.int64, ("C",)),
    }


def _check_tree_arrays(arrays, n_features, n_trees):
    """Validate concatenated per-tree node arrays; return leaf mask and global child indices.

    Leaves are marked by ``left == right == -1`` (and ``feature == -1``); internal nodes point to
    children later in the same tree, which guarantees that descent ends. ``split_counts`` (splits
    per feature, length n_features) ties the trees to the feature count.
    """
    offsets = arrays["tree_offsets"]
    n_nodes = arrays["left"].shape[0]
    if offsets.shape[0] != n_trees + 1:
        raise TesseraInputError(
            f"'tree_offsets' must have {n_trees + 1} entries, got {offsets.shape[0]}",
            source=_SOURCE,
        )
    if offsets[0] != 0 or offsets[-1] != n_nodes or (np.diff(offsets) < 1).any():
        raise TesseraInputError(
            "'tree_offsets' must rise from 0 to the node count with at least one node per tree",
            source=_SOURCE,
        )
    left, right, feature = arrays["left"], arrays["right"], arrays["feature"]
    is_leaf = left == -1
    tree_of = np.repeat(np.arange(n_trees), np.diff(offsets))
    local = np.arange(n_nodes) - offsets[tree_of]
    size = np.diff(offsets)[tree_of]
    inner = ~is_leaf
    ok = (
        (right[is_leaf] == -1).all()
        and (feature[is_leaf] == -1).all()
        and (left[inner] > local[inner]).all()
        and (right[inner] > local[inner]).all()
        and (left[inner] < size[inner]).all()
        and (right[inner] < size[inner]).all()
        and (feature[inner] >= 0).all()
        and (feature[inner] < n_features).all()
        and np.isfinite(arrays["value"]).all()
        and not np.isnan(arrays["threshold"][inner]).any()
    )
    if not ok:
        raise TesseraInputError(
            "tree arrays are malformed (children must come after their parent within the tree, "
            "leaves have -1 children and feature, features lie in [0, n_features), values finite)",
            source=_SOURCE,
        )
    if not np.array_equal(
        np.bincount(feature[inner], minlength=n_features), arrays["split_counts"]
    ):
        raise TesseraInputError(
            "'split_counts' does not match the splits of the trees", source=_SOURCE
        )
    base = offsets[tree_of]
    gl = np.where(is_leaf, np.arange(n_nodes), left.astype(np.int64) + base)
    gr = np.where(is_leaf, np.arange(n_nodes), right.astype(np.int64) + base)
    return is_leaf, gl, gr


class _TreeEnsemble(BinaryClassifier):
    """Shared storage for tree ensembles: per-tree node arrays concatenated with offsets."""

    def _array_spec(self, meta):
        return _tree_spec()

    def _set_trees(self, arrays, n_features):
        n_trees = arrays["tree_offsets"].shape[0] - 1
        is_leaf, gl, gr = _check_tree_arrays(arrays, n_features, n_trees)
        self.trees_ = dict(arrays)
        self._is_leaf, self._gleft, self._gright = is_leaf, gl, gr
        self._feature64 = np.where(is_leaf, 0, arrays["feature"]).astype(np.int64)
        self._n_tree_features = int(n_features)
        self._compiled = None

    def _arrays(self):
        return dict(self.trees_)

    def _predict_numpy(self, X):
        t = self.trees_
        return _descend_numpy(
            X,
            t["tree_offsets"],
            self._feature64,
            t["threshold"],
            self._gleft,
            self._gright,
            self._is_leaf,
            t["value"],
        )


# ---------------------------------------------------------------------------------------------
# Random forest and extra trees
# ---------------------------------------------------------------------------------------------


class ForestClassifier(_TreeEnsemble):
    """Random forest or extremely randomised trees (scikit-learn), stored as node arrays.

    Options
    -------
    n_estimators : int, default 48
    min_samples_leaf : int, default 8
    max_features : "sqrt", "log2", int or float, default "sqrt"
    max_depth : int or None, default None
    bootstrap : bool, default True for ``random_forest``, False for ``extra_trees``

    Notes
    -----
    State, per tree (concatenated, ``tree_offsets`` marks where each tree starts):
    ``left``, ``right`` (local child indices, -1 at leaves), ``feature`` (-1 at leaves),
    ``threshold`` (float64) and ``value`` (weighted class-1 fraction of the node); and
    ``split_counts``, the number of splits on each feature (it fixes the feature count).

    Prediction after loading rebuilds scikit-learn's compiled ``Tree`` objects from these arrays
    through ``Tree.__setstate__``, a method that copies plain arrays into the tree (no pickle
    involved), and averages the class-1 fraction of the leaves that ``Tree.apply`` returns. This
    runs at scikit-learn's own speed, 4-5 times faster than the numpy level-by-level descent
    (``_predict_numpy``; see ``benchmarks/classifier_speed.py``), which is kept as the fallback
    should that private interface change in a future scikit-learn; both give the same numbers.
    With ``threads > 1`` trees are applied in parallel (``Tree.apply`` releases the GIL).
    """

    _estimator = None

    def _check_options(self, o):
        mf = o["max_features"]
        whole = isinstance(mf, int) and not isinstance(mf, bool) and mf >= 1
        fraction = isinstance(mf, float) and 0 < mf <= 1
        if not (mf in ("sqrt", "log2") or whole or fraction):
            raise TesseraInputError(
                f"option 'max_features' must be 'sqrt', 'log2', an integer >= 1 or a fraction in "
                f"(0, 1], got {mf!r}"
            )
        depth = o["max_depth"]
        if not isinstance(o["bootstrap"], bool):
            raise TesseraInputError(
                f"option 'bootstrap' must be true or false, got {o['bootstrap']!r}"
            )
        return {
            "n_estimators": _int_option("n_estimators", o["n_estimators"], 1),
            "min_samples_leaf": _int_option("min_samples_leaf", o["min_samples_leaf"], 1),
            "max_features": mf,
            "max_depth": None if depth is None else _int_option("max_depth", depth, 1),
            "bootstrap": o["bootstrap"],
        }

    def _fit(self, X, y, w):
        from sklearn import ensemble

        o = self.options
        model = getattr(ensemble, self._estimator)(
            n_estimators=o["n_estimators"],
            min_samples_leaf=o["min_samples_leaf"],
            max_features=o["max_features"],
            max_depth=o["max_depth"],
            bootstrap=o["bootstrap"],
            n_jobs=self.threads,
            random_state=self.seed,
        )
        model.fit(X, y, sample_weight=w)
        self.estimator_ = model
        parts = {k: [] for k in ("left", "right", "feature", "threshold", "value")}
        sizes = []
        for est in model.estimators_:
            t = est.tree_
            leaf = t.children_left == -1
            parts["left"].append(t.children_left.astype(np.int32))
            parts["right"].append(t.children_right.astype(np.int32))
            parts["feature"].append(np.where(leaf, -1, t.feature).astype(np.int32))
            parts["threshold"].append(np.where(leaf, 0.0, t.threshold).astype(np.float64))
            # scikit-learn stores per-node class fractions; column 1 is class 1 (classes_ = [0, 1]).
            parts["value"].append(t.value[:, 0, 1].astype(np.float64))
            sizes.append(t.node_count)
        arrays = {k: np.concatenate(v) for k, v in parts.items()}
        arrays["tree_offsets"] = np.concatenate([[0], np.cumsum(sizes)]).astype(np.int64)
        inner = arrays["left"] != -1
        arrays["split_counts"] = np.bincount(arrays["feature"][inner], minlength=X.shape[1]).astype(
            np.int64
        )
        self._set_trees(arrays, X.shape[1])

    def _load(self, arrays, meta):
        self._set_trees(arrays, meta["n_features"])
        self.estimator_ = None

    def _build_compiled(self):
        """scikit-learn ``Tree`` objects rebuilt from the arrays (None if that is not possible)."""
        try:
            from sklearn.tree._tree import NODE_DTYPE, Tree

            t, offsets = self.trees_, self.trees_["tree_offsets"]
            trees = []
            for start, stop in zip(offsets[:-1], offsets[1:]):
                n = int(stop - start)
                nodes = np.zeros(n, dtype=NODE_DTYPE)
                leaf = t["left"][start:stop] == -1
                nodes["left_child"] = t["left"][start:stop]
                nodes["right_child"] = t["right"][start:stop]
                nodes["feature"] = np.where(leaf, -2, t["feature"][start:stop])
                nodes["threshold"] = np.where(leaf, -2.0, t["threshold"][start:stop])
                p1 = t["value"][start:stop]
                values = np.ascontiguousarray(np.stack([1 - p1, p1], axis=1)[:, None, :])
                tree = Tree(self._n_tree_features, np.array([2], dtype=np.intp), 1)
                depth = _max_depth(t["left"][start:stop], t["right"][start:stop])
                tree.__setstate__(
                    {"max_depth": depth, "node_count": n, "nodes": nodes, "values": values}
                )
                trees.append((int(start), tree))
            return trees
        except (ImportError, AttributeError, TypeError, ValueError, KeyError):
            return None

    def _predict_chunk(self, X):
        if self._compiled is None:
            self._compiled = self._build_compiled() or False
        if not self._compiled:
            total = self._predict_numpy(X)
        else:
            value = self.trees_["value"]

            def leaf_values(item):
                start, tree = item
                return value[start + tree.apply(X)]

            total = np.zeros(X.shape[0], dtype=np.float64)
            if self.threads > 1:
                with ThreadPoolExecutor(self.threads) as pool:
                    for part in pool.map(leaf_values, self._compiled):
                        total += part
            else:
                for item in self._compiled:
                    total += leaf_values(item)
        return (total / (self.trees_["tree_offsets"].shape[0] - 1)).astype(np.float32)


def _max_depth(left, right):
    """Depth of one tree (root depth 0), walking level by level from the root."""
    depth, frontier = 0, np.array([0])
    while True:
        inner = frontier[left[frontier] != -1]
        if inner.size == 0:
            return depth
        frontier = np.concatenate([left[inner], right[inner]])
        depth += 1


class RandomForestBinaryClassifier(ForestClassifier):
    __doc__ = ForestClassifier.__doc__
    kind = "random_forest"
    _estimator = "RandomForestClassifier"
    _defaults = {
        "n_estimators": 48,
        "min_samples_leaf": 8,
        "max_features": "sqrt",
        "max_depth": None,
        "bootstrap": True,
    }


class ExtraTreesBinaryClassifier(ForestClassifier):
    __doc__ = ForestClassifier.__doc__
    kind = "extra_trees"
    _estimator = "ExtraTreesClassifier"
    _defaults = {
        "n_estimators": 48,
        "min_samples_leaf": 8,
        "max_features": "sqrt",
        "max_depth": None,
        "bootstrap": False,
    }


# ---------------------------------------------------------------------------------------------
# Histogram gradient boosting
# ---------------------------------------------------------------------------------------------


class HistGradientBoostingBinaryClassifier(_TreeEnsemble):
    """Histogram gradient boosting (scikit-learn), stored as node arrays plus the baseline.

    Options
    -------
    max_iter : int, default 100
        Boosting iterations (one tree each). Early stopping is off.
    learning_rate : float, default 0.1
    max_leaf_nodes : int, default 31
    min_samples_leaf : int, default 20
    l2_regularization : float, default 0.0
    max_bins : int, default 255
        At most 255 (scikit-learn's limit).

    Notes
    -----
    The raw score is ``baseline + Σ_trees leaf value`` and the probability ``expit(raw)``
    (binary log-loss). For raw, unbinned data scikit-learn routes a sample left when
    ``x <= num_threshold`` (a float64 threshold kept in every node), so the per-node thresholds
    are all that prediction needs; the bin edges are used only while fitting and are not stored.
    Categorical features are not used. State: ``tree_offsets``, ``left``, ``right``, ``feature``,
    ``threshold``, ``value`` (the leaf values, learning rate included) and ``split_counts`` as for
    the forests, and ``baseline``.

    After loading, scikit-learn's compiled ``TreePredictor`` is rebuilt from the arrays (a plain
    constructor taking a node array; no pickle), with the numpy descent as fallback.
    """

    kind = "hist_gradient_boosting"
    _defaults = {
        "max_iter": 100,
        "learning_rate": 0.1,
        "max_leaf_nodes": 31,
        "min_samples_leaf": 20,
        "l2_regularization": 0.0,
        "max_bins": 255,
    }

    def _check_options(self, o):
        bins = _int_option("max_bins", o["max_bins"], 2)
        if bins > 255:
            raise TesseraInputError(f"option 'max_bins' must be <= 255, got {bins}")
        return {
            "max_iter": _int_option("max_iter", o["max_iter"], 1),
            "learning_rate": _float_option("learning_rate", o["learning_rate"]),
            "max_leaf_nodes": _int_option("max_leaf_nodes", o["max_leaf_nodes"], 2),
            "min_samples_leaf": _int_option("min_samples_leaf", o["min_samples_leaf"], 1),
            "l2_regularization": _float_option(
                "l2_regularization", o["l2_regularization"], inclusive=True
            ),
            "max_bins": bins,
        }

    def _array_spec(self, meta):
        return {**_tree_spec(), "baseline": (np.float64, (1,))}

    def _fit(self, X, y, w):
        from sklearn.ensemble import HistGradientBoostingClassifier

        o = self.options
        model = HistGradientBoostingClassifier(
            max_iter=o["max_iter"],
            learning_rate=o["learning_rate"],
            max_leaf_nodes=o["max_leaf_nodes"],
            min_samples_leaf=o["min_samples_leaf"],
            l2_regularization=o["l2_regularization"],
            max_bins=o["max_bins"],
            early_stopping=False,
            random_state=self.seed,
        )
        with threadpool_limits(limits=self.threads):
            model.fit(X, y, sample_weight=w)
        self.estimator_ = model
        if model.n_trees_per_iteration_ != 1:
            raise TesseraInputError("gradient boosting did not fit a single binary score")
        parts = {k: [] for k in ("left", "right", "feature", "threshold", "value")}
        sizes = []
        for (predictor,) in model._predictors:
            nodes = predictor.nodes
            if nodes["is_categorical"].any():
                raise TesseraInputError("categorical splits cannot be stored")
            leaf = nodes["is_leaf"].astype(bool)
            for name, field in (("left", "left"), ("right", "right"), ("feature", "feature_idx")):
                column = nodes[field].astype(np.int32)
                column[leaf] = -1
                parts[name].append(column)
            parts["threshold"].append(np.where(leaf, 0.0, nodes["num_threshold"]))
            parts["value"].append(np.where(leaf, nodes["value"], 0.0).astype(np.float64))
            sizes.append(nodes.shape[0])
        arrays = {k: np.concatenate(v) for k, v in parts.items()}
        arrays["tree_offsets"] = np.concatenate([[0], np.cumsum(sizes)]).astype(np.int64)
        arrays["baseline"] = np.asarray(model._baseline_prediction, dtype=np.float64).reshape(1)
        inner = arrays["left"] != -1
        arrays["split_counts"] = np.bincount(arrays["feature"][inner], minlength=X.shape[1]).astype(
            np.int64
        )
        self._set_trees(arrays, X.shape[1])

    def _load(self, arrays, meta):
        if not np.isfinite(arrays["baseline"]).all():
            raise TesseraInputError("'baseline' must be finite", source=_SOURCE)
        self._set_trees(arrays, meta["n_features"])
        self.estimator_ = None

    def _build_compiled(self):
        try:
            from sklearn.ensemble._hist_gradient_boosting.common import PREDICTOR_RECORD_DTYPE
            from sklearn.ensemble._hist_gradient_boosting.predictor import TreePredictor

            t, offsets = self.trees_, self.trees_["tree_offsets"]
            no_bitsets = np.zeros((0, 8), dtype=np.uint32)
            predictors = []
            for start, stop in zip(offsets[:-1], offsets[1:]):
                leaf = t["left"][start:stop] == -1
                nodes = np.zeros(int(stop - start), dtype=PREDICTOR_RECORD_DTYPE)
                nodes["is_leaf"] = leaf
                nodes["left"] = np.where(leaf, 0, t["left"][start:stop])
                nodes["right"] = np.where(leaf, 0, t["right"][start:stop])
                nodes["feature_idx"] = np.where(leaf, 0, t["feature"][start:stop])
                nodes["num_threshold"] = t["threshold"][start:stop]
                nodes["value"] = t["value"][start:stop]
                predictors.append(TreePredictor(nodes, no_bitsets, no_bitsets))
            return predictors, no_bitsets, np.zeros(self._n_tree_features, dtype=np.uint32)
        except (ImportError, AttributeError, TypeError, ValueError, KeyError):
            return None

    def _predict_chunk(self, X):
        if self._compiled is None:
            self._compiled = self._build_compiled() or False
        raw = np.full(X.shape[0], self.trees_["baseline"][0], dtype=np.float64)
        if not self._compiled:
            raw += self._predict_numpy(X)
        else:
            predictors, known, f_idx_map = self._compiled
            X64 = np.ascontiguousarray(X, dtype=np.float64)
            for predictor in predictors:
                raw += predictor.predict(X64, known, f_idx_map, self.threads)
        return expit(raw).astype(np.float32)


_CLASSES = {
    "ldnn": LDNNClassifier,
    "mlp": MLPBinaryClassifier,
    "extra_trees": ExtraTreesBinaryClassifier,
    "random_forest": RandomForestBinaryClassifier,
    "hist_gradient_boosting": HistGradientBoostingBinaryClassifier,
}
assert tuple(_CLASSES) == KINDS
