"""Jobs of rules score_rung and choose_rung: score one rung of the cascade ladder on the
validation tiles; pick the rung the predictions use (:mod:`tessera.ladder`).

Only validation tiles are opened here (their label images and their image windows); the test
tiles stay held out for the final scores (rule predict_tiles, with the chosen rung).
"""

from tessera.cascade.api import cascade_spec, section_sigma
from tessera.errors import TesseraInputError
from tessera.io.atomic import atomic_path
from tessera.ladder import choose_rung, plot_ladder
from tessera.threshold import choose_threshold, confusion, scores_from_counts
from tessera.train import pooled_pixels
from tessera.workflow.files.ladder import read_rung_scores, write_choice, write_rung_score
from tessera.workflow.files.node_model import load_cascade
from tessera.workflow.files.pyramid import level_arrays
from tessera.workflow.files.tile_registry import read_annotation_set
from tessera.workflow.jobs.train import tile_probabilities

VALIDATION = "validation"


def score_rung_job(
    annotations,
    pyramids,
    model_paths,
    out_score,
    *,
    target,
    downsample,
    stages,
    levels,
    output_sigma=0.0,
    output_smoothing_sections=0.0,
    qc_tables=None,
):
    """Predict the validation tiles with one rung's nodes; write its validation scores.

    The threshold is the rung's own best-F1 threshold on these tiles
    (:func:`tessera.threshold.choose_threshold`), as the rung would be used if chosen. Sections
    the `qc_tables` exclude are read as their stand-ins, as in training.
    """
    registry, labels = read_annotation_set(annotations, roles=[VALIDATION])
    if registry.empty:
        raise TesseraInputError(
            "the split has no validation tiles to compare cascade sizes on; annotate more tiles or "
            "change split.fractions",
            source=annotations,
        )
    models = load_cascade(model_paths, target=target)
    spec = cascade_spec(models)
    if (spec.stages, spec.levels) != (stages, levels):
        raise TesseraInputError(
            f"rung {stages}x{levels} was given the nodes of a {spec.stages}x{spec.levels} cascade",
            source=model_paths[0],
        )
    arrays = level_arrays(pyramids, registry, downsample=downsample, qc_tables=qc_tables)
    probabilities = tile_probabilities(
        models,
        arrays,
        registry,
        output_sigma=output_sigma,
        output_sigma_z=section_sigma(output_smoothing_sections, dims=spec.dims),
    )
    prob, truth = pooled_pixels(registry["tile_id"], labels, probabilities)
    threshold = float(choose_threshold(prob, truth))
    row = {
        "stages": stages,
        "levels": levels,
        "tiles": len(registry),
        "pixels": int(truth.size),
        "threshold": threshold,
        **scores_from_counts(*confusion(prob, truth, threshold)[:3]),
    }
    write_rung_score(out_score, row)
    return row


def choose_rung_job(score_paths, out_choice, out_plot, *, target):
    """Pick the rung (best validation F1, ties to the smaller model); write the table and curve."""
    table = choose_rung(read_rung_scores(score_paths))
    write_choice(out_choice, table)
    with atomic_path(out_plot) as tmp:
        plot_ladder(table, tmp, target=target)
    chosen = table[table["chosen"]].iloc[0]
    return {
        "chosen": chosen["rung"],
        "f1": dict(zip(table["rung"], table["f1"].round(4).tolist(), strict=True)),
    }
