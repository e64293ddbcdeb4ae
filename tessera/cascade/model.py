"""The cascaded hierarchical model: S stages × L levels of pixel classifiers.

Seyedhosseini, Sajjadi & Tasdizen, "Image segmentation with cascaded hierarchical models and
logistic disjunctive normal networks", ICCV 2013; Seyedhosseini & Tasdizen, TPAMI 2016; built on
auto-context (Tu & Bai, TPAMI 2010). In this implementation, for every stage s = 1..S:

* levels l = 1..L (bottom-up): the working image is block-averaged by 2^l; the level's classifier
  sees that level's image features plus, as context, the output of level l − 1 pooled down
  (from l = 2 on) and the previous stage's final output pooled down (from s = 2 on);
* level 0 (top-down, full resolution): the classifier sees the image features plus the output
  of every level of this stage brought back to full resolution, and the previous stage's final
  output;
* context maps are read at a sparse stencil: the centre plus 8 directions at each radius, in
  the pixels of the map's own level, so coarse maps give cheap evidence from far away.

With L = 0 a stage is a single full-resolution classifier (plain pixel classification for
S = 1, auto-context for S > 1). Every (stage, level) pair is one *node*, trained on its own, so
a workflow can make each node one job and adding a stage trains only the new nodes.

Training context is out-of-fold: the maps a node passes downstream for a training tile come
from a model fitted without that tile (stacked generalisation), so later nodes do not learn
from over-confident context.

Geometry. Work happens on *frames*: a core region (a training tile, or a block to predict)
plus a halo of :func:`receptive_radius` pixels, mirrored beyond the volume. Each node computes
its map only over the core plus the margin its consumers read. Because the result at a core
pixel depends on nothing outside the halo, prediction block by block equals prediction of the
whole image, provided block origins are multiples of ``2**L``.
"""

import hashlib
import io
import json
import math
import zipfile
from dataclasses import asdict, dataclass, field

import numpy as np
from scipy import ndimage

from tessera import __version__
from tessera.cascade.classifiers import CHUNK_ROWS, KINDS, classifier_from_state, make_classifier
from tessera.cascade.features import (
    DEFAULT_SIGMAS,
    feature_names,
    feature_radius,
    filter_bank,
    neighbour_feature_names,
    neighbour_features,
)
from tessera.errors import TesseraInputError
from tessera.io.atomic import atomic_path
from tessera.label_values import IGNORE
from tessera.pyramid import block_mean

MODEL_FORMAT = 2  # 2: the payload's SHA-256 is recorded in the metadata


@dataclass(frozen=True)
class CascadeSpec:
    """Everything that defines a cascade's structure and training.

    Parameters
    ----------
    stages, levels : int
        S ≥ 1 and L ≥ 0.
    sigmas : tuple of float
        Filter-bank scales at full resolution (pixels of the working level).
    coarse_sigmas : tuple of float
        Scales at levels ≥ 1 (pixels of that level; the level itself supplies the larger scale).
    stencil_radii : tuple of int
        Radii of the context stencil, in pixels of each map's level.
    pooling : {'mean', 'max'}
        How probability maps are reduced to coarser levels.
    classifier : str
        One of ``KINDS``.
    classifier_options : dict
        Passed to the classifier.
    folds : int
        Folds for out-of-fold context (≥ 2).
    samples_per_tile : int
        Training pixels drawn per tile and node, half per class where possible.
    neighbours : int
        Sections on each side whose intensity (smoothed, LoG) joins the image features; useful
        for anisotropic stacks where organelles continue from section to section.
    seed : int
        Makes sampling, folds and classifiers deterministic.
    """

    stages: int = 2
    levels: int = 2
    sigmas: tuple = DEFAULT_SIGMAS
    coarse_sigmas: tuple = (0.7, 1.6, 3.5)
    stencil_radii: tuple = (1, 2, 4, 8)
    pooling: str = "mean"
    classifier: str = "mlp"
    classifier_options: dict = field(default_factory=dict)
    folds: int = 3
    samples_per_tile: int = 4000
    neighbours: int = 0
    seed: int = 0

    def __post_init__(self):
        def fail(msg):
            raise TesseraInputError(f"cascade settings: {msg}")

        if not isinstance(self.stages, int) or self.stages < 1:
            fail(f"stages must be an integer >= 1, got {self.stages!r}")
        if not isinstance(self.levels, int) or not 0 <= self.levels <= 6:
            fail(f"levels must be an integer from 0 to 6, got {self.levels!r}")
        if self.pooling not in ("mean", "max"):
            fail(f"pooling must be 'mean' or 'max', got {self.pooling!r}")
        if self.classifier not in KINDS:
            fail(f"classifier must be one of {', '.join(KINDS)}, got {self.classifier!r}")
        if not isinstance(self.folds, int) or self.folds < 2:
            fail(f"folds must be an integer >= 2, got {self.folds!r}")
        if not isinstance(self.samples_per_tile, int) or self.samples_per_tile < 10:
            fail(f"samples_per_tile must be an integer >= 10, got {self.samples_per_tile!r}")
        if not isinstance(self.neighbours, int) or not 0 <= self.neighbours <= 4:
            fail(f"neighbours must be an integer from 0 to 4, got {self.neighbours!r}")
        radii = tuple(self.stencil_radii)
        if not radii or any(not isinstance(r, int) or r < 1 for r in radii):
            fail(f"stencil_radii must be positive integers, got {self.stencil_radii!r}")
        object.__setattr__(self, "stencil_radii", radii)
        object.__setattr__(self, "sigmas", tuple(float(s) for s in self.sigmas))
        object.__setattr__(self, "coarse_sigmas", tuple(float(s) for s in self.coarse_sigmas))
        object.__setattr__(self, "classifier_options", dict(self.classifier_options))
        feature_radius(self.sigmas)  # validates the scales
        feature_radius(self.coarse_sigmas)

    def to_dict(self):
        out = asdict(self)
        out["sigmas"] = list(self.sigmas)
        out["coarse_sigmas"] = list(self.coarse_sigmas)
        out["stencil_radii"] = list(self.stencil_radii)
        return out

    @classmethod
    def from_dict(cls, data):
        data = dict(data)
        for key in ("sigmas", "coarse_sigmas", "stencil_radii"):
            if key in data:
                data[key] = tuple(data[key])
        try:
            return cls(**data)
        except TypeError as exc:
            raise TesseraInputError(f"cascade settings: {exc}") from None

    @property
    def align(self):
        """Block origins and halos are multiples of this (2^L)."""
        return 2**self.levels


