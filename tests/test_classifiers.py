"""Cascade classifiers: learning, storage without pickle, agreement with references."""

import json
import subprocess
import sys

import numpy as np
import pytest
import yaml
from scipy.special import expit
from sklearn.linear_model import LogisticRegression

from tessera.cascade.classifiers import KINDS, classifier_from_state, make_classifier
from tessera.cascade.classifiers import base as C
from tessera.errors import TesseraInputError
from tessera.methods import CLASSIFIER_NAMES

# Small settings keep the whole file fast; defaults are exercised by the benchmark.
FAST = {
    "ldnn": {"epochs": 30},
    "mlp": {"max_iter": 60},
    "extra_trees": {"n_estimators": 16},
    "random_forest": {"n_estimators": 16},
    "hist_gradient_boosting": {"max_iter": 40},
}
TREES = ("extra_trees", "random_forest", "hist_gradient_boosting")


def _uniform(rng, n, dims=4):
    return rng.uniform(-1, 1, size=(n, dims)).astype(np.float32)


def xor(seed, n=3000):
    """Sign of x0 * x1, two noise features: no line separates the classes."""
    X = _uniform(np.random.default_rng(seed), n)
    return X, (X[:, 0] * X[:, 1] > 0).astype(np.uint8)


def rings(seed, n=3000):
    """Class 1 an annulus 0.6 < r < 1 around a disc r < 0.4 of class 0, balanced, plus noise."""
    rng = np.random.default_rng(seed)
    y = (np.arange(n) % 2).astype(np.uint8)
    r = np.where(y == 1, rng.uniform(0.6, 1.0, n), rng.uniform(0.0, 0.4, n))
    angle = rng.uniform(0, 2 * np.pi, n)
    X = np.column_stack([r * np.cos(angle), r * np.sin(angle), rng.uniform(-1, 1, (n, 2))])
    return X.astype(np.float32), y


def separable(seed, n=2000):
    """Two classes on either side of a tilted plane with a margin of 0.2."""
    X = _uniform(np.random.default_rng(seed), n)
    score = X @ np.array([1.0, -0.5, 0.25, 0.0], dtype=np.float32)
    keep = np.abs(score) > 0.2
    return X[keep], (score[keep] > 0).astype(np.uint8)


def overlapping(seed, n=3000):
    """Two Gaussian classes (means -1 and +1 on one axis, unit variance) that overlap."""
    rng = np.random.default_rng(seed)
    y = (np.arange(n) % 2).astype(np.uint8)
    X = rng.normal(size=(n, 3))
    X[:, 0] += np.where(y == 1, 1.0, -1.0)
    return X.astype(np.float32), y


def accuracy(p, y):
    return float(((p > 0.5) == (y == 1)).mean())


@pytest.fixture(scope="module")
def fitted():
    """One model per kind, fitted on the rings problem (shared by the storage tests)."""
    X, y = rings(1)
    return {k: make_classifier(k, seed=3, **FAST[k]).fit(X, y) for k in KINDS}, rings(2)[0]


# --- learning -------------------------------------------------------------------------------


@pytest.mark.parametrize("kind", KINDS)
def test_learns_separable(kind):
    X, y = separable(10)
    Xt, yt = separable(11)
    clf = make_classifier(kind, seed=0, **FAST[kind]).fit(X, y)
    p = clf.predict(Xt)
    assert p.dtype == np.float32 and p.shape == yt.shape
    assert 0.0 <= p.min() and p.max() <= 1.0
    # Reference: scikit-learn LogisticRegression solves a linearly separable problem; a flexible
    # model must come close to it.
    ref = accuracy(LogisticRegression().fit(X, y).predict_proba(Xt)[:, 1], yt)
    assert ref > 0.97
    assert accuracy(p, yt) > 0.95


@pytest.mark.parametrize("problem", [xor, rings])
@pytest.mark.parametrize("kind", KINDS)
def test_learns_nonlinear(kind, problem):
    X, y = problem(20)
    Xt, yt = problem(21)
    clf = make_classifier(kind, seed=0, **FAST[kind]).fit(X, y)
    # Reference: a linear model (scikit-learn LogisticRegression) is near chance on XOR and on
    # concentric classes (balanced, so chance is 0.5); every kind here must do far better.
    ref = accuracy(LogisticRegression().fit(X, y).predict_proba(Xt)[:, 1], yt)
    assert ref < 0.65
    acc = accuracy(clf.predict(Xt), yt)
    assert acc > 0.9
    assert acc > ref + 0.25


