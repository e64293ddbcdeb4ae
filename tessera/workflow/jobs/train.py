"""Jobs of rules train_node and predict_tiles: train one cascade node; predict and score the
held-out tiles."""

import logging

from tessera.cascade.api import (
    ancestors,
    automatic_dims,
    automatic_neighbours,
    cascade_spec,
    mix_sections,
    predict_frame,
    receptive_radius,
    section_sigma,
    spec_from_settings,
    train_node,
    z_halo,
)
from tessera.errors import TesseraInputError
from tessera.spacing import NEAR_ISOTROPIC_ASPECT, near_isotropic
from tessera.tile_windows import tile_room, tile_window
from tessera.train import score_tiles, training_tiles
from tessera.workflow.files.node_model import load_cascade, write_node
from tessera.workflow.files.pyramid import (
    level_arrays,
    pixel_size_spread,
    working_aspect,
    working_aspects,
)
from tessera.workflow.files.scores import write_scores
from tessera.workflow.files.tile_probabilities import write_tile_probabilities
from tessera.workflow.files.tile_registry import read_annotation_set
from tessera.workflow.resources import keep_freed_memory

_log = logging.getLogger(__name__)


def _warn_mixed_isotropy(aspects):
    """Log which datasets keep dims auto in 2D when only some stacks are near-isotropic."""
    flat = sorted(d for d, a in aspects.items() if not near_isotropic((a, 1.0, 1.0)))
    if flat and len(flat) < len(aspects):
        # not refused (a study may mix modalities), but one mistyped voxel_z_nm would do it
        _log.warning(
            "dims auto: dataset(s) %s have z spacing %s times the in-plane spacing, so every "
            "dataset of this target, the near-isotropic ones too, is computed section by "
            "section (2D); check voxel_z_nm in the sheet, or give the near-isotropic stacks a "
            "target of their own",
            ", ".join(flat),
            ", ".join(f"{aspects[d]:.3g}" for d in flat),
        )


def train_node_job(
    annotations,
    pyramids,
    upstream,
    out_path,
    *,
    target,
    downsample,
    cascade,
    stage,
    level,
    threads=1,
    train_datasets=None,
    qc_tables=None,
):
    """Train node (stage, level) of a target's cascade and save it.

    Parameters
    ----------
    annotations : path
        Split annotation set of the target (``role`` column).
    pyramids : dict
        Dataset id → multiscale OME-Zarr image.
    upstream : list of path
        Saved models of every ancestor node.
    out_path : path
        The model file to write (.npz, arrays and JSON only).
    target : str
    downsample : int
        The target's working level factor.
    cascade : dict
        Cascade settings (see :class:`tessera.cascade.api.CascadeSpec`); ``stages`` is replaced by `stage`.
        ``dims`` ``"auto"`` is decided here from the data
        (:func:`tessera.cascade.spec.automatic_dims`), as is an unset ``voxel_aspect``;
        ``neighbours`` ``"auto"`` then follows the dims
        (:func:`tessera.cascade.spec.automatic_neighbours`).
    train_datasets : list of str, optional
        Train on the tiles of these datasets only (the others' test tiles then measure how the
        model transfers to other animals).
    qc_tables : dict, optional
        Dataset id → section QC table: sections it excludes are read as their stand-ins.
    """
    keep_freed_memory()  # arrays of every section and node reuse the freed memory
    node = (stage, level)
    registry, labels = read_annotation_set(annotations)
    arrays = level_arrays(pyramids, registry, downsample=downsample, qc_tables=qc_tables)
    cascade = dict(cascade)
    neighbours = cascade.get("neighbours", 0)
    if cascade.get("dims") == "auto":
        # near-isotropic stacks (FIB-SEM) in 3D, thick sections in 2D: decided by the voxel
        # size as acquired (the pyramid's full resolution), the same at every working level
        aspects = working_aspects(pyramids, set(registry["dataset"]), downsample=1)
        chosen = 0 if neighbours == "auto" else neighbours
        cascade["dims"] = automatic_dims(aspects.values(), neighbours=chosen)
        _log.info(
            "dims auto -> %d: z spacing over in-plane spacing as acquired %s (3D where every "
            "dataset's is at most %g and neighbours is 0 or auto)",
            cascade["dims"],
            ", ".join(f"{d} {a:.3g}" for d, a in sorted(aspects.items())),
            NEAR_ISOTROPIC_ASPECT,
        )
        _warn_mixed_isotropy(aspects)
    if neighbours == "auto":
        cascade["neighbours"] = automatic_neighbours(cascade.get("dims", 2))
    if cascade.get("voxel_aspect") is None:
        # unset: a 3D cascade takes it from the data; a 2D one does not use it
        cascade.pop("voxel_aspect", None)
        if cascade.get("dims") == 3:
            cascade["voxel_aspect"] = working_aspect(
                pyramids, set(registry["dataset"]), downsample=downsample
            )
    spread = pixel_size_spread(pyramids, set(registry["dataset"]), downsample=downsample)
    if spread is not None:
        # not refused (a study may mean it), but the model sees each at another scale
        (small, small_nm), (large, large_nm) = spread
        _log.warning(
            "datasets %s and %s have working-level pixels of %.3g and %.3g nm; filters and "
            "stencils count pixels, so one model sees their structures at different scales "
            "(give them their own target, or resample one)",
            small,
            large,
            small_nm,
            large_nm,
        )
    spec = spec_from_settings(cascade, stages=stage)
    # refuses models of other settings
    models = load_cascade(upstream, target=target, spec=spec)
    for a in ancestors(spec, node)[:-1]:
        if a not in models:
            raise TesseraInputError(
                f"node {node} needs the model of node {a}; it was not among the inputs"
            )
    tiles = training_tiles(
        spec, registry, labels, arrays, final=node, train_datasets=train_datasets
    )
    model = train_node(spec, stage, level, tiles, models, target=target, threads=threads)
    write_node(model, out_path)  # atomic
    return {
        "node": list(node),
        "training_tiles": len(tiles),
        "training_pixels": model.meta["training_pixels"],
        "dims": spec.dims,  # with dims auto, what the data decided
        "neighbours": spec.neighbours,
    }


