"""The statistics rule: per-animal summaries and condition comparisons of one target."""

import math

from tessera.errors import TesseraInputError
from tessera.io.atomic import atomic_path, write_table
from tessera.statistics import (
    REGION_MEASURES,
    describe_conditions,
    sheet_conditions,
    summarise_study,
)
from tessera.statistics_plot import plot_conditions
from tessera.workflow.files.comparison_table import write_comparison_table
from tessera.workflow.files.distinct_stacks import read_distinct_stacks
from tessera.workflow.files.morphometry_tables import read_object_measures, read_region_densities
from tessera.workflow.files.objects_3d import overall_objects_3d
from tessera.workflow.files.scores import read_scores


def _test_accuracy(scores_path):
    """Test-tile F1 and Jaccard of the target (from the tile scores table); NaN without test tiles."""
    table = read_scores(scores_path)
    test = table[table["role"] == "test"]
    if test.empty:
        return {"test_f1": math.nan, "test_jaccard": math.nan}
    return {"test_f1": float(test["f1"].iloc[0]), "test_jaccard": float(test["jaccard"].iloc[0])}


def _object_accuracy(objects_3d):
    """3D object F1 and count error of the target on the held-out test sections (the ``all`` row
    of its 3D object scores); NaN for a target without label volumes (`objects_3d` None)."""
    if objects_3d is None:
        return {"object_f1_3d": math.nan, "count_error_3d": math.nan}
    row = overall_objects_3d(objects_3d)
    return {key: float(row[column]) for key, column in _OBJECT_COLUMNS.items()}


# Counts and sizes are what a study publishes: beside every comparison, how well the objects
# themselves matched the truth, not only the pixels
_OBJECT_COLUMNS = {"object_f1_3d": "object_f1", "count_error_3d": "count_error"}


def statistics_job(
    object_tables,
    region_tables,
    datasets,
    scores,
    out_animals,
    out_comparison,
    out_plot,
    *,
    target,
    measures,
    out_conditions,
    reference=None,
    confidence=0.95,
    stacks_check=None,
    objects_3d=None,
):
    """Per-animal summaries, per-condition descriptions and condition comparisons of one target.

    Parameters
    ----------
    object_tables, region_tables : dict
        Dataset id → measured object table / region table (from the morphometry step).
    datasets : dict
        Dataset id → ``{"condition": ..., "subject": ...}`` (from the sheet).
    scores : path
        Tile scores of the target; the test-tile F1 and Jaccard are printed beside every result.
    out_conditions : path
        Each measure per condition (:func:`~tessera.statistics.describe_conditions`): the
        result of a study with one condition, where the comparison table has no rows.
    reference : str, optional
        ``statistics.reference_condition``: the condition the others are compared with
        (default: the first condition in the sheet). One the sheet lacks is refused when the
        workflow loads (:func:`tessera.workflow.config.check_reference_condition`), and by
        :func:`~tessera.statistics.compare_conditions` before anything is written.
    stacks_check : path, optional
        Rule check_distinct_stacks's record: no two datasets hold one stack. The animals are
        counted only over the datasets it checked.
    objects_3d : path, optional
        The target's 3D object scores (targets with label volumes): their object F1 and count
        error on the held-out test sections join the accuracy columns and the chart's title.
    """
    if stacks_check is not None:
        checked = read_distinct_stacks(stacks_check)
        if sorted(checked) != sorted(datasets):
            raise TesseraInputError(
                f"checked datasets {sorted(checked)}, the statistics count {sorted(datasets)}; "
                "expected the same (rerun rule check_distinct_stacks)",
                source=stacks_check,
            )
    conditions = sheet_conditions(datasets)
    objects = {d: read_object_measures(path) for d, path in object_tables.items()}
    regions = {d: read_region_densities(region_tables[d]) for d in object_tables}
    accuracy = _test_accuracy(scores) | _object_accuracy(objects_3d)
    objects, animals, comparison = summarise_study(
        objects,
        regions,
        datasets,
        target=target,
        measures=measures,
        accuracy=accuracy,
        reference=reference,
        confidence=confidence,
    )
    write_table(out_animals, animals)
    described = describe_conditions(
        animals,
        measures=[*measures, *(f"region_{m}" for m in REGION_MEASURES)],
        conditions=conditions,
    )
    described.insert(0, "target", target)
    write_table(out_conditions, described)
    write_comparison_table(out_comparison, comparison)
    with atomic_path(out_plot) as tmp:
        plot_conditions(objects, animals, comparison, tmp, target=target, accuracy=accuracy)
    return {
        "conditions": len(conditions),
        "compared": len(comparison),
        "warnings": int((comparison["warning"] != "").sum()),
    }