@pytest.mark.parametrize("kind", KINDS)
def test_sample_weight_raises_recall(kind):
    # Common practice (cost-sensitive learning): up-weighting a class moves the decision boundary
    # into the other class, so recall of the up-weighted class rises.
    X, y = overlapping(30)
    Xt, yt = overlapping(31)
    plain = make_classifier(kind, seed=0, **FAST[kind]).fit(X, y).predict(Xt)
    w = np.where(y == 1, 10.0, 1.0)
    heavy = make_classifier(kind, seed=0, **FAST[kind]).fit(X, y, sample_weight=w).predict(Xt)
    recall = lambda p: float((p[yt == 1] > 0.5).mean())  # noqa: E731
    assert recall(heavy) > recall(plain) + 0.05


@pytest.mark.parametrize("kind", KINDS)
def test_deterministic_for_a_seed(kind):
    X, y = xor(40, n=1500)
    a = make_classifier(kind, seed=7, **FAST[kind]).fit(X, y).predict(X)
    b = make_classifier(kind, seed=7, **FAST[kind]).fit(X, y).predict(X)
    np.testing.assert_array_equal(a, b)
    if kind != "hist_gradient_boosting":  # without subsampling, boosting draws nothing at random
        c = make_classifier(kind, seed=8, **FAST[kind]).fit(X, y).predict(X)
        assert not np.array_equal(a, c)


# --- agreement with references -----------------------------------------------------------------


@pytest.mark.parametrize("kind", TREES)
def test_trees_match_sklearn_predict_proba(fitted, kind):
    models, Xt = fitted
    clf = models[kind]
    # Reference: the fitted scikit-learn estimator's own predict_proba.
    ref = clf.estimator_.predict_proba(Xt)[:, 1]
    np.testing.assert_allclose(clf.predict(Xt), ref, rtol=0, atol=1e-6)
    loaded = classifier_from_state(*clf.to_state())
    np.testing.assert_allclose(loaded.predict(Xt), ref, rtol=0, atol=1e-6)


@pytest.mark.parametrize("kind", TREES)
def test_numpy_descent_matches_sklearn(fitted, kind):
    # The numpy fallback (used if scikit-learn's compiled tree objects cannot be rebuilt) must give
    # the same probabilities. Reference: scikit-learn's predict_proba.
    models, Xt = fitted
    loaded = classifier_from_state(*models[kind].to_state())
    loaded._compiled = False
    ref = models[kind].estimator_.predict_proba(Xt)[:, 1]
    np.testing.assert_allclose(loaded.predict(Xt), ref, rtol=0, atol=1e-6)


def test_mlp_forward_matches_sklearn(fitted):
    from sklearn.neural_network import MLPClassifier  # noqa: PLC0415 - reference only

    models, Xt = fitted
    clf = models["mlp"]
    arrays, _ = clf.to_state()
    standardised = (Xt - arrays["mean"]) / arrays["scale"]
    # Reference: scikit-learn MLPClassifier.predict_proba with our weights put in its place
    # (fitted for one epoch only to give it the same layer shapes).
    ref_model = MLPClassifier(hidden_layer_sizes=clf.options["hidden_layer_sizes"], max_iter=1)
    with pytest.warns(Warning):  # one epoch does not converge
        ref_model.fit(standardised, (standardised[:, 0] > 0).astype(int))
    ref_model.coefs_ = [c.astype(np.float64) for c in clf.coefs_]
    ref_model.intercepts_ = [b.astype(np.float64) for b in clf.intercepts_]
    ref = ref_model.predict_proba(standardised)[:, 1]
    np.testing.assert_allclose(clf.predict(Xt), ref, rtol=0, atol=1e-5)


