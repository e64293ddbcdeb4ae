"""The cascade's structure: its settings (:class:`CascadeSpec`) and its graph of nodes.

The cascaded hierarchical model: S stages × L levels of pixel classifiers (Seyedhosseini,
Sajjadi & Tasdizen, "Image segmentation with cascaded hierarchical models and logistic
disjunctive normal networks", ICCV 2013; Seyedhosseini & Tasdizen, TPAMI 2016; built on
auto-context, Tu & Bai, TPAMI 2010). In this implementation, for every stage s = 1..S:

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

Planning a workflow needs only this module: it imports neither the classifiers' libraries nor
the filter bank's computation.
"""

from dataclasses import asdict, dataclass, field

from tessera.cascade.classifiers import KINDS
from tessera.cascade.features import DEFAULT_SIGMAS, feature_radius
from tessera.errors import TesseraInputError


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


def node_settings(spec):
    # A node does not depend on how many stages follow it: leave `stages` out, so raising the
    # number of stages keeps the earlier nodes valid.
    out = spec.to_dict()
    out.pop("stages")
    return out
