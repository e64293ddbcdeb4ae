"""Minibatch training of a small ReLU network with a logistic output, in float32 numpy.

The cascade fits four small networks per node (one per fold and the full one) on a few tens of
thousands of rows; at that size a general-purpose trainer spends most of its time in per-batch
bookkeeping rather than arithmetic. This one does only the arithmetic:

* layers ``h_k = relu(h_{k-1} W_k + b_k)``, output ``p = σ(h W + b)``;
* loss: the sample-weighted binary cross-entropy of each minibatch,
  ``-Σ w [y log p + (1 - y) log(1 - p)] / Σ w``, plus the L2 penalty ``α/2 Σ ||W||² / B``
  (B the batch size; biases are not penalised);
* gradients by backpropagation (``∂loss/∂z = w (p - y) / Σ w`` at the output);
* Adam (Kingma & Ba, ICLR 2015: β1 = 0.9, β2 = 0.999, ε = 1e-8, bias-corrected step size);
* weights drawn uniformly within ``±sqrt(6 / (fan_in + fan_out))`` (Glorot & Bengio 2010),
  ``±sqrt(2 / (fan_in + fan_out))`` for the logistic output (a narrower start, our choice),
  biases likewise; rows shuffled every epoch; a fixed number of epochs.
"""

import numpy as np
from scipy.special import expit

_BETA1, _BETA2, _EPS = 0.9, 0.999, 1e-8


def initial_layers(sizes, rng):
    """Glorot-uniform weights and biases (float32) of layers with `sizes` units in turn.

    Examples
    --------
    >>> layers = initial_layers([4, 3, 1], np.random.default_rng(0))
    >>> [(W.shape, b.shape, W.dtype.name) for W, b in layers]
    [((4, 3), (3,), 'float32'), ((3, 1), (1,), 'float32')]
    """
    layers = []
    for k, (fan_in, fan_out) in enumerate(zip(sizes[:-1], sizes[1:], strict=True)):
        factor = 2.0 if k == len(sizes) - 2 else 6.0  # the logistic output layer: 2
        bound = np.sqrt(factor / (fan_in + fan_out))
        W = rng.uniform(-bound, bound, (fan_in, fan_out)).astype(np.float32)
        b = rng.uniform(-bound, bound, fan_out).astype(np.float32)
        layers.append((W, b))
    return layers


def forward(X, layers):
    """Activations of every layer for rows `X`: ``[X, h_1, ..., p]`` (p of shape (N,)).

    Examples
    --------
    >>> W = np.array([[1.0], [-1.0]], np.float32)
    >>> forward(np.array([[2.0, 2.0]], np.float32), [(W, np.zeros(1, np.float32))])[-1]
    array([0.5], dtype=float32)
    """
    acts = [X]
    h = X
    for k, (W, b) in enumerate(layers):
        z = h @ W
        z += b
        if k < len(layers) - 1:
            np.maximum(z, np.float32(0), out=z)
        h = z
        acts.append(h)
    acts[-1] = _sigmoid(acts[-1][:, 0])
    return acts


def _sigmoid(z):
    return expit(z)  # of the input's dtype: float32 in training, float64 in checks


def batch_loss(layers, X, y, w, *, alpha):
    """The minibatch loss the training minimises (see the module notes).

    Examples
    --------
    >>> layers = [(np.zeros((1, 1), np.float32), np.zeros(1, np.float32))]
    >>> X, y, w = np.ones((2, 1), np.float32), np.array([0, 1]), np.ones(2, np.float32)
    >>> round(batch_loss(layers, X, y, w, alpha=0.0), 6)  # log 2: p = 0.5 for both rows
    0.693147
    """
    p = forward(X, layers)[-1].astype(np.float64)
    eps = 1e-7
    p = np.clip(p, eps, 1 - eps)
    data = -np.sum(w * (y * np.log(p) + (1 - y) * np.log(1 - p))) / np.sum(w)
    penalty = 0.5 * alpha * sum(float(np.sum(W.astype(np.float64) ** 2)) for W, _ in layers)
    return float(data + penalty / X.shape[0])