# ----------------------------------------------------------------------------------------------
# the graph of nodes


def nodes(spec):
    """All (stage, level) nodes in an order where every node comes after its inputs.

    Examples
    --------
    >>> nodes(CascadeSpec(stages=2, levels=2))
    [(1, 1), (1, 2), (1, 0), (2, 1), (2, 2), (2, 0)]
    """
    order = []
    for s in range(1, spec.stages + 1):
        order += [(s, level) for level in range(1, spec.levels + 1)]
        order.append((s, 0))
    return order


def node_inputs(spec, stage, level):
    """The nodes whose output the node (stage, level) reads as context.

    Examples
    --------
    >>> node_inputs(CascadeSpec(stages=2, levels=2), 2, 0)
    [(2, 1), (2, 2), (1, 0)]
    """
    if (stage, level) not in nodes(spec):
        raise TesseraInputError(
            f"no node (stage {stage}, level {level}) in a {spec.stages} x {spec.levels} cascade"
        )
    inputs = []
    if level >= 2:
        inputs.append((stage, level - 1))
    if level == 0:
        inputs += [(stage, k) for k in range(1, spec.levels + 1)]
    if stage >= 2:
        inputs.append((stage - 1, 0))
    return inputs


def _sigmas(spec, level):
    return spec.sigmas if level == 0 else spec.coarse_sigmas


def _read_reach(spec, consumer_level, producer_level):
    """Level-0 pixels beyond a consumer pixel at which it reads a producer's map."""
    r = max(spec.stencil_radii)
    top = max(consumer_level, producer_level)
    # stencil at the coarser of the two levels, plus one block for pooling / upsampling phase
    return (2**top) * (r + 1)


def _round_up(value, step):
    return int(math.ceil(value / step) * step)


def ancestors(spec, node):
    """`node` and every node it depends on, in training order.

    Examples
    --------
    >>> ancestors(CascadeSpec(stages=3, levels=1), (2, 0))
    [(1, 1), (1, 0), (2, 1), (2, 0)]
    """
    needed, todo = set(), [node]
    while todo:
        n = todo.pop()
        if n not in needed:
            needed.add(n)
            todo.extend(node_inputs(spec, *n))
    return [n for n in nodes(spec) if n in needed]


def smoothing_reach(output_sigma):
    """Pixels the Gaussian smoothing of the final map reaches (scipy's kernel, truncate 4).

    Examples
    --------
    >>> smoothing_reach(0), smoothing_reach(2.0)
    (0, 8)
    """
    if not (isinstance(output_sigma, (int, float)) and 0 <= output_sigma <= 32):
        raise TesseraInputError(
            f"output smoothing sigma must be from 0 to 32 px, got {output_sigma!r}"
        )
    return int(4.0 * output_sigma + 0.5) if output_sigma > 0 else 0


