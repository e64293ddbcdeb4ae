"""The logistic disjunctive normal network (LDNN) of the cascaded hierarchical model [1]_.

Written here in numpy from its published formula: a disjunction of conjunctions of logistic
sigmoids, initialised from k-means centres of the two classes and trained by minibatch Adam.

References
----------
.. [1] M. Seyedhosseini, M. Sajjadi and T. Tasdizen, "Image segmentation with cascaded
   hierarchical models and logistic disjunctive normal networks", ICCV 2013.
"""

import numpy as np
import scipy
from scipy.special import expit
from threadpoolctl import threadpool_limits

from tessera.cascade.classifiers.base import (
    STATE_SOURCE,
    BinaryClassifier,
    float_option,
    int_option,
)
from tessera.cascade.classifiers.scaling import (
    check_scale,
    folded_first_layer,
    standardisation,
    standardise,
)
from tessera.errors import TesseraInputError


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
            "n_groups": int_option("n_groups", o["n_groups"], 1),
            "n_per_group": int_option("n_per_group", o["n_per_group"], 1),
            "epochs": int_option("epochs", o["epochs"], 1),
            "batch_size": int_option("batch_size", o["batch_size"], 1),
            "learning_rate": float_option("learning_rate", o["learning_rate"]),
        }

    def _versions(self):
        return {"numpy": np.__version__, "scipy": scipy.__version__}

    def _fit(self, X, y, w):
        n_groups, n_per_group = self.options["n_groups"], self.options["n_per_group"]
        rng = np.random.default_rng(self.seed)
        self.mean_, self.scale_ = standardisation(X)
        Xs = standardise(X, self.mean_, self.scale_)
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
            self._folded = folded_first_layer(self.weights_, self.bias_, self.mean_, self.scale_)
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
        check_scale(arrays)
        for name in ("weights", "bias"):
            if not np.isfinite(arrays[name]).all():
                raise TesseraInputError(
                    f"array {name!r} has non-finite values", source=STATE_SOURCE
                )
        self.mean_, self.scale_ = arrays["mean"], arrays["scale"]
        self.weights_, self.bias_ = arrays["weights"], arrays["bias"]
