"""Training, validation and test tiles kept apart in z, per dataset and target."""

import zlib

import numpy as np
import pandas as pd

from tessera.errors import TesseraInputError
from tessera.tiles.checks import as_int
from tessera.tiles.registry import validate_registry

__all__ = ["held_out_sections", "split_tiles"]


def split_tiles(
    registry,
    *,
    fractions=(0.6, 0.2, 0.2),
    guard_sections=2,
    seed=0,
    test_datasets=None,
    train_tiles=(),
):
    """Assign every tile a role: train, validation, test, or guard (unused).

    Parameters
    ----------
    registry : pandas.DataFrame
        See :func:`validate_registry`; an existing ``role`` column is replaced.
    fractions : (float, float, float), optional
        Wanted shares of train, validation and test tiles (non-negative, sum 1).
    guard_sections : int, optional
        Minimum distance ``|z_heldout - z_train|``, counted in the registry's ``z`` grid (the
        working level's sections), between every validation or test tile and every training
        tile of the same dataset and target. 0 allows the same section.
    seed : int, optional
        Chooses, per dataset and target, whether training takes the low or the high end of z and
        whether validation or test sits next to it.
    test_datasets : sequence of str, optional
        Datasets held out whole: every tile of theirs is a test tile, and the other datasets'
        tiles are split into training and validation only, in the ratio of the first two
        `fractions`. An organelle then never lies partly in training and partly in the test
        set, which a split within a stack cannot promise where organelles span many sections.
    train_tiles : iterable of str, optional
        Tile ids that are training tiles whatever their place (tiles painted where the model
        was unsure, to be learnt from). The other tiles are split as if these were not there,
        so adding them changes no other tile's role; one nearer than `guard_sections` to a
        held-out tile of its dataset becomes a guard tile instead.

    Returns
    -------
    pandas.DataFrame
        A validated copy of `registry` (same row order) with a ``role`` column. Rows that had
        to be dropped to keep the distance have role ``"guard"``; count them for the report.

    Notes
    -----
    Each dataset and target is split on its own (a model of one target never trains on the
    tiles of another). Tiles are sorted by z and each role takes one contiguous z range, training
    at one end, so only one gap of ``guard_sections - 1`` sections is lost. The training range
    is the one whose train and held-out counts come closest to the wanted shares; the held-out
    range is then divided between validation and test at a section boundary. A section is
    never shared between roles.

    Examples
    --------
    >>> reg = pd.DataFrame({"tile_id": [f"t{z}" for z in range(10)], "dataset": "d",
    ...     "target": "m", "level": 0, "z": range(10), "y0": 0, "x0": 0, "height": 4,
    ...     "width": 4, "source": "labels"})
    >>> split_tiles(reg, guard_sections=2, seed=0)["role"].value_counts().sort_index().to_dict()
    {'guard': 1, 'test': 1, 'train': 6, 'validation': 2}
    >>> two = pd.concat([reg, reg.assign(dataset="e", tile_id=reg["tile_id"] + "e")])
    >>> roles = split_tiles(two, seed=0, test_datasets=["e"])
    >>> roles.groupby("dataset")["role"].value_counts().sort_index().to_dict()
    {('d', 'guard'): 1, ('d', 'train'): 7, ('d', 'validation'): 2, ('e', 'test'): 10}
    """
    table = validate_registry(
        registry.drop(columns=["role"], errors="ignore")
        if isinstance(registry, pd.DataFrame)
        else registry
    )
    try:
        fr = [float(f) for f in fractions]
    except (TypeError, ValueError):
        raise TesseraInputError(f"fractions must be three numbers, got {fractions!r}") from None
    if len(fr) != 3 or min(fr) < 0 or not np.isfinite(fr).all() or abs(sum(fr) - 1) > 1e-6:
        raise TesseraInputError(
            f"fractions (train, validation, test) must be three numbers >= 0 summing to 1, got "
            f"{fractions!r}"
        )
    guard = as_int(guard_sections, low=0, where="guard_sections", source=None)
    seed = as_int(seed, low=0, where="seed", source=None)
    held_whole = set(test_datasets or ())
    if held_whole:
        # the test set is the held-out datasets: the others give training and validation tiles
        kept = fr[0] + fr[1]
        if kept <= 0:
            raise TesseraInputError(
                f"fractions {fractions!r} leave nothing for training and validation beside the "
                "datasets held out whole (test_datasets)"
            )
        fr = [fr[0] / kept, fr[1] / kept, 0.0]
    roles = pd.Series("", index=table.index, dtype=object)
    forced = table["tile_id"].isin(set(train_tiles))
    for (dataset, target), group in table.groupby(["dataset", "target"], sort=True):
        if dataset in held_whole:
            roles.loc[group.index] = "test"
            continue
        chosen = group[~forced.loc[group.index]]
        if len(chosen):
            key = zlib.crc32(f"{dataset}\t{target}".encode())
            rng = np.random.default_rng([seed, key])
            descending = bool(rng.integers(2))
            test_first = bool(rng.integers(2))
            roles.loc[chosen.index] = _split_group(chosen["z"], fr, guard, descending, test_first)
        held = chosen["z"][roles.loc[chosen.index].isin(["validation", "test"])].to_numpy()
        for index in group.index[forced.loc[group.index]]:
            near = held.size and np.abs(held - table.at[index, "z"]).min() < max(guard, 1)
            roles.loc[index] = "guard" if near else "train"
    table["role"] = roles.astype(str)
    return table


