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

import math
from dataclasses import asdict, dataclass, field

from tessera.cascade.classifiers import KINDS
from tessera.cascade.features import default_sigmas, feature_radius
from tessera.cascade.orientations import ORIENTATION_COUNTS
from tessera.errors import TesseraInputError
from tessera.spacing import near_isotropic

# Limits of the integer settings, inclusive (None: no upper limit). The config schema
# (config/schemas/config.schema.yaml, targets.*.cascade) states the same bounds; a test keeps
# the two equal.
LIMITS = {
    "stages": (1, 8),
    "levels": (0, 5),
    "folds": (2, 20),
    "samples_per_tile": (10, 1_000_000),
    "neighbours": (0, 4),
    "context_sections": (0, 4),
    "seed": (0, None),
    "dims": (2, 3),
}
STENCIL_RADIUS_LIMITS = (1, 256)  # each radius, pixels of the map's level
MAX_SIGMA = 64.0  # largest filter-bank scale (px of the level); scales are > 0
POOLINGS = ("mean", "max")


@dataclass(frozen=True)
class CascadeSpec:
    """Everything that defines a cascade's structure and training.

    Parameters
    ----------
    stages, levels : int
        S ≥ 1 and L ≥ 0 (limits in ``LIMITS``).
    sigmas : tuple of float, optional
        Filter-bank scales at full resolution (pixels of the working level). Unset: those of
        :func:`~tessera.cascade.features.default_sigmas` for `dims`.
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
    context_sections : int
        Sections on each side whose previous-stage map every node from stage 2 on reads (at the
        same stencil as its own section's), besides its own section's. An organelle seen in the
        sections above and below is likely in this one too; each stage then reaches that many
        sections further, so the image a frame needs grows by this many sections per stage
        (:func:`tessera.cascade.geometry.z_halo`). 0 (the default) reads the own section only.
    seed : int
        Makes sampling, folds and classifiers deterministic.
    dims : {2, 3}
        2 (the default): the image features of a section are its 2D filter bank (plus
        ``neighbours``). 3, for near-isotropic stacks (FIB-SEM): the full-resolution features of
        a section are the 3D filter bank of the sections around it
        (:func:`tessera.cascade.section_features.section_filter_bank_3d`); coarser levels pool
        in plane only and keep the 2D bank of the section. ``neighbours`` must then be 0 (the
        3D bank already reads the sections around).
    orientations : {1, 2, 4, 8}
        Orientations of the pixel grid each training tile is seen in (identity; then transpose,
        the two flips, the other turns: :data:`tessera.cascade.orientations.ORIENTATIONS`).
        ``samples_per_tile`` is shared among them, so the rows a node is fitted on stay as
        many; each orientation's image features and earlier maps are computed on the turned
        tile. Prediction does not change. 1 (the default) trains on the tiles as they are.
    voxel_aspect : float
        The working level's z spacing over its in-plane spacing (> 0), with ``dims`` = 3: the
        3D bank's σ along z is scaled by it (σ counts in pixels of the finest axis). Not used in
        2D, where it is recorded as 1.0, so a 2D model does not depend on it.
    """

    stages: int = 2
    levels: int = 2
    sigmas: tuple | None = None
    coarse_sigmas: tuple = (0.7, 1.6, 3.5)
    stencil_radii: tuple = (1, 2, 4, 8)
    pooling: str = "mean"
    classifier: str = "mlp"
    classifier_options: dict = field(default_factory=dict)
    folds: int = 3
    samples_per_tile: int = 4000
    neighbours: int = 0
    context_sections: int = 0
    seed: int = 0
    dims: int = 2
    voxel_aspect: float = 1.0
    orientations: int = 1

    def __post_init__(self):
        def fail(msg):
            raise TesseraInputError(f"cascade settings: {msg}")

        def check_int(name):
            value = getattr(self, name)
            low, high = LIMITS[name]
            if not isinstance(value, int) or value < low or (high is not None and value > high):
                upper = f" and <= {high}" if high is not None else ""
                fail(f"{name} must be an integer >= {low}{upper}, got {value!r}")

        check_int("stages")
        check_int("levels")
        if self.pooling not in POOLINGS:
            fail(f"pooling must be 'mean' or 'max', got {self.pooling!r}")
        if self.classifier not in KINDS:
            fail(f"classifier must be one of {', '.join(KINDS)}, got {self.classifier!r}")
        check_int("folds")
        check_int("samples_per_tile")
        check_int("neighbours")
        check_int("context_sections")
        check_int("seed")
        self._check_dims(fail, check_int)
        if isinstance(self.orientations, bool) or self.orientations not in ORIENTATION_COUNTS:
            counts = ", ".join(str(n) for n in ORIENTATION_COUNTS)
            fail(f"orientations must be one of {counts}, got {self.orientations!r}")
        radii = tuple(self.stencil_radii)
        low, high = STENCIL_RADIUS_LIMITS
        if not radii or any(not isinstance(r, int) or not low <= r <= high for r in radii):
            fail(
                f"stencil_radii must be integers >= {low} and <= {high}, got {self.stencil_radii!r}"
            )
        object.__setattr__(self, "stencil_radii", radii)
        if self.sigmas is None:  # unset: the default of 2D or 3D features
            object.__setattr__(self, "sigmas", default_sigmas(self.dims))
        object.__setattr__(self, "sigmas", tuple(float(s) for s in self.sigmas))
        object.__setattr__(self, "coarse_sigmas", tuple(float(s) for s in self.coarse_sigmas))
        object.__setattr__(self, "classifier_options", dict(self.classifier_options))
        feature_radius(self.sigmas)  # validates the scales
        feature_radius(self.coarse_sigmas)
        for name in ("sigmas", "coarse_sigmas"):
            if max(getattr(self, name)) > MAX_SIGMA:
                fail(f"{name} must be at most {MAX_SIGMA:g} px, got {getattr(self, name)!r}")

    def _check_dims(self, fail, check_int):
        check_int("dims")
        aspect = self.voxel_aspect
        if isinstance(aspect, bool) or not isinstance(aspect, (int, float)):
            fail(f"voxel_aspect must be a number > 0, got {aspect!r}")
        if not (math.isfinite(aspect) and aspect > 0):
            fail(f"voxel_aspect must be a number > 0, got {aspect!r}")
        if self.dims == 3 and self.neighbours != 0:
            fail(
                f"neighbours must be 0 when dims is 3 (the 3D features read the sections "
                f"around), got neighbours {self.neighbours!r}"
            )
        # the aspect is a setting of the 3D features only: a 2D node does not depend on it
        object.__setattr__(self, "voxel_aspect", float(aspect) if self.dims == 3 else 1.0)

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
            if data.get(key) is not None:  # unset sigmas stay None: the default of the dims
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