def predict_tiles_job(
    annotations,
    pyramids,
    model_paths,
    out_probabilities,
    out_table,
    *,
    target,
    downsample,
    output_sigma=0.0,
    output_smoothing_sections=0.0,
    qc_tables=None,
):
    """Predict the validation and test tiles with the finished cascade; score them.

    The threshold is the one with the best F1 on the validation tiles; test scores use it.
    `output_smoothing_sections` (σ in sections, or ``auto``) is resolved for the cascade's dims
    (:func:`tessera.cascade.api.section_sigma`), as the shard plan resolves it.
    Writes every tile's probability map (``<tile_id>`` arrays in an .npz) and a TSV of pixel
    precision, recall, F1 and Jaccard per role. Sections the `qc_tables` exclude are read as
    their stand-ins, as in training and whole-volume prediction.
    """
    keep_freed_memory()  # arrays of every section and node reuse the freed memory
    registry, labels = read_annotation_set(annotations)
    models = load_cascade(model_paths, target=target)
    arrays = level_arrays(pyramids, registry, downsample=downsample, qc_tables=qc_tables)
    held = registry[registry["role"].isin(["validation", "test"])]
    probabilities = tile_probabilities(
        models,
        arrays,
        held,
        output_sigma=output_sigma,
        output_sigma_z=section_sigma(output_smoothing_sections, dims=cascade_spec(models).dims),
    )
    table = score_tiles(held, labels, probabilities)
    write_tile_probabilities(out_probabilities, probabilities)
    write_scores(out_table, table)
    return table.to_dict(orient="records")


def tile_probabilities(models, arrays, rows, *, output_sigma=0.0, output_sigma_z=0.0):
    """Tile id → the cascade's probability over the tile's core, for each registry row.

    `arrays` maps dataset id → working-level array; each tile is read with the cascade's halo.
    With `output_sigma_z` (σ in sections) the tile's region is predicted on the sections that
    smoothing reads too, as whole-volume prediction does, and smoothed across them.
    """
    spec = cascade_spec(models)
    halo = receptive_radius(spec, output_sigma=output_sigma)
    out = {}
    for _, row in rows.iterrows():
        array = arrays[row["dataset"]]
        core = (int(row["height"]), int(row["width"]))
        room = tile_room(spec, array, row)

        def one(section, array=array, row=row, core=core, room=room):
            image = tile_window(array, {**row.to_dict(), "z": section}, halo, z_halo(spec))
            return predict_frame(models, image, core, output_sigma=output_sigma, room=room)

        z = int(row["z"])
        out[row["tile_id"]] = (
            mix_sections(one, z, output_sigma_z, int(array.shape[0]))
            if output_sigma_z > 0
            else one(z)
        )
    return out