def margins(spec, final=None, *, output_sigma=0.0):
    """Level-0 margin around the core over which each node's map must be computed.

    Only the ancestors of `final` (default: the last node) are included; `final` itself needs
    a margin only for the smoothing of the output (`output_sigma`, px).
    """
    final = final or (spec.stages, 0)
    order = ancestors(spec, final)
    out = {n: 0 for n in order}
    out[final] = _round_up(smoothing_reach(output_sigma), spec.align)
    for consumer in reversed(order):
        for producer in node_inputs(spec, *consumer):
            need = out[consumer] + _read_reach(spec, consumer[1], producer[1])
            out[producer] = max(out[producer], _round_up(need, spec.align))
    return out


def _feature_halo(spec, level):
    """Level-l pixels of image around a region that its features depend on."""
    return feature_radius(_sigmas(spec, level)) + 1


def receptive_radius(spec, final=None, *, output_sigma=0.0):
    """Halo (level-0 pixels, a multiple of 2^L) that makes the core independent of anything beyond.

    `output_sigma` > 0 adds the reach of the Gaussian smoothing of the final map.

    Examples
    --------
    >>> r = receptive_radius(CascadeSpec(stages=1, levels=0, sigmas=(1.0,)))
    >>> r == feature_radius((1.0,)) + 2  # one pixel spare for the level grid
    True
    """
    m = margins(spec, final, output_sigma=output_sigma)
    radius = max(m[n] + (2 ** n[1]) * (_feature_halo(spec, n[1]) + 1) for n in m)
    return _round_up(radius, spec.align)


# ----------------------------------------------------------------------------------------------
# maps over regions


def mirrored_window(array, z, y0, y1, x0, x1):
    """Section `z` of a (Z, Y, X) array over rows y0:y1 and columns x0:x1, mirrored beyond edges.

    Indices outside the volume are reflected (half-sample symmetric, repeated as often as
    needed), so a window far larger than the volume is still defined. Reads only the needed
    bounding box of the array (zarr or numpy).

    Examples
    --------
    >>> a = np.arange(4).reshape(1, 1, 4)
    >>> mirrored_window(a, 0, 0, 1, -3, 7)
    array([[2, 1, 0, 0, 1, 2, 3, 3, 2, 1]])
    """

    def reflect(start, stop, n):
        idx = np.arange(start, stop) % (2 * n)
        return np.where(idx < n, idx, 2 * n - 1 - idx)

    ny, nx = array.shape[1], array.shape[2]
    iy, ix = reflect(y0, y1, ny), reflect(x0, x1, nx)
    block = np.asarray(array[z, iy.min() : iy.max() + 1, ix.min() : ix.max() + 1])
    return block[np.ix_(iy - iy.min(), ix - ix.min())]


def mirrored_stack(array, z, neighbours, y0, y1, x0, x1):
    """Sections z - neighbours .. z + neighbours of a (Z, Y, X) array, mirrored beyond every edge.

    Returns a (2 neighbours + 1, y1 - y0, x1 - x0) array (see :func:`mirrored_window`).
    """
    nz = array.shape[0]
    zs = np.arange(z - neighbours, z + neighbours + 1) % (2 * nz)
    zs = np.where(zs < nz, zs, 2 * nz - 1 - zs)
    return np.stack([mirrored_window(array, int(k), y0, y1, x0, x1) for k in zs])


