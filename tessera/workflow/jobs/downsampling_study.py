"""The downsampling_study rule: test accuracy against downsampling factor for one target."""

import math

from tessera.downsampling_study import factor_curve, plot_curve
from tessera.io.atomic import atomic_path, write_table
from tessera.io.omezarr import open_image, working_level
from tessera.workflow.files.evaluation_summary import overall_scores


def effective_z_factors(pyramids, factors):
    """Per in-plane factor, the z reduction of its pyramid level over the annotated datasets.

    Near-isotropic stacks are reduced in z as well (``pyramid.downsample_z``); datasets that
    differ are weighted by their voxels, so that ``1 / (f² z)`` is the fraction of all their
    voxels a factor predicts.
    """
    infos = [open_image(path)[1] for path in pyramids]
    voxels = [math.prod(info["levels"][0].shape) for info in infos]
    z_factors = []
    for factor in factors:
        predicted = sum(
            v / info["factors"][working_level(info["factors"], factor, source=path)][0]
            for v, info, path in zip(voxels, infos, pyramids, strict=True)
        )
        z_factors.append(sum(voxels) / predicted)
    return z_factors


def downsampling_study_job(
    summaries, factors, out_curve, out_plot, *, target, tolerance, pyramids=()
):
    """Collect the test F1 of every factor, add the relative prediction cost, recommend one.

    `pyramids` (the annotated datasets' pyramids) tell how much each factor reduces z too;
    without them the cost is counted in plane only.
    """
    scores = [overall_scores(path) for path in summaries]
    z_factors = effective_z_factors(pyramids, factors) if pyramids else None
    curve, chosen = factor_curve(
        factors, scores, target=target, tolerance=tolerance, z_factors=z_factors
    )
    write_table(out_curve, curve)
    with atomic_path(out_plot) as tmp:
        plot_curve(curve, tmp, target=target, chosen=chosen)
    return {
        "recommended": chosen,
        "f1": dict(zip(curve["factor"].tolist(), curve["f1"].round(4).tolist(), strict=True)),
    }
