"""Binary pixel classifiers of the cascade, stored as plain arrays plus JSON metadata.

Every classifier separates one target class (label 1) from background (label 0) on a float32
feature matrix ``X`` of shape ``(N, C)`` and predicts a float32 probability of class 1. Class
balancing is the caller's business, through ``sample_weight``.

Five kinds (:data:`KINDS`) share one interface (:class:`~.base.BinaryClassifier`):

``ldnn`` (:mod:`.ldnn`)
    The logistic disjunctive normal network of the cascaded hierarchical model, written in numpy
    from its published formula.
``mlp`` (:mod:`.mlp`)
    A small multilayer perceptron trained by minibatch Adam and predicted in numpy (its forward
    pass agrees with scikit-learn's ``MLPClassifier`` given the same weights).
``extra_trees``, ``random_forest`` (:mod:`.trees`)
    scikit-learn's ``ExtraTreesClassifier`` / ``RandomForestClassifier``.
``hist_gradient_boosting`` (:mod:`.boosting`)
    scikit-learn's ``HistGradientBoostingClassifier``.

The tree kinds share one stored layout (:mod:`.tree_arrays`), the networks one standardisation
(:mod:`.scaling`). A fitted model is stored by ``to_state`` as a dict of numeric numpy arrays (for
``np.savez``; load with ``allow_pickle=False``) and a JSON-able dict of metadata. Nothing in a
stored model can run code when it is loaded: no pickle, no joblib, no object arrays. Loading
(:func:`classifier_from_state`) checks the kind, every array's presence, dtype and shape, and the
tree structure (children always after their parent, so that descent must end), and raises
:class:`~tessera.errors.TesseraInputError` naming what is wrong.

Importing this package does not import scikit-learn (about a second): the workflow imports the
cascade to plan jobs. scikit-learn is imported where a model is fitted or saved, or where its
compiled trees are rebuilt for prediction.
"""

from tessera.cascade.classifiers.base import (
    CHUNK_ROWS,
    STATE_FORMAT,
    STATE_VERSION,
    BinaryClassifier,
)
from tessera.cascade.classifiers.registry import (
    KINDS,
    classifier_from_state,
    linear_first_step,
    make_classifier,
)

__all__ = [
    "CHUNK_ROWS",
    "KINDS",
    "STATE_FORMAT",
    "STATE_VERSION",
    "BinaryClassifier",
    "classifier_from_state",
    "linear_first_step",
    "make_classifier",
]