def node_settings(settings):
    """The cascade settings a node depends on: every setting but the number of stages.

    A node does not depend on how many stages follow it, so raising the number of stages keeps
    the earlier nodes valid. ``context_sections`` at 0, ``orientations`` at 1, ``dims`` at 2 and
    ``voxel_aspect`` at 1.0 (or with ``dims`` 2, where it is not used) are left out as well: models made before these
    settings existed record no such keys, and stay the same files. This is what a node's model
    records (``meta["spec"]``) and what a workflow passes to the job training a node.
    `settings` is a :class:`CascadeSpec`, or a mapping of settings such as a configuration's
    ``cascade`` section (returned as given, without ``stages`` and the keys above).
    :func:`spec_from_settings` is the way back.

    Examples
    --------
    >>> settings = node_settings(CascadeSpec(stages=3, levels=1))
    >>> "stages" in settings, settings["levels"]
    (False, 1)
    >>> node_settings({"stages": 2, "levels": 1, "folds": 3})
    {'levels': 1, 'folds': 3}
    >>> node_settings({"levels": 1, "dims": 2, "voxel_aspect": 1.5})
    {'levels': 1}
    >>> node_settings({"levels": 1, "dims": 3, "voxel_aspect": 1.5})
    {'levels': 1, 'dims': 3, 'voxel_aspect': 1.5}
    """
    out = settings.to_dict() if isinstance(settings, CascadeSpec) else dict(settings)
    out.pop("stages", None)
    if out.get("context_sections") == 0:
        out.pop("context_sections")
    if out.get("orientations") == 1:
        out.pop("orientations")
    if out.get("dims", 2) == 2:
        out.pop("dims", None)
        out.pop("voxel_aspect", None)
    elif out.get("voxel_aspect") == 1.0:
        out.pop("voxel_aspect")
    return out