def batch_gradients(layers, X, y, w, *, alpha, out=None):
    """Gradients of :func:`batch_loss` with respect to every weight and bias, by backpropagation.

    Returns ``[(dW, db), ...]`` in layer order (float32); with `out` (arrays of the same shapes)
    they are written there.
    """
    acts = forward(X, layers)
    delta = (w * (acts[-1] - y) * np.float32(1 / max(float(np.sum(w)), 1e-12)))[:, None]
    if out is None:
        out = [(np.empty_like(W), np.empty_like(b)) for W, b in layers]
    decay = np.float32(alpha / X.shape[0])
    for k in range(len(layers) - 1, -1, -1):
        W, _ = layers[k]
        dW, db = out[k]
        np.matmul(acts[k].T, delta, out=dW)
        dW += decay * W
        np.sum(delta, axis=0, out=db)
        if k:
            delta = delta @ W.T
            delta *= acts[k] > 0
    return out


def _flat_layers(sizes):
    """Weights and biases of every layer as views of one flat float32 vector (and the vector)."""
    shapes = [s for a, b in zip(sizes[:-1], sizes[1:], strict=True) for s in ((a, b), (b,))]
    flat = np.zeros(sum(int(np.prod(s)) for s in shapes), np.float32)
    views, start = [], 0
    for shape in shapes:
        size = int(np.prod(shape))
        views.append(flat[start : start + size].reshape(shape))
        start += size
    return flat, list(zip(views[::2], views[1::2], strict=True))


def fit_network(
    X,
    y,
    *,
    sample_weight,
    hidden,
    alpha,
    batch_size,
    learning_rate,
    epochs,
    seed,
):
    """Train a network on rows `X` (float32, standardised) and labels `y` (0/1).

    Parameters
    ----------
    X : (N, C) ndarray of float32
    y : (N,) ndarray of 0/1
    sample_weight : (N,) ndarray of float
    hidden : sequence of int
        Units of each hidden layer.
    alpha : float
        L2 penalty.
    batch_size : int
    learning_rate : float
        Adam's step size.
    epochs : int
        Passes over the rows.
    seed : int
        Seeds the initial weights and the order of the rows.

    Returns
    -------
    list of (W, b) float32 pairs, the last layer with one output unit.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> X = rng.normal(size=(400, 2)).astype(np.float32)
    >>> y = (X[:, 0] > X[:, 1]).astype(np.uint8)
    >>> layers = fit_network(X, y, sample_weight=np.ones(400), hidden=(8,), alpha=1e-4,
    ...                      batch_size=32, learning_rate=0.01, epochs=20, seed=0)
    >>> bool(((forward(X, layers)[-1] > 0.5) == y).mean() > 0.95)
    True
    """
    rng = np.random.default_rng(seed)
    X = np.ascontiguousarray(X, dtype=np.float32)
    y = np.asarray(y, dtype=np.float32)
    w = np.asarray(sample_weight, dtype=np.float32)
    sizes = [X.shape[1], *hidden, 1]
    # parameters, gradients and Adam's two moments each in one flat vector, so that an update
    # is a few operations on one array (the layers are views of it)
    params, layers = _flat_layers(sizes)
    for (W, b), (W0, b0) in zip(layers, initial_layers(sizes, rng), strict=True):
        W[...], b[...] = W0, b0
    grad, grads = _flat_layers(sizes)
    m, v, work = np.zeros_like(params), np.zeros_like(params), np.empty_like(params)
    n, step = X.shape[0], 0
    for _ in range(epochs):
        order = rng.permutation(n)
        Xe, ye, we = X[order], y[order], w[order]
        for start in range(0, n, batch_size):
            stop = start + batch_size
            batch_gradients(
                layers, Xe[start:stop], ye[start:stop], we[start:stop], alpha=alpha, out=grads
            )
            step += 1
            size = learning_rate * np.sqrt(1 - _BETA2**step) / (1 - _BETA1**step)
            m *= np.float32(_BETA1)
            m += np.float32(1 - _BETA1) * grad
            np.multiply(grad, grad, out=work)
            v *= np.float32(_BETA2)
            work *= np.float32(1 - _BETA2)
            v += work
            np.sqrt(v, out=work)
            work += np.float32(_EPS)
            np.divide(m, work, out=work)
            work *= np.float32(size)
            params -= work
    return [(W.copy(), b.copy()) for W, b in layers]
