"""Tree ensembles stored as plain node arrays: packing, unpacking, checks and a numpy descent.

Every tree-based kind (random forest, extra trees, gradient boosting) stores its trees the same
way: per-tree node arrays ``left``, ``right`` (children as indices local to the tree, -1 at
leaves), ``feature`` (-1 at leaves), ``threshold`` and ``value`` (float64), concatenated over the
trees, with ``tree_offsets`` marking where each tree starts and ``split_counts`` (splits per
feature) fixing the feature count. :func:`pack_trees` builds that layout, :func:`unpack_trees`
slices the trees back out, and :class:`TreeEnsemble` checks loaded arrays (children after their
parent, so that descent must end) and predicts by a numpy descent when scikit-learn's compiled
tree objects cannot be rebuilt.
"""

import numpy as np

from tessera.cascade.classifiers.base import STATE_SOURCE, BinaryClassifier
from tessera.errors import TesseraInputError

# The per-node arrays of one tree, in the order they are stored.
NODE_FIELDS = ("left", "right", "feature", "threshold", "value")


def pack_trees(trees, n_features, **extra):
    """Concatenate per-tree node arrays into the stored layout of a tree ensemble.

    Parameters
    ----------
    trees : iterable of dict
        One dict per tree holding the :data:`NODE_FIELDS` arrays with the stored dtypes (int32
        ``left``, ``right`` and ``feature``; float64 ``threshold`` and ``value``); children are
        indices within the tree, -1 at leaves, where ``feature`` is -1 too.
    n_features : int
        Number of features the trees were fitted on (the length of ``split_counts``).
    **extra : ndarray
        Further arrays of the kind (gradient boosting's ``baseline``), stored after
        ``tree_offsets``.

    Returns
    -------
    dict of str to ndarray
        The node arrays, ``tree_offsets`` (int64, one more than there are trees), the `extra`
        arrays and ``split_counts`` (int64, splits per feature), in this order: the order of the
        arrays in saved model files.

    Examples
    --------
    A stump (root split on feature 1 at 0.5) and a single leaf, on three features:

    >>> i32 = lambda *v: np.array(v, dtype=np.int32)
    >>> stump = dict(left=i32(1, -1, -1), right=i32(2, -1, -1), feature=i32(1, -1, -1),
    ...              threshold=np.array([0.5, 0, 0]), value=np.array([0, 0.2, 0.9]))
    >>> leaf = dict(left=i32(-1), right=i32(-1), feature=i32(-1),
    ...             threshold=np.zeros(1), value=np.array([0.4]))
    >>> packed = pack_trees([stump, leaf], 3)
    >>> list(packed)
    ['left', 'right', 'feature', 'threshold', 'value', 'tree_offsets', 'split_counts']
    >>> packed["tree_offsets"], packed["split_counts"]
    (array([0, 3, 4]), array([0, 1, 0]))
    """
    parts = {name: [] for name in NODE_FIELDS}
    sizes = []
    for tree in trees:
        for name in NODE_FIELDS:
            parts[name].append(tree[name])
        sizes.append(tree["left"].shape[0])
    arrays = {name: np.concatenate(v) for name, v in parts.items()}
    arrays["tree_offsets"] = np.concatenate([[0], np.cumsum(sizes)]).astype(np.int64)
    arrays.update(extra)
    inner = arrays["left"] != -1
    arrays["split_counts"] = np.bincount(arrays["feature"][inner], minlength=n_features).astype(
        np.int64
    )
    return arrays


def unpack_trees(arrays):
    """The trees of a packed ensemble, one at a time.

    Parameters
    ----------
    arrays : mapping of str to ndarray
        As returned by :func:`pack_trees`.

    Yields
    ------
    start : int
        Index of the tree's root in the packed node arrays.
    nodes : dict of str to ndarray
        The tree's :data:`NODE_FIELDS` arrays (views; children local to the tree).

    Examples
    --------
    >>> i32 = lambda *v: np.array(v, dtype=np.int32)
    >>> leaf = dict(left=i32(-1), right=i32(-1), feature=i32(-1),
    ...             threshold=np.zeros(1), value=np.array([0.4]))
    >>> [(start, nodes["value"]) for start, nodes in unpack_trees(pack_trees([leaf, leaf], 2))]
    [(0, array([0.4])), (1, array([0.4]))]
    """
    offsets = arrays["tree_offsets"]
    for start, stop in zip(offsets[:-1], offsets[1:], strict=True):
        yield int(start), {name: arrays[name][start:stop] for name in NODE_FIELDS}


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
            source=STATE_SOURCE,
        )
    if offsets[0] != 0 or offsets[-1] != n_nodes or (np.diff(offsets) < 1).any():
        raise TesseraInputError(
            "'tree_offsets' must rise from 0 to the node count with at least one node per tree",
            source=STATE_SOURCE,
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
            source=STATE_SOURCE,
        )
    if not np.array_equal(
        np.bincount(feature[inner], minlength=n_features), arrays["split_counts"]
    ):
        raise TesseraInputError(
            "'split_counts' does not match the splits of the trees", source=STATE_SOURCE
        )
    base = offsets[tree_of]
    gl = np.where(is_leaf, np.arange(n_nodes), left.astype(np.int64) + base)
    gr = np.where(is_leaf, np.arange(n_nodes), right.astype(np.int64) + base)
    return is_leaf, gl, gr


class TreeEnsemble(BinaryClassifier):
    """Shared storage for tree ensembles: per-tree node arrays concatenated with offsets.

    Subclasses fit, then store their trees with :func:`pack_trees` and ``_set_trees``, which
    also checks arrays loaded from a file.
    """

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