def _pool(prob, factor, how):
    if factor == 1:
        return prob
    if how == "mean":
        return block_mean(prob, (factor, factor))
    h, w = prob.shape
    ph, pw = -(-h // factor) * factor, -(-w // factor) * factor
    padded = np.pad(prob, ((0, ph - h), (0, pw - w)), mode="edge")
    return padded.reshape(ph // factor, factor, pw // factor, factor).max(axis=(1, 3))


class _Frame:
    """One core region with its mirrored halo; caches image levels and per-node maps.

    Coordinates: a map of node n at level l covers level-0 offsets [-margin(n), core + margin(n))
    around the core, at level-l resolution (all offsets are multiples of 2^L).
    """

    def __init__(self, spec, image, core_shape, halo, margin_table):
        self.spec, self.halo = spec, halo
        self.core_shape = core_shape  # multiples of 2^L
        self.margins = margin_table
        image = np.asarray(image, dtype=np.float32)
        # (2k + 1, H, W): the section and k neighbours on each side; the centre is index k
        self._levels = {0: image if image.ndim == 3 else image[np.newaxis]}
        self._features = {}
        self.maps = {}

    def image(self, level):
        if level not in self._levels:
            self._levels[level] = block_mean(self._levels[0], (1, 2**level, 2**level))
        return self._levels[level]

    def region(self, level, margin):
        """Slice of a level-l array covering the core plus `margin` (level-0 px) of a frame-sized map."""
        f = 2**level
        start = (self.halo - margin) // f
        h, w = self.core_shape
        return (
            slice(start, start + (h + 2 * margin) // f),
            slice(start, start + (w + 2 * margin) // f),
        )

    def features(self, level, margin):
        """Image features of `level` over the core + `margin`; computed once per level.

        The first call computes them over the widest region any node of this frame reads at
        that level, later calls crop; stages reuse the image features of the first.
        """
        if level not in self._features:
            widest = max([0] + [m for (s, l), m in self.margins.items() if l == level])
            extra = _feature_halo(self.spec, level)
            rows, cols = self.region(level, widest)
            # receptive_radius guarantees rows.start - extra >= 0: the window lies inside the frame
            stack = self.image(level)[
                :, rows.start - extra : rows.stop + extra, cols.start - extra : cols.stop + extra
            ]
            centre = stack.shape[0] // 2
            sigmas = _sigmas(self.spec, level)
            parts = [filter_bank(stack[centre], sigmas=sigmas, mirror_edges=False)]
            parts += [
                neighbour_features(stack[k], sigmas=sigmas)
                for k in range(stack.shape[0])
                if k != centre
            ]
            feats = np.concatenate(parts, axis=-1) if len(parts) > 1 else parts[0]
            self._features[level] = (feats[extra:-extra, extra:-extra], widest)
        feats, widest = self._features[level]
        trim = (widest - margin) // (2**level)
        return feats[trim : feats.shape[0] - trim, trim : feats.shape[1] - trim] if trim else feats

    def context_maps(self, consumer, margin):
        """Every input map of `consumer` at the consumer's level, with its stencil's offset scale.

        Each map covers the consumer's core + margin plus the stencil's reach (level-l pixels
        `cut` on each side). A finer map is pooled down; a coarser one is repeated up (nearest)
        and its stencil offsets are scaled by the factor, which equals reading the stencil at the
        coarse level and upsampling the samples.
        """
        spec = self.spec
        level = consumer[1]
        out = []
        for producer in node_inputs(spec, *consumer):
            prob, p_margin = self.maps[producer]
            p_level = producer[1]
            reach = _read_reach(spec, level, p_level)
            trim = (p_margin - (margin + reach)) // (2**p_level)
            src = prob[trim : prob.shape[0] - trim, trim : prob.shape[1] - trim] if trim else prob
            if p_level <= level:
                out.append(
                    (_pool(src, 2 ** (level - p_level), spec.pooling), 1, reach // (2**level))
                )
            else:
                factor = 2 ** (p_level - level)
                out.append(
                    (
                        np.repeat(np.repeat(src, factor, axis=0), factor, axis=1),
                        factor,
                        reach // (2**level),
                    )
                )
        return out


def _stencil_offsets(radii):
    offsets = [(0, 0)]
    for k in radii:
        offsets += [(-k, 0), (k, 0), (0, -k), (0, k), (-k, -k), (-k, k), (k, -k), (k, k)]
    return offsets


def _node_matrix(frame, node, margin):
    """(H, W, C) float32 features of `node` over the core + margin: image features, then the
    stencil samples of every context map, written straight into one array."""
    feats = frame.features(node[1], margin)
    maps = frame.context_maps(node, margin)
    offsets = _stencil_offsets(frame.spec.stencil_radii)
    h, w, c = feats.shape
    out = np.empty((h, w, c + len(maps) * len(offsets)), dtype=np.float32)
    out[..., :c] = feats
    channel = c
    for prob, scale, cut in maps:
        # `cut` >= the widest offset, so every sample lies inside the map: no padding needed
        for dy, dx in offsets:
            y0, x0 = cut + dy * scale, cut + dx * scale
            out[..., channel] = prob[y0 : y0 + h, x0 : x0 + w]
            channel += 1
    return out


def node_feature_names(spec, stage, level):
    """Names of the columns a node's classifier sees, in order."""
    sigmas = _sigmas(spec, level)
    image_names = feature_names(sigmas)
    for offset in [o for o in range(-spec.neighbours, spec.neighbours + 1) if o]:
        image_names += neighbour_feature_names(sigmas, offset=offset)
    names = [f"L{level}:{n}" for n in image_names]
    offsets = ["c"] + [
        f"r{k}{d}" for k in spec.stencil_radii for d in ("n", "s", "w", "e", "nw", "ne", "sw", "se")
    ]
    for producer in node_inputs(spec, stage, level):
        names += [f"ctx(s{producer[0]},l{producer[1]}):{o}" for o in offsets]
    return names


# ----------------------------------------------------------------------------------------------
# tiles and labels


def _core_shape(spec, shape):
    return tuple(_round_up(n, spec.align) for n in shape)


def make_frame(spec, image, core_shape, *, final=None, output_sigma=0.0):
    """A frame for a core of `core_shape` whose `image` carries the halo of ``receptive_radius``.

    The core is extended by mirroring to multiples of 2^L (labels there are ignored).
    """
    halo = receptive_radius(spec, final, output_sigma=output_sigma)
    image = np.asarray(image, dtype=np.float32)
    if image.ndim == 2:
        image = image[np.newaxis]
    expected = (2 * spec.neighbours + 1, *(c + 2 * halo for c in core_shape))
    if image.shape != expected:
        raise TesseraInputError(
            f"image must have shape {expected} (sections z-{spec.neighbours}..z+{spec.neighbours}, "
            f"core {core_shape} + halo {halo}), got {image.shape}"
        )
    padded_core = _core_shape(spec, core_shape)
    extra = [p - c for p, c in zip(padded_core, core_shape)]
    if any(extra):
        image = np.pad(image, [(0, 0)] + [(0, e) for e in extra], mode="symmetric")
    return _Frame(spec, image, padded_core, halo, margins(spec, final, output_sigma=output_sigma))


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


# ----------------------------------------------------------------------------------------------
# training and prediction of one node


@dataclass
class NodeModel:
    """A trained node: the classifier fitted on all training tiles, one per fold, and metadata.

    The fold classifiers give the out-of-fold context of training tiles to later nodes (each
    training tile is predicted by the fold model that did not see it); the full classifier is
    used for everything else.
    """

    spec: CascadeSpec
    stage: int
    level: int
    classifier: object
    fold_classifiers: list
    meta: dict

    @property
    def node(self):
        return (self.stage, self.level)

    def for_tile(self, fold):
        return self.fold_classifiers[fold] if fold >= 0 else self.classifier


def _tile_seed(spec, node, tile_id):
    digest = hashlib.sha256(f"{spec.seed}:{node}:{tile_id}".encode()).digest()
    return int.from_bytes(digest[:8], "little")


def _ensure_maps(frame, node, models, fold):
    """Compute (and cache in the frame) the maps of every ancestor of `node`, not `node` itself."""
    for a in ancestors(frame.spec, node)[:-1]:
        if a not in frame.maps:
            x = _node_matrix(frame, a, frame.margins[a])
            clf = models[a].for_tile(fold)
            frame.maps[a] = (
                clf.predict(x.reshape(-1, x.shape[-1])).reshape(x.shape[:2]),
                frame.margins[a],
            )


@dataclass
class TrainingTile:
    """A labelled tile ready for training: its frame, its labels (core) and its fold."""

    tile_id: str
    frame: object
    labels: np.ndarray
    fold: int


def prepare_tile(spec, tile_id, image, labels, *, fold, final=None):
    """A TrainingTile from a working-level image window (core + halo) and core labels 0/1/255."""
    labels = np.asarray(labels)
    if labels.ndim != 2:
        raise TesseraInputError(f"tile {tile_id}: labels must be 2D, got shape {labels.shape}")
    return TrainingTile(
        tile_id,
        make_frame(spec, image, labels.shape, final=final),
        labels.astype(np.uint8),
        int(fold),
    )


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
        Passed to the classifiers.

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
    rows, ys, groups = [], [], []
    for tile in tiles:
        frame = tile.frame
        _ensure_maps(frame, node, upstream, tile.fold)
        labels = level_labels(tile.labels, level, frame.core_shape)
        pick = _sample_rows(
            labels,
            spec.samples_per_tile,
            np.random.default_rng(_tile_seed(spec, node, tile.tile_id)),
        )
        if pick.size == 0:
            continue
        x = _node_matrix(frame, node, 0)
        rows.append(x.reshape(-1, x.shape[-1])[pick])
        ys.append(labels.ravel()[pick])
        groups.append(np.full(pick.size, tile.fold))
    X = np.concatenate(rows)
    y = np.concatenate(ys).astype(np.uint8)
    g = np.concatenate(groups)
    if np.unique(y).size < 2:
        raise TesseraInputError(
            f"target {target}: training tiles hold only class {int(y[0])} at level {level}; annotate both target and background"
        )

    def fit(mask):
        seed = spec.seed + 7919 * stage + 104729 * level
        clf = make_classifier(
            spec.classifier, seed=seed, threads=threads, **spec.classifier_options
        )
        return clf.fit(X[mask], y[mask], sample_weight=_balanced_weights(y[mask]))

    folds = []
    for k in range(spec.folds):
        held = g == k
        if np.unique(y[~held]).size < 2:
            raise TesseraInputError(
                f"target {target}: without fold {k} the training pixels hold one class only"
            )
        folds.append(fit(~held))
    full = fit(np.ones(y.size, dtype=bool))
    meta = {
        "format": MODEL_FORMAT,
        "tessera_version": __version__,
        "target": target,
        "spec": _node_spec_dict(spec),
        "stage": stage,
        "level": level,
        "features": node_feature_names(spec, stage, level),
        "classes": [0, 1],
        "training_tiles": sorted(t.tile_id for t in tiles),
        "training_pixels": int(y.size),
        "positive_fraction": float(y.mean()),
    }
    return NodeModel(spec, stage, level, full, folds, meta)


def _node_spec_dict(spec):
    # A node does not depend on how many stages follow it: leave `stages` out, so raising the
    # number of stages keeps the earlier nodes valid.
    out = spec.to_dict()
    out.pop("stages")
    return out


# ----------------------------------------------------------------------------------------------
# whole cascades


def fit_cascade(spec, tiles, *, target="target", threads=1):
    """Train every node in order; return ``{node: NodeModel}``.

    `tiles` are TrainingTiles made with the full receptive radius (``final=None``); maps of
    earlier nodes are cached in their frames and reused by later ones.
    """
    models = {}
    for node in nodes(spec):
        models[node] = train_node(spec, *node, tiles, models, target=target, threads=threads)
    return models


def out_of_fold_maps(models, tiles):
    """Final maps of training tiles, each from the fold models that did not see the tile."""
    spec = next(iter(models.values())).spec
    final = (spec.stages, 0)
    out = {}
    for tile in tiles:
        _ensure_maps(tile.frame, final, models, tile.fold)
        x = _node_matrix(tile.frame, final, 0)
        prob = (
            models[final]
            .for_tile(tile.fold)
            .predict(x.reshape(-1, x.shape[-1]))
            .reshape(x.shape[:2])
        )
        out[tile.tile_id] = prob[: tile.labels.shape[0], : tile.labels.shape[1]]
    return out


def cascade_spec(models):
    """The spec of a complete set of node models (stages = the last stage present)."""
    stages = max(s for s, _ in models)
    spec = next(iter(models.values())).spec
    spec = CascadeSpec.from_dict({**_node_spec_dict(spec), "stages": stages})
    missing = [n for n in nodes(spec) if n not in models]
    if missing:
        raise TesseraInputError(f"the cascade lacks the models of nodes {missing}")
    return spec


def predict_frame(models, image, core_shape, *, output_sigma=0.0):
    """Final probability (float32) of the core of one block (core + ``receptive_radius`` halo).

    This is the block-prediction function: read a block of the working level with a halo of
    ``receptive_radius(spec, output_sigma=output_sigma)`` pixels (mirrored beyond the volume),
    and keep the returned core. Block origins must be multiples of ``2**levels`` for results to
    equal whole-image prediction.

    Parameters
    ----------
    output_sigma : float
        Gaussian σ (px) applied to the final map. Isolated specks and pinholes of pixel-wise
        classification are mostly noise, and neighbouring pixels of an organelle agree; a light
        smoothing of the output raised test F1 on real ssTEM (see the README). The models do not
        depend on it.
    """
    spec = cascade_spec(models)
    frame = make_frame(spec, image, tuple(core_shape), output_sigma=output_sigma)
    final = (spec.stages, 0)
    _ensure_maps(frame, final, models, -1)
    margin = frame.margins[final]
    x = _node_matrix(frame, final, margin)
    prob = models[final].classifier.predict(x.reshape(-1, x.shape[-1])).reshape(x.shape[:2])
    if output_sigma > 0:
        # the map covers core + margin >= the kernel's reach: every core pixel sees real values
        prob = ndimage.gaussian_filter(prob, output_sigma, mode="reflect", truncate=4.0)
    return prob[margin : margin + core_shape[0], margin : margin + core_shape[1]]


def predict_section(models, volume, z=None, *, output_sigma=0.0):
    """Probability map of one whole section (mirrored edges), in one piece.

    `volume` is a 2D section, or a (Z, Y, X) array with `z` the section (needed when the
    cascade reads neighbouring sections).
    """
    spec = cascade_spec(models)
    halo = receptive_radius(spec, output_sigma=output_sigma)
    volume = np.asarray(volume)
    if volume.ndim == 2:
        volume, z = volume[np.newaxis], 0
    h, w = volume.shape[1:]
    image = mirrored_stack(volume, z, spec.neighbours, -halo, h + halo, -halo, w + halo)
    return predict_frame(models, image, (h, w), output_sigma=output_sigma)


# Per-row working memory of a classifier on one chunk of rows beyond the rows themselves: the
# finite check (1 byte per feature) plus hidden layers or per-tree descent state (float32/int64).
_CLASSIFIER_ROW_BYTES = 256


def _image_channels(spec, level):
    sigmas = _sigmas(spec, level)
    return len(feature_names(sigmas)) + 2 * spec.neighbours * (1 + 2 * len(sigmas))


def frame_memory_bytes(spec, core_shape, *, output_sigma=0.0):
    """Peak bytes :func:`predict_frame` allocates for one core of `core_shape` (y, x).

    Follows the frame's geometry: the image levels (with neighbouring sections), every level's
    cached image features over the widest margin its nodes read, every node's map, and the
    larger of the filter bank's temporaries and the biggest node's feature matrix with its
    context maps and one classifier chunk. Everything is float32.

    Examples
    --------
    >>> spec = CascadeSpec(stages=1, levels=0, sigmas=(1.0,))
    >>> frame_memory_bytes(spec, (64, 64)) > 4 * (64 + 2 * receptive_radius(spec)) ** 2 * len(feature_names((1.0,)))
    True
    """
    halo = receptive_radius(spec, output_sigma=output_sigma)
    cy, cx = _core_shape(spec, core_shape)
    margin = margins(spec, output_sigma=output_sigma)
    image = (
        (2 * spec.neighbours + 1) * (cy + 2 * halo) * (cx + 2 * halo) * 4 * 4 / 3
    )  # + coarser levels
    cached = filters = 0
    for level in range(spec.levels + 1):
        f = 2**level
        widest = max([0] + [m for (_, lv), m in margin.items() if lv == level])
        extra = _feature_halo(spec, level)
        pixels = ((cy + 2 * widest) // f + 2 * extra) * ((cx + 2 * widest) // f + 2 * extra)
        channels = _image_channels(spec, level)
        cached += 4 * pixels * channels
        # smoothed images of every scale plus derivatives in flight; with neighbours, the parts
        # are concatenated (one more copy of the channels)
        temporaries = len(_sigmas(spec, level)) + 8 + (channels if spec.neighbours else 0)
        filters = max(filters, 4 * pixels * temporaries)

    def rows(node, extra_margin=0):
        f = 2 ** node[1]
        return ((cy + 2 * (margin[node] + extra_margin)) // f) * (
            (cx + 2 * (margin[node] + extra_margin)) // f
        )

    maps = sum(4 * rows(node) for node in margin)
    work = 0
    for node in margin:
        width = len(node_feature_names(spec, *node))
        context = sum(
            4 * rows(node, _read_reach(spec, node[1], p[1])) for p in node_inputs(spec, *node)
        )
        chunk = min(rows(node), CHUNK_ROWS) * (width + _CLASSIFIER_ROW_BYTES)
        work = max(work, 4 * rows(node) * width + context + chunk)
    return int(image + cached + maps + max(filters, work))


# ----------------------------------------------------------------------------------------------
# storage: arrays + JSON in one .npz, never pickle

_REBUILD = (
    "rerun rule train_node to rebuild it (delete the file, or snakemake --forcerun train_node)"
)


def payload_sha256(arrays, meta):
    """SHA-256 of a model's content: every array (name, dtype, shape, bytes, in name order), then
    the metadata as sorted JSON without the digest itself.

    Recorded in the metadata when the file is written and compared before the model is used, so
    a model whose numbers changed after training is refused even where the zip container is intact.

    Examples
    --------
    >>> a = payload_sha256({"w": np.zeros(2)}, {"stage": 1})
    >>> a == payload_sha256({"w": np.zeros(2)}, {"stage": 1, "payload_sha256": "x"})
    True
    >>> a == payload_sha256({"w": np.array([0.0, 1e-300])}, {"stage": 1})
    False
    """
    digest = hashlib.sha256()
    for name in sorted(arrays):
        values = np.ascontiguousarray(arrays[name])
        digest.update(json.dumps([name, values.dtype.str, list(values.shape)]).encode() + b"\0")
        digest.update(values.tobytes())
    plain = {k: v for k, v in meta.items() if k != "payload_sha256"}
    digest.update(json.dumps(plain, sort_keys=True).encode())
    return digest.hexdigest()


def save_node(model, path_or_file):
    """Write a node to an .npz holding only numeric arrays (metadata as UTF-8 JSON bytes).

    A path is written atomically (:func:`tessera.io.atomic.atomic_path`): a failed write leaves the
    previous model file as it was.

    The metadata records :func:`payload_sha256` of the content; :func:`load_node` checks it.
    """
    payload, clf_metas = {}, []
    for i, clf in enumerate([model.classifier, *model.fold_classifiers]):
        arrays, clf_meta = clf.to_state()
        payload.update({f"clf{i}__{k}": v for k, v in arrays.items()})
        clf_metas.append(clf_meta)
    meta = dict(model.meta, classifiers=clf_metas)
    meta["payload_sha256"] = payload_sha256(payload, meta)
    payload["meta_json"] = np.frombuffer(json.dumps(meta, sort_keys=True).encode(), dtype=np.uint8)
    buffer = io.BytesIO()
    np.savez_compressed(buffer, **payload)
    data = buffer.getvalue()
    if hasattr(path_or_file, "write"):
        path_or_file.write(data)
    else:
        with atomic_path(path_or_file) as tmp, open(tmp, "wb") as fh:
            fh.write(data)


def load_node(path, *, target=None, spec=None, stage=None, level=None):
    """Read a node saved by :func:`save_node`, refusing one made for something else.

    Parameters
    ----------
    path : str or Path
    target, spec, stage, level : optional
        When given, must match the model's metadata exactly.

    Raises
    ------
    TesseraInputError
        Truncated, damaged or foreign file, an array holding Python objects (never unpickled),
        content that does not match the SHA-256 recorded when the file was written, other model
        format, or a mismatch with what was asked for.
    """
    arrays = _read_plain_arrays(path)
    if "meta_json" not in arrays:
        raise TesseraInputError("not a tessera model file (no metadata)", source=path)
    try:
        meta = json.loads(arrays.pop("meta_json").tobytes().decode())
        if not isinstance(meta, dict):
            raise ValueError("not a JSON object")
    except (UnicodeDecodeError, ValueError):  # json.JSONDecodeError is a ValueError
        raise TesseraInputError(f"model metadata is damaged; {_REBUILD}", source=path) from None
    if meta.get("format") != MODEL_FORMAT:
        raise TesseraInputError(
            f"model format {meta.get('format')!r} is not {MODEL_FORMAT} (made by tessera "
            f"{meta.get('tessera_version')}); retrain it with this version ({_REBUILD})",
            source=path,
        )
    if meta.get("payload_sha256") != payload_sha256(arrays, meta):
        raise TesseraInputError(
            f"model content does not match the SHA-256 recorded when it was written (altered or damaged); "
            f"{_REBUILD}",
            source=path,
        )
    try:
        model_spec = CascadeSpec.from_dict({**meta["spec"], "stages": meta["stage"]})
    except (KeyError, TypeError):
        raise TesseraInputError("model metadata lacks its cascade settings", source=path) from None
    checks = [
        ("target", target, meta.get("target")),
        ("stage", stage, meta.get("stage")),
        ("level", level, meta.get("level")),
    ]
    for name, wanted, found in checks:
        if wanted is not None and wanted != found:
            raise TesseraInputError(
                f"model is for {name} {found!r}, expected {wanted!r}", source=path
            )
    if spec is not None and _node_spec_dict(spec) != meta["spec"]:
        diff = sorted(k for k, v in _node_spec_dict(spec).items() if meta["spec"].get(k) != v)
        raise TesseraInputError(
            f"model was trained with other cascade settings ({', '.join(diff)})", source=path
        )
    if meta.get("features") != node_feature_names(model_spec, meta["stage"], meta["level"]):
        raise TesseraInputError(
            "model's feature list does not match this version's features", source=path
        )
    classifiers = []
    for i, clf_meta in enumerate(meta.get("classifiers", [])):
        prefix = f"clf{i}__"
        clf_arrays = {k[len(prefix) :]: v for k, v in arrays.items() if k.startswith(prefix)}
        try:
            classifiers.append(classifier_from_state(clf_arrays, clf_meta))
        except TesseraInputError as exc:
            raise TesseraInputError(str(exc), source=path) from None
    if len(classifiers) != model_spec.folds + 1:
        raise TesseraInputError(
            f"model holds {len(classifiers)} classifiers, expected {model_spec.folds + 1}",
            source=path,
        )
    return NodeModel(
        model_spec, meta["stage"], meta["level"], classifiers[0], classifiers[1:], meta
    )


def _read_plain_arrays(path):
    """Every array of an .npz, refusing object arrays (``allow_pickle=False``: nothing is unpickled)."""
    try:
        with open(path, "rb") as fh, np.load(fh, allow_pickle=False) as data:
            arrays = {}
            for name in data.files:
                try:
                    arrays[name] = data[name]
                except ValueError as exc:
                    # numpy refuses object (pickled) arrays here, before unpickling anything
                    raise TesseraInputError(
                        f"array {name!r} cannot be read as plain numbers ({exc}); model files hold numeric arrays "
                        f"only and are never unpickled; {_REBUILD}",
                        source=path,
                    ) from None
    except TesseraInputError:
        raise
    except FileNotFoundError:
        raise TesseraInputError(f"model file not found; {_REBUILD}", source=path) from None
    except (ValueError, OSError, EOFError, KeyError, zipfile.BadZipFile) as exc:
        raise TesseraInputError(
            f"not a readable model file (truncated or damaged?): {exc}; {_REBUILD}", source=path
        ) from None
    return arrays
