"""Where to annotate next: tile centres where the model is least sure, spread out.

The uncertainty of a pixel is the binary entropy of its probability p, H(p) = −p log2 p −
(1 − p) log2(1 − p): 1 bit at p = 0.5, 0 at p = 0 or 1. A candidate tile's score is the mean
entropy over its window. Candidates lie on a grid of half a tile; the best ones are taken
greedily, each at least a tile apart in-plane (or `min_sections` apart in z) from every one taken
before and from every existing tile, and never on sections QC excluded. The result is a points
sheet that the tile export reads (full-resolution voxel coordinates of each centre).
"""

import numpy as np
import pandas as pd

from tessera.errors import TesseraInputError
from tessera.plotting import pyplot


def binary_entropy(p):
    """Entropy in bits of probabilities `p` (float array in [0, 1]).

    Examples
    --------
    >>> binary_entropy(np.array([0.0, 0.5, 1.0]))
    array([0., 1., 0.])
    """
    p = np.clip(np.asarray(p, dtype=np.float64), 1e-12, 1 - 1e-12)
    h = -(p * np.log2(p) + (1 - p) * np.log2(1 - p))
    return np.where(h < 1e-9, 0.0, h)


def candidate_scores(section, *, size):
    """Mean entropy of `size` × `size` windows centred on a grid of step size / 2 over one section.

    Returns a table with ``y``, ``x`` (centres, pixels of this section) and ``score``.
    """
    h = binary_entropy(section)
    if min(h.shape) < size:
        size = min(h.shape)
    # integral image: window sums in O(1) each
    integral = np.pad(h.cumsum(0).cumsum(1), ((1, 0), (1, 0)))
    step = max(1, size // 2)
    ys = np.arange(0, h.shape[0] - size + 1, step)
    xs = np.arange(0, h.shape[1] - size + 1, step)
    y0, x0 = np.meshgrid(ys, xs, indexing="ij")
    sums = (
        integral[y0 + size, x0 + size]
        - integral[y0, x0 + size]
        - integral[y0 + size, x0]
        + integral[y0, x0]
    )
    return pd.DataFrame(
        {
            "y": (y0 + size // 2).ravel(),
            "x": (x0 + size // 2).ravel(),
            "score": (sums / size**2).ravel(),
        }
    )


def rank_tiles(volumes, existing, *, size, count, excluded=None, min_sections=2):
    """Pick `count` tile centres of highest mean entropy, spread out and away from existing tiles.

    Parameters
    ----------
    volumes : dict
        Dataset id → (Z, Y, X) probability volume at the working level (read one section at a
        time; zarr works) with values in [0, 1].
    existing : pandas.DataFrame
        Tiles already annotated (``dataset``, ``z``, ``y0``, ``x0``, ``height``, ``width``).
    size : int
        Tile side in pixels of the working level.
    excluded : dict, optional
        Dataset id → sections not to use (QC).
    min_sections : int
        Tiles on sections closer than this count as neighbours (they are highly correlated).

    Returns
    -------
    pandas.DataFrame
        ``dataset``, ``z``, ``y``, ``x`` (working-level centre), ``score``, best first.
    """
    if count < 1:
        raise TesseraInputError(f"the number of tiles to suggest must be >= 1, got {count}")
    excluded = excluded or {}
    candidates = []
    for dataset, volume in volumes.items():
        skip = set(excluded.get(dataset, ()))
        for z in range(volume.shape[0]):
            if z in skip:
                continue
            table = candidate_scores(np.asarray(volume[z], dtype=np.float32), size=size)
            table.insert(0, "z", z)
            table.insert(0, "dataset", dataset)
            candidates.append(table)
    if not candidates:
        raise TesseraInputError("no sections to suggest tiles on (all excluded?)")
    ranked = pd.concat(candidates, ignore_index=True).sort_values(
        ["score", "dataset", "z", "y", "x"], ascending=[False, True, True, True, True]
    )
    taken = [
        (r.dataset, r.z, r.y0 + r.height // 2, r.x0 + r.width // 2)
        for r in existing.itertuples(index=False)
    ]
    chosen = []
    for row in ranked.itertuples(index=False):
        near = any(
            d == row.dataset
            and abs(z - row.z) < min_sections
            and abs(y - row.y) < size
            and abs(x - row.x) < size
            for d, z, y, x in taken
        )
        if near:
            continue
        chosen.append(row)
        taken.append((row.dataset, row.z, row.y, row.x))
        if len(chosen) == count:
            break
    return pd.DataFrame(chosen, columns=["dataset", "z", "y", "x", "score"]).reset_index(drop=True)


def plot_suggestions(picks, volumes, path, *, size, target, shown=6):
    """The probability around the first `shown` suggested tiles (a preview, PNG to `path`).

    `volumes` maps dataset ids to probability volumes read section by section, as for
    :func:`rank_tiles`.
    """
    plt = pyplot()

    rows = picks.head(shown)
    fig, axes = plt.subplots(
        1, max(1, len(rows)), figsize=(2.4 * max(1, len(rows)), 2.8), squeeze=False
    )
    for ax, row in zip(axes[0], rows.itertuples(index=False), strict=False):
        section = volumes[row.dataset][row.z]
        half = size // 2
        crop = section[max(0, row.y - half) : row.y + half, max(0, row.x - half) : row.x + half]
        ax.imshow(crop, cmap="magma", vmin=0, vmax=1, interpolation="nearest")
        ax.set_title(f"{row.dataset} z{row.z}\nH {row.score:.2f} bits", fontsize=7)
        ax.axis("off")
    fig.suptitle(f"{target}: where the model is least sure (probability shown)", fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=100, format="png")
    plt.close(fig)