def automatic_dims(aspects, *, neighbours=0):
    """The ``dims`` that ``auto`` stands for, from the voxel aspects of the data as acquired.

    3 when every aspect counts as near-isotropic (:func:`tessera.spacing.near_isotropic`) and
    ``neighbours`` is 0 (a 2D setting that asks for the sections around as extra channels); 2
    otherwise. The aspects are those of the full-resolution data, not of the working level, so
    every downsampling factor of a target gets the same mode (a downsampling study then varies
    the factor alone).

    Parameters
    ----------
    aspects : iterable of float
        z spacing over in-plane spacing of each dataset the model is trained on.
    neighbours : int

    Examples
    --------
    >>> automatic_dims([1.0, 1.02]), automatic_dims([2.5]), automatic_dims([0.6], neighbours=1)
    (3, 2, 2)
    """
    aspects = [float(a) for a in aspects]
    if not aspects:
        raise TesseraInputError("dims auto needs the voxel aspect of at least one dataset")
    near = all(near_isotropic((a, 1.0, 1.0)) for a in aspects)
    return 3 if near and neighbours == 0 else 2


#: Sections on each side whose intensity a 2D cascade reads when ``neighbours`` is ``auto``.
#: Measured for mitochondria (2 x 2): open VNC ssTEM stack, test pixel F1 0.796 against 0.751
#: with 0 (seed 0); the demo's SBEM-like mitochondria, test tiles 0.975-0.984 against 0.959: a
#: section grazing a mitochondrion shows only its dark rim, which the sections around tell from
#: a membrane. Not the default: nuclei, many sections thick, lost 0.01 on the demo and 0.056 on
#: the test suite's tiny study.
AUTOMATIC_NEIGHBOURS_2D = 1


def automatic_neighbours(dims):
    """The ``neighbours`` that ``auto`` stands for: :data:`AUTOMATIC_NEIGHBOURS_2D` in 2D, 0 in
    3D (where the 3D filter bank reads the sections around).

    Examples
    --------
    >>> automatic_neighbours(2), automatic_neighbours(3)
    (1, 0)
    """
    return AUTOMATIC_NEIGHBOURS_2D if dims == 2 else 0


def context_offsets(spec, stage):
    """Section offsets (other than 0) at which nodes of `stage` read the previous stage's map.

    Examples
    --------
    >>> spec = CascadeSpec(stages=2, levels=0, context_sections=1)
    >>> context_offsets(spec, 1), context_offsets(spec, 2)
    ([], [-1, 1])
    """
    if stage < 2:
        return []
    k = spec.context_sections
    return [d for d in range(-k, k + 1) if d]


def spec_from_settings(settings, *, stages):
    """The :class:`CascadeSpec` of a cascade of `stages` stages with these settings.

    `settings` is a mapping such as a configuration's ``cascade`` section or the output of
    :func:`node_settings` (a model's ``meta["spec"]``); its own ``stages``, if any, is replaced
    by `stages`: a spec made to train or read node (s, l) ends at stage s.

    Raises
    ------
    TesseraInputError
        Unknown or invalid settings.

    Examples
    --------
    >>> spec = spec_from_settings({"stages": 3, "levels": 1}, stages=2)
    >>> spec.stages, spec.levels
    (2, 1)
    >>> spec_from_settings(node_settings(spec), stages=2) == spec
    True
    """
    return CascadeSpec.from_dict({**settings, "stages": stages})
