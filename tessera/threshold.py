"""The probability threshold: counted and scored pixel decisions, the choice on validation
pixels, and its application to probabilities.

One rule for the whole project: a threshold is chosen from a fixed grid (0.01, 0.02, ..., 0.99)
as the one with the best pixel F1 on the validation tiles (ties: the lowest); test tiles never
choose anything. Pixels labelled 255 (ignore) are left out of every count.

Foreground is ``probability >= threshold`` everywhere (:func:`apply_threshold`): in the pixel
scores, in the choice itself and in the objects' hysteresis, the way
``sklearn.metrics.precision_recall_curve`` counts a threshold.
"""

import numpy as np

from tessera.label_values import IGNORE

GRID = np.linspace(0.01, 0.99, 99)


def apply_threshold(prob, threshold):
    """Foreground mask: ``prob >= threshold``.

    The comparison follows numpy's promotion rules: a Python float threshold is compared in the
    array's own float type, a numpy float64 threshold in float64.

    Examples
    --------
    >>> apply_threshold(np.array([0.2, 0.5, 0.7]), 0.5)
    array([False,  True,  True])
    """
    return np.asarray(prob) >= threshold


def confusion(prob, truth, threshold):
    """Counts (tp, fp, fn, tn) of `prob` >= `threshold` against truth 0/1 (255 ignored).

    Examples
    --------
    >>> confusion(np.array([0.9, 0.8, 0.1, 0.3]), np.array([1, 0, 1, 255]), 0.5)
    (1, 1, 1, 0)
    """
    prob, truth = np.asarray(prob).ravel(), np.asarray(truth).ravel()
    keep = truth != IGNORE
    pred, true = apply_threshold(prob[keep], threshold), truth[keep] == 1
    tp = int(np.sum(pred & true))
    fp = int(np.sum(pred & ~true))
    fn = int(np.sum(~pred & true))
    return tp, fp, fn, int(true.size - tp - fp - fn)


def scores_from_counts(tp, fp, fn):
    """Precision, recall, F1 (= Dice) and Jaccard from counts; 0 where undefined.

    Examples
    --------
    >>> s = scores_from_counts(8, 2, 2)
    >>> round(s["f1"], 3), round(s["jaccard"], 4), round(s["f1"] / (2 - s["f1"]), 4)
    (0.8, 0.6667, 0.6667)
    """
    return {
        "precision": tp / (tp + fp) if tp + fp else 0.0,
        "recall": tp / (tp + fn) if tp + fn else 0.0,
        "f1": 2 * tp / (2 * tp + fp + fn) if tp + fp + fn else 0.0,
        "jaccard": tp / (tp + fp + fn) if tp + fp + fn else 0.0,
    }


def choose_threshold(prob, truth, *, grid=GRID):
    """The grid threshold with the best pixel F1 of `prob` against `truth` (ties: the lowest).

    Returns the grid's own element (a numpy float64 for the default grid).

    Examples
    --------
    >>> prob = np.array([0.1, 0.3, 0.45, 0.8, 0.9])
    >>> truth = np.array([0, 0, 1, 1, 1])
    >>> round(float(choose_threshold(prob, truth)), 2)
    0.31
    """
    scores = [scores_from_counts(*confusion(prob, truth, t)[:3])["f1"] for t in grid]
    return grid[int(np.argmax(scores))]


def informative(tp, fp, fn):
    """Which tiles bear on pixel scores: those holding a true or a predicted target pixel.

    A tile of background alone, predicted as such, adds nothing to pooled precision, recall or
    F1, nor to a bootstrap's spread; such tiles do not count towards the tiles an interval needs
    (:mod:`tessera.interval_caution`).

    Examples
    --------
    >>> informative([5, 0, 0], [1, 0, 2], [0, 0, 0]).tolist()
    [True, False, True]
    """
    return (np.asarray(tp) + np.asarray(fp) + np.asarray(fn)) > 0