def _ldnn_state(weights, bias, mean, scale, n_groups, n_per_group):
    arrays = {"mean": mean, "scale": scale, "weights": weights, "bias": bias}
    arrays = {k: np.asarray(v, dtype=np.float32) for k, v in arrays.items()}
    meta = {
        "format": C.STATE_FORMAT,
        "format_version": C.STATE_VERSION,
        "kind": "ldnn",
        "seed": 0,
        "n_features": weights.shape[0],
        "options": {"n_groups": n_groups, "n_per_group": n_per_group},
    }
    return arrays, meta


def test_ldnn_one_sigmoid_is_logistic_regression():
    # Published formula with N = M = 1: f(x) = 1 - (1 - σ(wᵀx + b)) = σ(wᵀx + b).
    # Reference: scipy.special.expit.
    rng = np.random.default_rng(50)
    X = rng.normal(size=(200, 3)).astype(np.float32)
    w, b = np.array([[1.5], [-2.0], [0.5]]), np.array([0.3])
    clf = classifier_from_state(*_ldnn_state(w, b, np.zeros(3), np.ones(3), 1, 1))
    np.testing.assert_allclose(clf.predict(X), expit(X @ w[:, 0] + b[0]), rtol=1e-5, atol=1e-6)


def test_ldnn_matches_published_formula():
    # f(x) = 1 - Π_i (1 - Π_j σ(w_ijᵀx + b_ij)) (Seyedhosseini, Sajjadi & Tasdizen, ICCV 2013),
    # evaluated term by term in float64 on standardised features (x - mean) / scale.
    rng = np.random.default_rng(51)
    n_groups, n_per_group, dims = 2, 3, 4
    W = rng.normal(size=(dims, n_groups * n_per_group))
    b = rng.normal(size=n_groups * n_per_group)
    mean, scale = rng.normal(size=dims), rng.uniform(0.5, 2.0, dims)
    clf = classifier_from_state(*_ldnn_state(W, b, mean, scale, n_groups, n_per_group))
    X = rng.normal(size=(5, dims)).astype(np.float32)
    W32, b32 = W.astype(np.float32), b.astype(np.float32)
    mean32, scale32 = mean.astype(np.float32), scale.astype(np.float32)
    expected = []
    for x in X.astype(np.float64):
        xs = (x - mean32) / scale32
        disjunction = 1.0
        for i in range(n_groups):
            conjunction = 1.0
            for j in range(n_per_group):
                col = i * n_per_group + j
                conjunction *= 1.0 / (1.0 + np.exp(-(xs @ W32[:, col] + b32[col])))
            disjunction *= 1.0 - conjunction
        expected.append(1.0 - disjunction)
    np.testing.assert_allclose(clf.predict(X), expected, rtol=1e-5, atol=1e-6)


# --- storage -----------------------------------------------------------------------------------


@pytest.mark.parametrize("kind", KINDS)
def test_round_trip_through_npz_and_json(fitted, kind, tmp_path):
    models, Xt = fitted
    clf = models[kind]
    arrays, meta = clf.to_state()
    np.savez(tmp_path / "model.npz", **arrays)
    (tmp_path / "model.json").write_text(json.dumps(meta))
    with np.load(tmp_path / "model.npz", allow_pickle=False) as stored:
        assert all(not stored[name].dtype.hasobject for name in stored.files)
        assert all(stored[name].dtype.kind in "biuf" for name in stored.files)
        loaded = classifier_from_state(stored, json.loads((tmp_path / "model.json").read_text()))
    assert loaded.kind == kind and loaded.options == clf.options
    np.testing.assert_array_equal(loaded.predict(Xt), clf.predict(Xt))
    assert meta["n_features"] == Xt.shape[1] and "numpy" in meta["versions"]


def test_predict_in_chunks_equals_one_pass(fitted, monkeypatch):
    models, Xt = fitted
    whole = {k: models[k].predict(Xt) for k in KINDS}
    monkeypatch.setattr(C, "CHUNK_ROWS", 97)
    for kind in TREES:
        np.testing.assert_array_equal(models[kind].predict(Xt), whole[kind])
    for kind in ("ldnn", "mlp"):
        # BLAS may pick a different kernel, and so round differently, for another block height.
        np.testing.assert_allclose(models[kind].predict(Xt), whole[kind], rtol=0, atol=1e-6)
    assert models["ldnn"].predict(np.empty((0, 4), np.float32)).shape == (0,)


