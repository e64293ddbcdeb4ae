"""Pictures of 3D object scores: a bar chart of the scores, and true objects over raw sections.

The crops let a reader judge splits and merges by eye: the raw section around one true object,
its outline in cyan, and the outline of every predicted object there in its own colour (two
colours over one cyan outline: a split; one colour over several cyan outlines: a merge).
"""

import numpy as np
from skimage.segmentation import find_boundaries

from tessera.errors import TesseraInputError
from tessera.plotting import pyplot

__all__ = ["crop_box", "object_crop", "plot_object_crops", "plot_object_scores"]

TRUTH_COLOUR = (0.0, 1.0, 1.0)
#: Outline colours of predicted objects (no cyan, which marks the truth).
PREDICTED_COLOURS = (
    (1.0, 0.2, 0.2),
    (1.0, 0.85, 0.0),
    (1.0, 0.3, 1.0),
    (0.3, 1.0, 0.3),
    (1.0, 0.55, 0.0),
    (0.6, 0.45, 1.0),
)


def crop_box(rows, cols, shape, *, margin=8, min_size=32):
    """A crop around a 2D bounding box, widened by `margin` and to at least `min_size`, inside
    `shape`.

    Parameters
    ----------
    rows, cols : (int, int)
        Start and stop of the object's bounding box.
    shape : (int, int)
        The section's shape.

    Returns
    -------
    (slice, slice)

    Examples
    --------
    >>> crop_box((10, 14), (0, 4), (100, 50), margin=2, min_size=8)
    (slice(8, 16, None), slice(0, 8, None))
    """
    out = []
    for (start, stop), size in zip((rows, cols), shape, strict=True):
        start, stop = start - margin, stop + margin
        grow = max(0, min_size - (stop - start))
        start, stop = start - grow // 2, stop + grow - grow // 2
        shift = max(0, -start) - max(0, stop - size)  # slide back inside the section
        start, stop = max(0, start + shift), min(size, stop + shift)
        out.append(slice(int(start), int(stop)))
    return tuple(out)


def object_crop(raw, truth, pred, *, truth_id):
    """RGB picture of one section crop: raw grey values, the true object's outline in cyan, and
    the outline of each predicted object in the crop in its own colour.

    Parameters
    ----------
    raw : (H, W) ndarray
        Grey values (any range; stretched to the crop's 1st–99th percentile).
    truth, pred : (H, W) ndarray of int
        True and predicted labels of the same crop.
    truth_id : int
        The true object to outline.

    Returns
    -------
    (H, W, 3) ndarray of float32 in [0, 1]

    Examples
    --------
    >>> truth = np.zeros((6, 6), int); truth[1:5, 1:5] = 3
    >>> pred = np.zeros((6, 6), int); pred[1:5, 1:3] = 1; pred[1:5, 3:5] = 2
    >>> img = object_crop(np.zeros((6, 6)), truth, pred, truth_id=3)
    >>> img.shape, img.dtype, bool((img[1, 1] == (0, 1, 1)).all())
    ((6, 6, 3), dtype('float32'), True)
    """
    raw = np.asarray(raw, np.float32)
    truth, pred = np.asarray(truth), np.asarray(pred)
    if not raw.shape == truth.shape == pred.shape or raw.ndim != 2:
        raise TesseraInputError(
            f"raw {raw.shape}, truth {truth.shape} and prediction {pred.shape} must be one 2D crop"
        )
    low, high = np.percentile(raw, (1, 99)) if raw.size else (0.0, 1.0)
    grey = np.clip((raw - low) / (high - low), 0, 1) if high > low else np.zeros_like(raw)
    image = np.repeat(grey[..., None], 3, axis=2)
    for k, label in enumerate(np.unique(pred[pred > 0])):
        edge = find_boundaries(pred == label, mode="inner")
        image[edge] = PREDICTED_COLOURS[k % len(PREDICTED_COLOURS)]
    # the truth last, so that its outline stays visible where the two coincide
    image[find_boundaries(truth == truth_id, mode="inner")] = TRUTH_COLOUR
    return image.astype(np.float32)


def plot_object_crops(crops, path, *, title, columns=4):
    """A grid of crops, one row per size class.

    Parameters
    ----------
    crops : dict of str to list of (ndarray, str)
        Size class → its crops (RGB image, caption), in the order drawn.
    path : str or Path
        PNG to write.
    title : str
    """
    plt = pyplot()
    rows = max(1, len(crops))
    fig, axes = plt.subplots(rows, columns, figsize=(2.3 * columns, 2.5 * rows), squeeze=False)
    for ax_row, (name, items) in zip(axes, list(crops.items()) or [("none", [])], strict=False):
        for k, ax in enumerate(ax_row):
            ax.axis("off")
            if k < len(items):
                image, caption = items[k]
                ax.imshow(image, interpolation="nearest")
                ax.set_title(f"{name}: {caption}", fontsize=6)
    fig.suptitle(title, fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=100, format="png")
    plt.close(fig)


def plot_object_scores(table, path, *, title):
    """Object precision, recall and F1 per row of `table` (bars), with the partition errors and
    the voxel Jaccard of the objects mask named under each group.

    Parameters
    ----------
    table : pandas.DataFrame
        ``dataset``, ``object_precision``, ``object_recall``, ``object_f1``, ``arand``,
        ``voi_split``, ``voi_merge``, ``voxel_jaccard``.
    path : str or Path
        PNG to write.
    title : str
    """
    plt = pyplot()
    names = ["object_precision", "object_recall", "object_f1"]
    x = np.arange(len(table))
    fig, ax = plt.subplots(figsize=(max(4.5, 1.3 * len(table) + 1.5), 3.8))
    for k, name in enumerate(names):
        ax.bar(x + (k - 1) * 0.27, table[name], width=0.27, label=name.replace("object_", ""))
    labels = [
        f"{row.dataset}\nARAND {row.arand:.2f}\nVOI {row.voi_split:.2f}/{row.voi_merge:.2f}"
        f"\nvoxel J {row.voxel_jaccard:.2f}"
        for row in table.itertuples(index=False)
    ]
    ax.set_xticks(x, labels, fontsize=6)
    ax.set(ylim=(0, 1.05), ylabel="objects (IoU > 0.5)", title=title)
    ax.title.set_fontsize(8)
    ax.legend(fontsize=7, loc="lower right")
    fig.tight_layout()
    fig.savefig(path, dpi=100, format="png")
    plt.close(fig)
