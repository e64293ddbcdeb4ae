"""Training: one node at a time, or a whole cascade, on labelled tiles.

Training context is out-of-fold: the maps a node passes downstream for a training tile come
from a model fitted without that tile (stacked generalisation), so later nodes do not learn
from over-confident context.
"""

import hashlib
import multiprocessing
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass

import numpy as np

from tessera import __version__
from tessera.block_reduce import block_mean
from tessera.cascade.classifiers import make_classifier
from tessera.cascade.frame import (
    ensure_maps,
    make_frame,
    node_feature_names,
    node_map,
    node_rows,
    share_features,
)
from tessera.cascade.geometry import receptive_radius, z_halo
from tessera.cascade.orientations import ORIENTATIONS, orient_plane, orient_room
from tessera.cascade.spec import ancestors, node_settings, nodes
from tessera.cascade.store import MODEL_FORMAT, NodeModel
from tessera.errors import TesseraInputError
from tessera.label_values import IGNORE


def level_labels(labels, level, core_shape):
    """Majority labels of a core at `level` (ignore where no labelled pixel falls in a block)."""
    h, w = core_shape
    padded = np.full((h, w), IGNORE, dtype=np.uint8)
    padded[: labels.shape[0], : labels.shape[1]] = labels
    if level == 0:
        return padded
    f = 2**level
    valid = (padded != IGNORE).astype(np.float32)
    positive = (padded == 1).astype(np.float32)
    n_valid = block_mean(valid, (f, f))
    frac = np.divide(
        block_mean(positive, (f, f)), n_valid, out=np.zeros_like(n_valid), where=n_valid > 0
    )
    out = (frac >= 0.5).astype(np.uint8)
    out[n_valid == 0] = IGNORE
    return out


def _sample_rows(labels, count, rng):
    """Indices of up to `count` labelled pixels, half per class where possible."""
    flat = labels.ravel()
    chosen = []
    per_class = count // 2
    for cls in (0, 1):
        idx = np.flatnonzero(flat == cls)
        if idx.size > per_class:
            idx = rng.choice(idx, per_class, replace=False)
        chosen.append(idx)
    return np.sort(np.concatenate(chosen))


def _balanced_weights(y):
    n = y.size
    counts = np.bincount(y, minlength=2).astype(np.float64)
    w = n / (2.0 * np.maximum(counts, 1))
    return w[y].astype(np.float32)


def _tile_seed(spec, node, tile_id):
    digest = hashlib.sha256(f"{spec.seed}:{node}:{tile_id}".encode()).digest()
    return int.from_bytes(digest[:8], "little")


@dataclass
class TrainingTile:
    """A labelled tile ready for training: its frame, its labels (core) and its fold.

    A tile made by :func:`lazy_tile` reads its image and makes its frame on first use, and
    :meth:`release` drops them again: a training job then holds one tile's image window,
    features and maps at a time, not every tile's (in 3D a window holds tens of sections).
    """

    tile_id: str
    _frame: object
    labels: np.ndarray
    fold: int
    room: tuple = None
    _make: object = None

    @property
    def frame(self):
        if self._frame is None:
            self._frame = self._make()
        return self._frame

    def release(self):
        """Drop the frame (image, features, maps) of a tile that can make it again."""
        if self._make is not None:
            self._frame = None


def _checked(tile_id, labels, room):
    labels = np.asarray(labels)
    if labels.ndim != 2:
        raise TesseraInputError(f"tile {tile_id}: labels must be 2D, got shape {labels.shape}")
    return labels.astype(np.uint8), None if room is None else tuple(int(r) for r in room)


def prepare_tile(spec, tile_id, image, labels, *, fold, final=None, room=None):
    """A TrainingTile from a working-level image window (core + halo) and core labels 0/1/255.

    `image` holds the tile's section and ``z_halo(spec, final)`` sections on each side (see
    :func:`tessera.cascade.frame.make_frame`); the labels are those of the middle section.
    `room` (:func:`tessera.cascade.geometry.volume_room`) says where the volume ends around the
    tile: the maps are then mirrored beyond it, as prediction does.
    """
    labels, room = _checked(tile_id, labels, room)
    frame = make_frame(spec, image, labels.shape, final=final, room=room)
    return TrainingTile(tile_id, frame, labels, int(fold), room)


def lazy_tile(spec, tile_id, read_image, labels, *, fold, final=None, room=None):
    """:func:`prepare_tile` with the image read by ``read_image()`` when the frame is first
    used, and read again after :meth:`TrainingTile.release` (the same numbers each time)."""
    labels, room = _checked(tile_id, labels, room)

    def make():
        return make_frame(spec, read_image(), labels.shape, final=final, room=room)

    return TrainingTile(tile_id, None, labels, int(fold), room, make)