@pytest.mark.parametrize("kind", ["extra_trees", "hist_gradient_boosting"])
def test_threads_do_not_change_predictions(fitted, kind):
    models, Xt = fitted
    arrays, meta = models[kind].to_state()
    one = classifier_from_state(arrays, meta, threads=1).predict(Xt)
    two = classifier_from_state(arrays, meta, threads=2).predict(Xt)
    np.testing.assert_array_equal(one, two)


def _tamper(arrays, meta, how):
    arrays, meta = dict(arrays), json.loads(json.dumps(meta))
    if how == "missing array":
        arrays.pop(sorted(arrays)[0])
    elif how == "extra array":
        arrays["surplus"] = np.zeros(3)
    elif how == "wrong shape":
        name = "mean" if "mean" in arrays else "left"
        arrays[name] = arrays[name][:-1]
    elif how == "wrong dtype":
        name = "mean" if "mean" in arrays else "threshold"
        arrays[name] = arrays[name].astype(np.float16)
    elif how == "object array":
        name = sorted(arrays)[0]
        arrays[name] = np.array(list(arrays[name]), dtype=object)
    elif how == "unknown kind":
        meta["kind"] = "svm"
    elif how == "feature count":
        meta["n_features"] += 1
    elif how == "format":
        meta["format_version"] = 99
    elif how == "unknown option":
        meta["options"]["depth_of_thought"] = 1
    return arrays, meta


TAMPERING = [
    "missing array",
    "extra array",
    "wrong shape",
    "wrong dtype",
    "object array",
    "unknown kind",
    "feature count",
    "format",
    "unknown option",
]


@pytest.mark.parametrize("how", TAMPERING)
@pytest.mark.parametrize("kind", ["ldnn", "mlp", "random_forest", "hist_gradient_boosting"])
def test_tampered_state_is_refused(fitted, kind, how):
    models, _ = fitted
    arrays, meta = _tamper(*models[kind].to_state(), how)
    with pytest.raises(TesseraInputError):
        classifier_from_state(arrays, meta)


@pytest.mark.parametrize("kind", TREES)
def test_cyclic_tree_is_refused(fitted, kind):
    # A child that points back to the root would make descent loop forever.
    models, _ = fitted
    arrays, meta = models[kind].to_state()
    arrays = dict(arrays)
    left = arrays["left"].copy()
    inner = np.flatnonzero(left != -1)
    left[inner[-1]] = 0
    arrays["left"] = left
    with pytest.raises(TesseraInputError, match="malformed"):
        classifier_from_state(arrays, meta)


# --- input checks ------------------------------------------------------------------------------

GOOD_X, GOOD_Y = xor(60, n=200)


@pytest.mark.parametrize(
    "X, y, w, match",
    [
        (GOOD_X[:, 0], GOOD_Y, None, "2D"),
        (GOOD_X.astype(np.int32), GOOD_Y, None, "floating"),
        (np.where(np.arange(200)[:, None] == 5, np.nan, GOOD_X), GOOD_Y, None, "NaN"),
        (GOOD_X, np.where(np.arange(200) == 3, 2, GOOD_Y), None, "only the labels"),
        (GOOD_X, np.zeros(200, np.uint8), None, "both classes"),
        (GOOD_X, GOOD_Y[:-1], None, "200 labels"),
        (GOOD_X, GOOD_Y, -np.ones(200), "non-negative"),
        (GOOD_X, GOOD_Y, np.ones(199), "200 weights"),
        (GOOD_X, GOOD_Y, np.where(GOOD_Y == 1, 0.0, 1.0), "class 1"),
    ],
)
def test_bad_fit_input(X, y, w, match):
    with pytest.raises(TesseraInputError, match=match):
        make_classifier("ldnn", seed=0, epochs=1).fit(X, y, sample_weight=w)


def test_bad_predict_input(fitted):
    models, Xt = fitted
    with pytest.raises(TesseraInputError, match="features"):
        models["random_forest"].predict(Xt[:, :3])
    with pytest.raises(TesseraInputError, match="not fitted"):
        make_classifier("mlp", seed=0).predict(Xt)
    with pytest.raises(TesseraInputError, match="infinite"):
        models["ldnn"].predict(np.full((2, 4), np.inf, np.float32))


