"""The network trainer against scikit-learn and the published definitions it implements."""

import warnings

import numpy as np
import pytest
from sklearn.datasets import make_circles, make_moons
from sklearn.exceptions import ConvergenceWarning
from sklearn.metrics import log_loss
from sklearn.neural_network import MLPClassifier

from tessera.cascade.classifiers.network_fit import (
    batch_gradients,
    batch_loss,
    fit_network,
    forward,
    initial_layers,
)


def _batch(seed=0, n=64, dims=5):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, dims)).astype(np.float32)
    y = (X[:, 0] + 0.5 * X[:, 1] > 0).astype(np.float32)
    w = rng.uniform(0.5, 2.0, n).astype(np.float32)
    return X, y, w


def test_loss_is_weighted_log_loss_plus_the_l2_penalty():
    X, y, w = _batch()
    layers = initial_layers([5, 4, 3, 1], np.random.default_rng(1))
    p = forward(X, layers)[-1]
    # Reference: scikit-learn's log_loss with sample weights (a weighted mean of -log likelihood)
    expected = log_loss(y, p.astype(np.float64), sample_weight=w)
    assert batch_loss(layers, X, y, w, alpha=0.0) == pytest.approx(expected, rel=1e-5)
    squares = sum(float((W.astype(np.float64) ** 2).sum()) for W, _ in layers)
    with_penalty = batch_loss(layers, X, y, w, alpha=0.3)
    assert with_penalty == pytest.approx(expected + 0.5 * 0.3 * squares / len(y), rel=1e-5)


def test_backpropagation_equals_finite_differences():
    # Central differences of the loss (numerical differentiation, common practice for checking
    # gradients) in float64 copies of the weights.
    X, y, w = _batch(seed=2, n=32, dims=4)
    layers = initial_layers([4, 6, 3, 1], np.random.default_rng(3))
    grads = batch_gradients(layers, X, y, w, alpha=0.1)
    X64 = X.astype(np.float64)

    def loss(params):
        return batch_loss(params, X64, y, w, alpha=0.1)

    wide = [(W.astype(np.float64), b.astype(np.float64)) for W, b in layers]
    h = 1e-6
    for k, (W, b) in enumerate(wide):
        for array, grad in ((W, grads[k][0]), (b, grads[k][1])):
            for index in list(np.ndindex(array.shape))[:6]:
                keep = array[index]
                array[index] = keep + h
                up = loss(wide)
                array[index] = keep - h
                down = loss(wide)
                array[index] = keep
                assert grad[index] == pytest.approx((up - down) / (2 * h), rel=2e-3, abs=1e-6)


def test_the_first_adam_step_moves_every_weight_by_the_step_size():
    # Kingma & Ba (2015), section 2.1: with bias correction the first update is
    # lr * g / (|g| + eps'), i.e. about the step size in magnitude for every parameter whose
    # gradient is not tiny.
    X, y, w = _batch(seed=4, n=50, dims=3)
    start = initial_layers([3, 5, 1], np.random.default_rng(7))
    moved = fit_network(
        X,
        y,
        sample_weight=w,
        hidden=(5,),
        alpha=0.0,
        batch_size=50,  # one batch: one step per epoch
        learning_rate=0.01,
        epochs=1,
        seed=7,
    )
    grads = batch_gradients(start, X, y, w, alpha=0.0)
    for (W0, b0), (W1, b1), (gW, gb) in zip(start, moved, grads, strict=True):
        for before, after, g in ((W0, W1, gW), (b0, b1, gb)):
            step = np.abs(after - before)
            active = np.abs(g) > 1e-4  # units whose ReLU never fires on the batch: no gradient
            assert active.mean() > 0.5
            np.testing.assert_allclose(step[active], 0.01, rtol=1e-3)


@pytest.mark.parametrize(
    "data",
    [
        make_moons(n_samples=2000, noise=0.2, random_state=0),
        make_circles(n_samples=2000, noise=0.1, factor=0.5, random_state=0),
    ],
    ids=["moons", "circles"],
)
def test_learns_as_well_as_scikit_learns_network(data):
    # Reference: scikit-learn's MLPClassifier with the same layers, penalty, batch size, step
    # size and number of epochs, scored on held-out rows of the same data.
    X, y = data
    X = X.astype(np.float32)
    train, test = slice(0, 1500), slice(1500, None)
    settings = {"alpha": 1e-4, "batch_size": 64, "learning_rate": 0.01, "epochs": 40}
    layers = fit_network(
        X[train],
        y[train],
        sample_weight=np.ones(1500),
        hidden=(32, 16),
        seed=0,
        **settings,
    )
    ours = ((forward(X[test], layers)[-1] > 0.5) == y[test]).mean()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)  # a fixed budget of epochs, as ours
        reference = MLPClassifier(
            hidden_layer_sizes=(32, 16),
            alpha=settings["alpha"],
            batch_size=settings["batch_size"],
            learning_rate_init=settings["learning_rate"],
            max_iter=settings["epochs"],
            n_iter_no_change=settings["epochs"],
            random_state=0,
        ).fit(X[train], y[train])
    theirs = reference.score(X[test], y[test])
    assert theirs > 0.9  # the problem is learnable at this size
    assert ours >= theirs - 0.02, (ours, theirs)


def test_the_same_seed_gives_the_same_network():
    X, y, w = _batch(seed=5, n=300)
    kwargs = dict(hidden=(8, 4), alpha=1e-4, batch_size=32, learning_rate=1e-3, epochs=3)
    a = fit_network(X, y, sample_weight=w, seed=11, **kwargs)
    b = fit_network(X, y, sample_weight=w, seed=11, **kwargs)
    c = fit_network(X, y, sample_weight=w, seed=12, **kwargs)
    assert all(np.array_equal(p, q) for (p, _), (q, _) in zip(a, b, strict=True))
    assert not np.array_equal(a[0][0], c[0][0])
