"""Random forest and extremely randomised trees (scikit-learn), stored as node arrays."""

from concurrent.futures import ThreadPoolExecutor

import numpy as np

from tessera.cascade.classifiers.base import int_option
from tessera.cascade.classifiers.tree_arrays import TreeEnsemble, pack_trees, unpack_trees
from tessera.errors import TesseraInputError


class ForestClassifier(TreeEnsemble):
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
            "n_estimators": int_option("n_estimators", o["n_estimators"], 1),
            "min_samples_leaf": int_option("min_samples_leaf", o["min_samples_leaf"], 1),
            "max_features": mf,
            "max_depth": None if depth is None else int_option("max_depth", depth, 1),
            "bootstrap": o["bootstrap"],
        }

    def _fit(self, X, y, w):
        from sklearn import ensemble  # noqa: PLC0415 - scikit-learn (~1 s) stays out of workflow planning

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
        arrays = pack_trees([_tree_nodes(est.tree_) for est in model.estimators_], X.shape[1])
        self._set_trees(arrays, X.shape[1])

    def _load(self, arrays, meta):
        self._set_trees(arrays, meta["n_features"])
        self.estimator_ = None

    def _build_compiled(self):
        """scikit-learn ``Tree`` objects rebuilt from the arrays (None if that is not possible)."""
        try:
            # A private module of scikit-learn: if a later version moves it, the ImportError
            # below falls back to the numpy descent.
            from sklearn.tree._tree import NODE_DTYPE, Tree  # noqa: PLC0415 - scikit-learn (~1 s) stays out of workflow planning

            trees = []
            for start, t in unpack_trees(self.trees_):
                n = t["left"].shape[0]
                nodes = np.zeros(n, dtype=NODE_DTYPE)
                leaf = t["left"] == -1
                nodes["left_child"] = t["left"]
                nodes["right_child"] = t["right"]
                nodes["feature"] = np.where(leaf, -2, t["feature"])
                nodes["threshold"] = np.where(leaf, -2.0, t["threshold"])
                p1 = t["value"]
                values = np.ascontiguousarray(np.stack([1 - p1, p1], axis=1)[:, None, :])
                tree = Tree(self._n_tree_features, np.array([2], dtype=np.intp), 1)
                depth = _max_depth(t["left"], t["right"])
                tree.__setstate__(
                    {"max_depth": depth, "node_count": n, "nodes": nodes, "values": values}
                )
                trees.append((start, tree))
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


def _tree_nodes(tree):
    """The node arrays of one fitted scikit-learn ``Tree``, as :func:`pack_trees` takes them."""
    leaf = tree.children_left == -1
    return {
        "left": tree.children_left.astype(np.int32),
        "right": tree.children_right.astype(np.int32),
        "feature": np.where(leaf, -1, tree.feature).astype(np.int32),
        "threshold": np.where(leaf, 0.0, tree.threshold).astype(np.float64),
        # scikit-learn stores per-node class fractions; column 1 is class 1 (classes_ = [0, 1]).
        "value": tree.value[:, 0, 1].astype(np.float64),
    }


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
