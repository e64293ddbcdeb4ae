"""Job of rule evaluate: score one target's test tiles; write the tables and plots."""

import logging

from tessera.evaluate import check_no_leakage, evaluate_tiles, plot_evaluation, plot_overlays
from tessera.io.atomic import atomic_path, write_table
from tessera.tile_windows import tile_window
from tessera.workflow.files.evaluation_summary import write_evaluation_summary
from tessera.workflow.files.pyramid import level_arrays
from tessera.workflow.files.tile_probabilities import read_tile_probabilities
from tessera.workflow.files.tile_registry import read_annotation_set

_log = logging.getLogger(__name__)


def evaluate_job(
    annotations,
    probabilities,
    pyramids,
    out_summary,
    out_tiles,
    out_curve,
    out_curve_plot,
    out_tiles_plot,
    out_overlays,
    *,
    target,
    downsample,
    confidence=0.95,
    reps=1000,
    seed=0,
):
    """Score one target's test tiles; write the tables and plots."""
    registry, labels = read_annotation_set(annotations)
    check_no_leakage(registry, source=annotations)
    probs = read_tile_probabilities(probabilities)
    summary, per_tile, curve = evaluate_tiles(
        registry, labels, probs, confidence=confidence, reps=reps, seed=seed, source=annotations
    )
    summary.insert(0, "target", target)
    per_tile.insert(0, "target", target)
    write_evaluation_summary(out_summary, summary)
    write_table(out_tiles, per_tile)
    write_table(out_curve, curve)
    with atomic_path(out_curve_plot) as a, atomic_path(out_tiles_plot) as b:
        plot_evaluation(summary, per_tile, curve, a, b, target=target)
    test = registry[registry["role"] == "test"]
    arrays = level_arrays(pyramids, test, downsample=downsample)
    worst = per_tile.sort_values("f1")["tile_id"].tolist()
    images = {}
    for tile_id in worst[:4]:
        row = test[test["tile_id"] == tile_id].iloc[0]
        images[tile_id] = tile_window(arrays[row["dataset"]], row, 0, 0)[0]
    with atomic_path(out_overlays) as tmp:
        plot_overlays(
            images, labels, probs, float(summary["threshold"].iloc[0]), tmp, target=target
        )
    overall = summary[summary["dataset"] == "all"].iloc[0]
    if overall["note"]:
        _log.warning("%s, all test tiles: %s (tiles.per_dataset)", target, overall["note"])
    return {
        "f1": overall["f1"],
        "f1_ci": [overall["f1_ci_low"], overall["f1_ci_high"]],
        "average_precision": overall["average_precision"],
        "object_f1": overall["object_f1"],
    }
