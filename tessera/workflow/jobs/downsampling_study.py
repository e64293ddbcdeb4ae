"""The downsampling_study rule: test accuracy against downsampling factor for one target."""

from tessera.downsampling_study import factor_curve, plot_curve
from tessera.io.atomic import atomic_path, write_table
from tessera.workflow.files.evaluation_summary import overall_scores


def downsampling_study_job(summaries, factors, out_curve, out_plot, *, target, tolerance):
    """Collect the test F1 of every factor, add the relative prediction cost, recommend one."""
    scores = [overall_scores(path) for path in summaries]
    curve, chosen = factor_curve(factors, scores, target=target, tolerance=tolerance)
    write_table(out_curve, curve)
    with atomic_path(out_plot) as tmp:
        plot_curve(curve, tmp, target=target, chosen=chosen)
    return {
        "recommended": chosen,
        "f1": dict(zip(curve["factor"].tolist(), curve["f1"].round(4).tolist(), strict=True)),
    }
