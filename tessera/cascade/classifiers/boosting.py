"""Histogram gradient boosting (scikit-learn), stored as node arrays plus its baseline score."""

import numpy as np
from scipy.special import expit
from threadpoolctl import threadpool_limits

from tessera.cascade.classifiers.base import STATE_SOURCE, float_option, int_option
from tessera.cascade.classifiers.tree_arrays import TreeEnsemble, pack_trees, unpack_trees
from tessera.errors import TesseraInputError


class HistGradientBoostingBinaryClassifier(TreeEnsemble):
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
        bins = int_option("max_bins", o["max_bins"], 2)
        if bins > 255:
            raise TesseraInputError(f"option 'max_bins' must be <= 255, got {bins}")
        return {
            "max_iter": int_option("max_iter", o["max_iter"], 1),
            "learning_rate": float_option("learning_rate", o["learning_rate"]),
            "max_leaf_nodes": int_option("max_leaf_nodes", o["max_leaf_nodes"], 2),
            "min_samples_leaf": int_option("min_samples_leaf", o["min_samples_leaf"], 1),
            "l2_regularization": float_option(
                "l2_regularization", o["l2_regularization"], inclusive=True
            ),
            "max_bins": bins,
        }

    def _array_spec(self, meta):
        return {**super()._array_spec(meta), "baseline": (np.float64, (1,))}

    def _fit(self, X, y, w):
        from sklearn.ensemble import HistGradientBoostingClassifier  # noqa: PLC0415 - scikit-learn (~1 s) stays out of workflow planning

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
        trees = [_predictor_nodes(predictor) for (predictor,) in model._predictors]
        baseline = np.asarray(model._baseline_prediction, dtype=np.float64).reshape(1)
        arrays = pack_trees(trees, X.shape[1], baseline=baseline)
        self._set_trees(arrays, X.shape[1])

    def _load(self, arrays, meta):
        if not np.isfinite(arrays["baseline"]).all():
            raise TesseraInputError("'baseline' must be finite", source=STATE_SOURCE)
        self._set_trees(arrays, meta["n_features"])
        self.estimator_ = None

    def _build_compiled(self):
        try:
            # Private modules of scikit-learn: if a later version moves them, the ImportError
            # below falls back to the numpy descent.
            from sklearn.ensemble._hist_gradient_boosting.common import (  # noqa: PLC0415 - scikit-learn (~1 s) stays out of workflow planning
                PREDICTOR_RECORD_DTYPE,
            )
            from sklearn.ensemble._hist_gradient_boosting.predictor import (  # noqa: PLC0415 - scikit-learn (~1 s) stays out of workflow planning
                TreePredictor,
            )

            no_bitsets = np.zeros((0, 8), dtype=np.uint32)
            predictors = []
            for _, t in unpack_trees(self.trees_):
                leaf = t["left"] == -1
                nodes = np.zeros(t["left"].shape[0], dtype=PREDICTOR_RECORD_DTYPE)
                nodes["is_leaf"] = leaf
                nodes["left"] = np.where(leaf, 0, t["left"])
                nodes["right"] = np.where(leaf, 0, t["right"])
                nodes["feature_idx"] = np.where(leaf, 0, t["feature"])
                nodes["num_threshold"] = t["threshold"]
                nodes["value"] = t["value"]
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


def _predictor_nodes(predictor):
    """The node arrays of one fitted ``TreePredictor``, as :func:`pack_trees` takes them.

    For raw, unbinned data a sample goes left when ``x <= num_threshold``, so the float64
    ``num_threshold`` of each split is what is kept; leaves carry the leaf value.
    """
    nodes = predictor.nodes
    if nodes["is_categorical"].any():
        raise TesseraInputError("categorical splits cannot be stored")
    leaf = nodes["is_leaf"].astype(bool)
    tree = {}
    for name, field in (("left", "left"), ("right", "right"), ("feature", "feature_idx")):
        column = nodes[field].astype(np.int32)
        column[leaf] = -1
        tree[name] = column
    tree["threshold"] = np.where(leaf, 0.0, nodes["num_threshold"])
    tree["value"] = np.where(leaf, nodes["value"], 0.0).astype(np.float64)
    return tree