def _oriented_frame(spec, node, tile, orientation):
    """A frame of `tile` turned to `orientation`, for `node`, and its turned labels."""
    window = _node_window(spec, tile, node)
    labels = orient_plane(tile.labels, orientation)
    room = orient_room(tile.room, orientation)
    turned = make_frame(
        spec, orient_plane(window, orientation), labels.shape, final=node, room=room
    )
    return turned, labels


def _training_rows(spec, node, tiles, upstream):
    """Sampled feature rows of `node` over the tiles: (X, labels y, fold of each row g).

    With ``spec.orientations`` > 1 every tile also gives rows of its turned copies (each with
    its own image features and earlier maps), ``samples_per_tile`` shared among them.
    """
    level = node[1]
    per_orientation = max(1, spec.samples_per_tile // spec.orientations)
    rows, ys, groups = [], [], []
    for tile in tiles:
        for k, orientation in enumerate(ORIENTATIONS[: spec.orientations]):
            if k == 0:
                frame, tile_labels, name = tile.frame, tile.labels, tile.tile_id
            else:
                frame, tile_labels = _oriented_frame(spec, node, tile, orientation)
                name = f"{tile.tile_id}:orientation{k}"
            labels = level_labels(tile_labels, level, frame.core_shape)
            pick = _sample_rows(
                labels,
                per_orientation,
                np.random.default_rng(_tile_seed(spec, node, name)),
            )
            if pick.size:
                ensure_maps(frame, node, upstream, tile.fold)
                rows.append(node_rows(frame, node, 0, pick))
                ys.append(labels.ravel()[pick])
                groups.append(np.full(pick.size, tile.fold))
            del frame
        tile.release()  # its rows are taken: a lazy tile's window and maps are not needed again
    X = np.concatenate(rows)
    y = np.concatenate(ys).astype(np.uint8)
    g = np.concatenate(groups)
    return X, y, g


def train_node(spec, stage, level, tiles, upstream, *, target="target", threads=1):
    """Fit one (stage, level) node on training tiles.

    Parameters
    ----------
    spec : CascadeSpec
    stage, level : int
    tiles : list of TrainingTile
        Every tile has a fold in ``0 .. spec.folds - 1``; frames must have been made with a halo
        of at least ``receptive_radius(spec, (stage, level))``.
    upstream : dict
        ``{node: NodeModel}`` for every ancestor of the node (maps already cached in the frames
        are reused).
    target : str
        Recorded in the metadata and checked when the model is loaded.
    threads : int
        Processes that fit the node's fold and full models side by side
        (:func:`fit_classifiers`); the models do not depend on it.

    Returns
    -------
    NodeModel
    """
    node = (stage, level)
    if not tiles:
        raise TesseraInputError(f"target {target}: no training tiles")
    folds_present = sorted({t.fold for t in tiles})
    if folds_present != list(range(spec.folds)):
        raise TesseraInputError(
            f"target {target}: {len(tiles)} training tile(s) fall into folds {folds_present}; out-of-fold "
            f"context needs tiles in each of the {spec.folds} folds (add tiles or lower folds)"
        )
    missing = [a for a in ancestors(spec, node)[:-1] if a not in upstream]
    if missing:
        raise TesseraInputError(f"target {target}: node {node} needs the models of {missing} first")
    X, y, g = _training_rows(spec, node, tiles, upstream)
    if np.unique(y).size < 2:
        raise TesseraInputError(
            f"target {target}: training tiles hold only class {int(y[0])} at level {level}; annotate both target and background"
        )

    for k in range(spec.folds):
        if np.unique(y[g != k]).size < 2:
            others = [t.tile_id for t in tiles if t.fold != k]
            raise TesseraInputError(
                f"target {target}: without fold {k} the training pixels hold one class only "
                f"(class {int(y[g != k][0])} in tiles {', '.join(others[:6])}"
                f"{' …' if len(others) > 6 else ''}); out-of-fold context needs both classes "
                "outside every fold: raise tiles.per_dataset, or tiles.min_target_fraction for "
                "label volumes, annotate tiles holding the target in more sections, or lower "
                "cascade.folds"
            )
    seed = spec.seed + 7919 * stage + 104729 * level
    # the fold models (each without one fold's tiles) and the full model, in that order
    *folds, full = fit_classifiers(
        spec, X, y, [g != k for k in range(spec.folds)] + [None], seed=seed, workers=threads
    )
    meta = {
        "format": MODEL_FORMAT,
        "tessera_version": __version__,
        "target": target,
        "spec": node_settings(spec),
        "stage": stage,
        "level": level,
        "features": node_feature_names(spec, stage, level),
        "classes": [0, 1],
        "training_tiles": sorted(t.tile_id for t in tiles),
        "training_pixels": int(y.size),
        "positive_fraction": float(y.mean()),
    }
    return NodeModel(spec, stage, level, full, folds, meta)


def _fit_one(spec, X, y, rows, seed):
    if rows is not None:
        X, y = X[rows], y[rows]
    clf = make_classifier(spec.classifier, seed=seed, threads=1, **spec.classifier_options)
    return clf.fit(X, y, sample_weight=_balanced_weights(y))


def fit_classifiers(spec, X, y, subsets, *, seed, workers=1):
    """One classifier of `spec` per subset of the rows (a boolean mask, or None for all), all
    with `seed`; fitted side by side in `workers` processes.

    Each fit runs on one thread whatever `workers` is, so a model does not depend on how many
    cores trained it (multithreaded matrix products may round differently). Small networks
    spend most of their fitting time in the interpreter, not in matrix products, so separate
    processes, not threads, are what makes fits run side by side.
    """
    workers = max(1, min(int(workers), len(subsets)))
    if workers == 1:
        return [_fit_one(spec, X, y, rows, seed) for rows in subsets]
    # fork shares X with the workers without copying it; elsewhere they receive a copy
    method = "fork" if "fork" in multiprocessing.get_all_start_methods() else "spawn"
    with ProcessPoolExecutor(workers, mp_context=multiprocessing.get_context(method)) as pool:
        futures = [pool.submit(_fit_one, spec, X, y, rows, seed) for rows in subsets]
        return [f.result() for f in futures]


def fit_cascade(spec, tiles, *, target="target", threads=1):
    """Train every node in order; return ``{node: NodeModel}``.

    `tiles` are TrainingTiles made with the full receptive radius (``final=None``). Each node is
    trained on the tiles cut to its own receptive radius (:func:`node_tile`), as a job that
    trains that node alone sees them, so every model equals the one such a job makes and does
    not depend on the stages after it.
    """
    models = {}
    for node in nodes(spec):
        node_tiles = [node_tile(spec, tile, node) for tile in tiles]
        models[node] = train_node(spec, *node, node_tiles, models, target=target, threads=threads)
    return models


def _node_window(spec, tile, node):
    """The image window of `tile` cut to the receptive radius and z halo of `node`."""
    frame = tile.frame
    halo = receptive_radius(spec, node)
    cut = frame.halo - halo
    z_cut = frame.z_halo - z_halo(spec, node)
    if cut < 0 or z_cut < 0:
        raise TesseraInputError(
            f"tile {tile.tile_id}: its image has a halo of {frame.halo} px and {frame.z_halo} "
            f"section(s); node {node} needs {halo} px and {z_halo(spec, node)}"
        )
    h, w = tile.labels.shape
    sections = slice(z_cut, frame.stack.shape[0] - z_cut)
    # the frame's image is the tile's window as given; the core's extension to multiples of 2^L
    # was appended after it, so the window is its first rows and columns
    return frame.stack[sections, cut : cut + h + 2 * halo, cut : cut + w + 2 * halo]


def node_tile(spec, tile, node):
    """`tile` with its image cut to the receptive radius and z halo of `node` (a new frame, maps
    not cached).

    The maps of earlier nodes are computed over the margins `node` reads, not over the wider
    ones later nodes of the cascade read. That matters beyond geometry: a classifier's output for
    a pixel can differ in the last bit with the number of rows predicted at once (BLAS matrix
    products round rows at the edge of their blocking differently), so a map computed over a
    wider region is not always bit for bit the crop of a narrower one.
    """
    image = _node_window(spec, tile, node)
    out = prepare_tile(
        spec, tile.tile_id, image, tile.labels, fold=tile.fold, final=node, room=tile.room
    )
    # image features do not depend on the region they are computed over: crop the tile's own
    # (computed once for all the nodes of a cascade) instead of filtering again per node
    share_features(tile.frame, out.frame)
    return out


def out_of_fold_maps(models, tiles):
    """Final maps of training tiles, each from the fold models that did not see the tile."""
    spec = next(iter(models.values())).spec
    final = (spec.stages, 0)
    out = {}
    for tile in tiles:
        ensure_maps(tile.frame, final, models, tile.fold)
        # banded (:func:`node_map`): the same numbers as predicting the whole feature matrix
        prob = node_map(tile.frame, final, 0, models[final].for_tile(tile.fold))
        out[tile.tile_id] = prob[: tile.labels.shape[0], : tile.labels.shape[1]]
    return out