@pytest.mark.parametrize(
    "kind, options, match",
    [
        ("svm", {}, "unknown classifier kind"),
        ("ldnn", {"n_groups": 0}, "n_groups"),
        ("ldnn", {"neurons": 3}, "unknown option"),
        ("mlp", {"hidden_layer_sizes": []}, "hidden_layer_sizes"),
        ("random_forest", {"max_features": "all"}, "max_features"),
        ("hist_gradient_boosting", {"max_bins": 1000}, "max_bins"),
        ("extra_trees", {"seed": -1}, "seed"),
    ],
)
def test_bad_options(kind, options, match):
    options = {"seed": 0, **options}
    with pytest.raises(TesseraInputError, match=match):
        make_classifier(kind, **options)


# --- one list of kinds -------------------------------------------------------------------------


def test_config_schema_offers_exactly_the_kinds(repo):
    # The code owns the list of kinds (KINDS); the config schema, which users read and which
    # validates their config, must offer the same kinds in the same order and default to one.
    schema = yaml.safe_load((repo / "config" / "schemas" / "config.schema.yaml").read_text())
    cascade = schema["properties"]["targets"]["additionalProperties"]["properties"]["cascade"]
    classifier = cascade["properties"]["classifier"]
    assert classifier["enum"] == list(KINDS)
    assert classifier["default"] in KINDS


def test_methods_text_names_every_kind():
    # The methods paragraph spells out the kind it used; every kind needs its name there.
    assert sorted(CLASSIFIER_NAMES) == sorted(KINDS)


def test_importing_the_cascade_does_not_import_scikit_learn():
    # Planning the workflow imports the cascade (rules/common.smk) at every Snakemake start, and
    # importing scikit-learn takes about a second; it must wait until a classifier is fitted.
    code = (
        "import sys, tessera.cascade.api, tessera.cascade.classifiers; "
        "print(sorted(m for m in sys.modules if m.split('.')[0] == 'sklearn'))"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert done.stdout.strip() == "[]"


def test_thread_limit_nested_in_a_limit_keeps_it_and_exiting_restores_the_pools():
    # Reference: threadpoolctl's own report of the BLAS pools (threadpool_info).
    from threadpoolctl import threadpool_info

    from tessera.cascade.classifiers import make_classifier

    def blas_threads():
        return [p["num_threads"] for p in threadpool_info() if p["user_api"] == "blas"]

    before = blas_threads()
    clf = make_classifier("mlp", seed=0, threads=1)
    with clf.thread_limit():
        with clf.thread_limit():
            assert all(n == 1 for n in blas_threads())
        assert all(n == 1 for n in blas_threads())
    assert blas_threads() == before
    with clf.thread_limit():  # set again once the first limit has ended
        assert all(n == 1 for n in blas_threads())
    assert blas_threads() == before


@pytest.mark.parametrize("rows, width", [(3, 1), (5000, 16), (20000, 32), (70000, 33)])
def test_layer_row_operations_equal_numpys_bit_for_bit(rows, width):
    # Reference: numpy's own broadcasting add and maximum with 0, on values that include -0.0,
    # NaN and infinities, and bands longer than the kept tiles and zero runs.
    from tessera.cascade.classifiers.row_ops import add_row, keep_row, relu

    rng = np.random.default_rng(rows)
    z = rng.normal(scale=3, size=(rows, width)).astype(np.float32)
    flat = z.reshape(-1)
    flat[::11], flat[1::97], flat[2::101], flat[3::103] = -0.0, np.nan, np.inf, -np.inf
    bias = rng.normal(size=width).astype(np.float32)
    kept = keep_row(bias)  # as a network keeps its biases: add_row then adds by the tile
    assert kept.size == 4096 * width and np.array_equal(kept[:width], bias)
    assert add_row(z.copy(), bias).tobytes() == (z + bias).tobytes()
    other = bias + np.float32(1)  # a row no network keeps: numpy's own add
    assert add_row(z.copy(), other).tobytes() == (z + other).tobytes()
    assert relu(z.copy()).tobytes() == np.maximum(z, np.float32(0)).tobytes()
    # a view that is not contiguous takes numpy's own path
    view = z.copy()[:, ::-1]
    assert relu(view).tobytes() == np.maximum(z[:, ::-1], np.float32(0)).tobytes()