def _split_group(z, fr, guard, descending, test_first):
    """Roles of one dataset/target group (a pandas Series of z) as a list in its order."""
    sign = -1 if descending else 1
    pos = sign * z.to_numpy(dtype=np.int64)  # training sits at the low end of `pos`
    levels = np.unique(pos)
    per_level = np.array([np.count_nonzero(pos == v) for v in levels])
    n = len(pos)
    want_train = fr[0] * n
    best = None
    # i = number of sections given to training (0..all); held-out starts at the first section
    # at least `guard` away from the last training section.
    for i in range(len(levels) + 1):
        n_train = int(per_level[:i].sum())
        if i == 0:
            j = 0
        else:
            j = int(np.searchsorted(levels, levels[i - 1] + max(guard, 1), side="left"))
        n_held = int(per_level[j:].sum())
        dropped = n - n_train - n_held
        score = (
            abs(n_train - want_train) + abs(n_held - (n - want_train)),
            dropped,
            abs(n_train - want_train),
            i,
        )
        if best is None or score < best[0]:
            best = (score, i, j)
    _, i, j = best
    roles = np.full(n, "guard", dtype=object)
    train_levels = levels[:i]
    held_levels = levels[j:]
    roles[np.isin(pos, train_levels)] = "train"
    if len(held_levels):
        held_counts = per_level[j:]
        near, far = ("test", "validation") if test_first else ("validation", "test")
        share_val = fr[1] / (fr[1] + fr[2]) if fr[1] + fr[2] > 0 else 0.0
        want_near = (share_val if near == "validation" else 1 - share_val) * held_counts.sum()
        cum = np.concatenate([[0], np.cumsum(held_counts)])
        k = int(np.argmin(np.abs(cum - want_near)))
        roles[np.isin(pos, held_levels[:k])] = near
        roles[np.isin(pos, held_levels[k:])] = far
    return roles.tolist()


def held_out_sections(registry, dataset, *, guard_sections, depth, role="test"):
    """Whole sections of a dataset that may be scored as held out: the `role` side of the split,
    without any section nearer than `guard_sections` to a training tile.

    The split gives each role one contiguous z range of tiles; between the ranges, and beyond
    the outermost tiles, lie sections without tiles. A section belongs to the `role` side when
    its nearest tile (of any role but ``guard``) is a `role` tile, strictly: the side runs from
    the role's tiles to the midpoints of the gaps and out to the stack's first or last section.
    Scoring whole sections (3D objects) thus takes every section no other role is nearer to,
    and a slab of sections rather than only those the tiles lie on; with ``guard_sections`` 0 a
    training tile's own section is still left out.

    Parameters
    ----------
    registry : pandas.DataFrame
        A split registry (``dataset``, ``z``, ``role``), as :func:`split_tiles` returns it.
    dataset : str
    guard_sections : int
        The split's guard distance, in the registry's z grid.
    depth : int
        Sections of the dataset in the registry's z grid (the working level).
    role : str, optional
        ``"test"`` or ``"validation"``.

    Returns
    -------
    list of int
        Sections in the registry's z grid, ascending; empty when the dataset has no such tile.

    Examples
    --------
    >>> reg = pd.DataFrame({"dataset": "d", "z": [0, 1, 2, 4, 6, 7, 9],
    ...     "role": ["train", "train", "guard", "validation", "test", "test", "test"]})
    >>> held_out_sections(reg, "d", guard_sections=2, depth=12)
    [6, 7, 8, 9, 10, 11]
    """
    guard = as_int(guard_sections, low=0, where="guard_sections", source=None)
    depth = as_int(depth, low=1, where="depth", source=None)
    rows = registry[(registry["dataset"] == dataset) & (registry["role"] != "guard")]
    z = rows["z"].to_numpy(dtype=np.int64)
    roles = rows["role"].to_numpy(dtype=object)
    held, others = z[roles == role], z[roles != role]
    if held.size == 0:
        return []
    sections = np.arange(depth)

    def distance(sites):
        if sites.size == 0:
            return np.full(depth, np.iinfo(np.int64).max)
        return np.abs(sections[:, None] - sites[None, :]).min(axis=1)

    keep = distance(held) < distance(others)
    keep &= distance(z[roles == "train"]) >= max(guard, 1)
    return [int(v) for v in sections[keep]]
