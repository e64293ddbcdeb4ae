"""Job of rule evaluate_objects: the stitched objects scored in 3D on the held-out sections.

Per dataset, the scored sections are the test side of the split at the working level (the
sections nearest a test tile), without any section near training
(:func:`tessera.tiles.split.held_out_sections`), taken at full resolution
and without the sections QC excluded. The true objects are the instance volume when the config
gives one, else the 26-connected components of the label volume, both computed on the whole
volume and then cut to the scored sections (as the objects were labelled on the whole volume).
The predicted labels, made at the working level, are repeated onto the full-resolution grid of
the truth, so volumes are counted in the truth's own voxels, and so are the voxel scores of the
objects mask (its precision, recall, F1 and Jaccard against the true objects' voxels).
"""

import numpy as np
import pandas as pd
from scipy import ndimage

from tessera.errors import TesseraInputError
from tessera.io.atomic import atomic_path
from tessera.io.omezarr import open_image
from tessera.object_scores import (
    connected_truth,
    match_table,
    mostly_cut,
    overlap_counts,
    repeat_labels,
    scores_from_overlaps,
    size_classes,
    voxel_ratios,
    whole_in_sections,
)
from tessera.object_views import crop_box, object_crop, plot_object_crops, plot_object_scores
from tessera.tiles.sampling import unannotated_sections
from tessera.tiles.split import held_out_sections
from tessera.workflow.files.label_volumes import read_label_volume
from tessera.workflow.files.objects_3d import write_objects_3d
from tessera.workflow.files.probability_map import probability_fields
from tessera.workflow.files.qc_table import excluded_sections
from tessera.workflow.files.tile_registry import REGISTRY_FILE, read_registry

#: How the true objects were made, as the table's truth_source column says it.
FROM_INSTANCES = "instance volume"
FROM_COMPONENTS = "26-connected components of the labels"
OBJECT_RULE = "3D objects on the held-out test sections, one-to-one at IoU > 0.5"
CROPS_PER_CLASS = 4
#: Columns of objects_3d.tsv, in order.
COLUMNS = (
    "target",
    "dataset",
    "truth_source",
    "sections",
    "first_section",
    "last_section",
    "excluded_sections",
    "prediction_factors",
    "truth_objects",
    "truth_whole",
    "predicted_objects",
    "matched_objects",
    "object_precision",
    "object_recall",
    "object_f1",
    "count_error",
    "matched_volume_error",
    "matched_volume_bias",
    "voxel_precision",
    "voxel_recall",
    "voxel_f1",
    "voxel_jaccard",
    "true_voxels",
    "predicted_voxels",
    "shared_voxels",
    "arand",
    "rand_precision",
    "rand_recall",
    "voi_split",
    "voi_merge",
    "object_rule",
    "note",
)


def _truth(labels, instances, shape, sections):
    """(true objects on the whole volume, source wording, the sections not annotated)."""
    volume = None
    if instances is None or sections != "all":
        volume = read_label_volume(labels, shape, "label volume")
    unannotated = [] if volume is None else unannotated_sections(volume, sections=sections)
    if instances is not None:
        truth = read_label_volume(instances, shape, "instance volume")
        return truth, FROM_INSTANCES, unannotated
    return connected_truth(volume), FROM_COMPONENTS, unannotated


def _scored_sections(
    registry, dataset, *, guard_sections, z_factor, depth, excluded, unannotated=()
):
    """(full-resolution sections scored for `dataset`, ascending; a note on what was left out,
    or why none is scored, or '')."""
    working = held_out_sections(
        registry, dataset, guard_sections=guard_sections, depth=-(-depth // z_factor)
    )
    if not working:
        return [], "no test tiles in this dataset: not scored"
    skip = set(excluded)
    full = [
        z
        for w in working
        for z in range(w * z_factor, min((w + 1) * z_factor, depth))
        if z not in skip
    ]
    if not full:
        return [], "every held-out section was excluded by QC: not scored"
    unlabelled = set(unannotated)
    kept = [z for z in full if z not in unlabelled]
    if not kept:
        return [], "no held-out section holds labels (sections: labelled): not scored"
    if len(kept) < len(full):
        return kept, (
            f"{len(full) - len(kept)} held-out section(s) without labels left out "
            "(sections: labelled)"
        )
    return kept, ""


def _predicted_slab(objects_image, target, z0, z1, shape):
    """The predicted labels of full-resolution sections z0..z1-1, on the full grid."""
    group, info = open_image(objects_image)
    try:
        labels = group[f"labels/{target}/0"]
    except KeyError:
        raise TesseraInputError(
            f"no labels/{target} in the image (rule objects writes it)", source=objects_image
        ) from None
    fields = probability_fields(info)
    factors = (fields["z_factor"], fields["downsample"], fields["downsample"])
    w0, w1 = z0 // factors[0], -(-z1 // factors[0])
    block = repeat_labels(np.asarray(labels[w0:w1]), factors, ((w1 - w0) * factors[0], *shape[1:]))
    return block[z0 - w0 * factors[0] : z1 - w0 * factors[0]], factors


def _score_dataset(dataset, files, registry, *, target, guard_sections, sections_rule):
    """One row of the table, the dataset's match table, and what its crops need."""
    _, raw_info = open_image(files["pyramid"])
    shape = tuple(raw_info["levels"][0].shape)
    truth, source, unannotated = _truth(
        files["labels"], files.get("instances"), shape, sections_rule
    )
    _, objects_info = open_image(files["objects"])
    z_factor = probability_fields(objects_info)["z_factor"]
    excluded = excluded_sections(files["qc"])
    sections, note = _scored_sections(
        registry,
        dataset,
        guard_sections=guard_sections,
        z_factor=z_factor,
        depth=shape[0],
        excluded=excluded,
        unannotated=unannotated,
    )
    if not sections:
        row = {"dataset": dataset, "truth_source": source, "sections": 0, "excluded_sections": 0}
        row["note"] = note
        return {**row, "truth_objects": 0, "predicted_objects": 0, "matched_objects": 0}, None, None
    z0, z1 = sections[0], sections[-1] + 1
    whole, present = whole_in_sections(truth, z0, z1)
    every_section = z0 == 0 and z1 == shape[0]
    cut_note = _cut_objects_note(whole, present, every_section=every_section)
    note = "; ".join(n for n in (note, cut_note) if n)
    truth = np.ascontiguousarray(truth[z0:z1])
    pred, factors = _predicted_slab(files["objects"], target, z0, z1, shape)
    mask = np.broadcast_to(np.isin(np.arange(z0, z1), sections)[:, None, None], truth.shape)
    overlaps = overlap_counts(truth, pred, mask=mask)
    row = {
        "dataset": dataset,
        "truth_source": source,
        "sections": len(sections),
        "first_section": z0,
        "last_section": z1 - 1,
        "excluded_sections": sum(1 for z in excluded if z0 <= z < z1),
        "prediction_factors": "x".join(str(f) for f in factors),
        **scores_from_overlaps(overlaps),
        "truth_whole": whole,
        "every_section": every_section,
        "note": note,
    }
    matches = match_table(overlaps)
    matches.insert(0, "dataset", dataset)
    slab = {"truth": truth, "pred": pred, "mask": mask, "z0": z0, "raw": raw_info["levels"][0]}
    return row, matches, slab


def _cut_objects_note(whole, present, *, every_section=False):
    """A caution when most true objects of the scored sections extend beyond them or are cut by
    the volume's faces ("" else). `every_section`: the whole stack was scored.

    Examples
    --------
    >>> _cut_objects_note(8, 10)
    ''
    >>> _cut_objects_note(1, 10)[:62]
    'only 1 of 10 true objects lies whole within the scored section'
    >>> _cut_objects_note(1, 10, every_section=True)[:70]
    'only 1 of 10 true objects lies whole within the stack: the others are '
    """
    if not mostly_cut(whole, present):
        return ""
    if every_section:
        return (
            f"only {whole} of {present} true objects {'lies' if whole == 1 else 'lie'} whole "
            "within the stack: the others are cut by its faces and scored on the part inside "
            "(a stack thinner or narrower than the organelles are long holds few whole ones)"
        )
    return (
        f"only {whole} of {present} true objects {'lies' if whole == 1 else 'lie'} whole within "
        "the scored sections: the others are scored on their cut part, and reach into "
        "sections used for training or the threshold (hold out a whole annotated stack with "
        "split.test_datasets for an independent test)"
    )


def _pooled_row(rows, matches):
    """The ``all`` row: objects and matched volumes pooled, partition errors averaged."""
    skipped = [r["dataset"] for r in rows if not r["sections"]]
    table = pd.DataFrame([r for r in rows if r["sections"]])
    t, p = int(table["truth_objects"].sum()), int(table["predicted_objects"].sum())
    matched = matches[matches["matched"]]
    k = len(matched)
    relative = (matched["pred_voxels"] - matched["truth_voxels"]) / matched["truth_voxels"]
    voxels = {c: int(table[c].sum()) for c in ("true_voxels", "predicted_voxels", "shared_voxels")}
    sources = sorted(set(table["truth_source"]))
    whole = int(table["truth_whole"].sum())
    return {
        "dataset": "all",
        "truth_source": sources[0] if len(sources) == 1 else "; ".join(sources),
        "sections": int(table["sections"].sum()),
        "excluded_sections": int(table["excluded_sections"].sum()),
        "truth_objects": t,
        "truth_whole": whole,
        "predicted_objects": p,
        "matched_objects": k,
        "object_precision": k / p if p else 0.0,
        "object_recall": k / t if t else 0.0,
        "object_f1": 2 * k / (t + p) if t + p else 0.0,
        "count_error": (p - t) / t if t else float("nan"),
        "matched_volume_error": float(relative.abs().mean()) if k else float("nan"),
        "matched_volume_bias": float(relative.mean()) if k else float("nan"),
        # voxels pooled over datasets, as objects are
        **voxels,
        **voxel_ratios(*voxels.values()),
        **{
            c: float(table[c].mean())
            for c in ("arand", "rand_precision", "rand_recall", "voi_split", "voi_merge")
        },
        "note": "; ".join(
            n
            for n in (
                f"not scored: {', '.join(skipped)}" if skipped else "",
                _cut_objects_note(whole, t, every_section=bool(table["every_section"].all())),
            )
            if n
        ),
    }


def _crops(matches, slabs, *, per_class=CROPS_PER_CLASS):
    """Size class → crops of a few true objects spread over the class's volumes."""
    if matches.empty:
        return {}
    matches = matches.assign(size_class=size_classes(matches["truth_voxels"]))
    out = {}
    for name in ("small", "medium", "large"):
        group = matches[matches["size_class"] == name].sort_values(["truth_voxels", "dataset"])
        picks = np.unique(np.linspace(0, len(group) - 1, min(per_class, len(group))).round())
        out[name] = [_one_crop(group.iloc[int(i)], slabs) for i in picks]
    return out


def _one_crop(match, slabs):
    slab = slabs[match["dataset"]]
    inside = (slab["truth"] == match["truth"]) & slab["mask"]
    per_section = inside.sum(axis=(1, 2))
    z = int(np.argmax(per_section))
    box = ndimage.find_objects(inside[z].astype(np.uint8))[0]
    rows, cols = crop_box(
        (box[0].start, box[0].stop), (box[1].start, box[1].stop), inside.shape[1:]
    )
    raw = np.asarray(slab["raw"][slab["z0"] + z, rows, cols])
    image = object_crop(
        raw, slab["truth"][z, rows, cols], slab["pred"][z, rows, cols], truth_id=match["truth"]
    )
    verdict = (
        f"IoU {match['iou']:.2f}"
        + (f", {match['pred_overlapping']} pred." if match["pred_overlapping"] > 1 else "")
        + (f", merged x{match['truth_sharing']}" if match["truth_sharing"] > 1 else "")
    )
    caption = f"{match['dataset']} #{match['truth']} z{slab['z0'] + z}\n{verdict}"
    return image, caption


def evaluate_objects_job(
    annotations,
    inputs,
    out_table,
    out_plot,
    out_crops,
    *,
    target,
    guard_sections,
    sections="all",
):
    """Score one target's stitched objects in 3D on each dataset's held-out sections.

    Parameters
    ----------
    annotations : path
        The target's split tile set (its ``tiles.tsv`` records each tile's role).
    inputs : dict
        Dataset → ``objects`` (objects image), ``pyramid``, ``labels``, ``qc`` and optionally
        ``instances`` paths.
    sections : {'all', 'labelled'}
        Which sections of the label volumes count as annotated
        (:func:`tessera.tiles.sampling.unannotated_sections`); the others are left out of the
        scores, as sections QC excluded are.
    """
    registry = read_registry(f"{annotations}/{REGISTRY_FILE}")
    rows, matches, slabs = [], [], {}
    for dataset in sorted(inputs):
        row, match, slab = _score_dataset(
            dataset,
            inputs[dataset],
            registry,
            target=target,
            guard_sections=guard_sections,
            sections_rule=sections,
        )
        rows.append(row)
        if match is not None:
            matches.append(match)
            slabs[dataset] = slab
    if not matches:
        raise TesseraInputError(
            f"no dataset has held-out sections to score the {target} objects on ("
            + "; ".join(f"{r['dataset']}: {r['note']}" for r in rows)
            + "); annotate more tiles or change split.fractions",
            source=annotations,
        )
    matches = pd.concat(matches, ignore_index=True)
    table = pd.DataFrame([*rows, _pooled_row(rows, matches)])
    table.insert(0, "target", target)
    # counts stay whole numbers where some rows leave them blank (the pooled row has no range,
    # a dataset without test tiles no whole objects)
    for column in ("first_section", "last_section", "truth_whole"):
        table[column] = table[column].astype("Int64")
    table["object_rule"] = OBJECT_RULE
    table = table.reindex(columns=list(COLUMNS))
    write_objects_3d(out_table, table)
    with atomic_path(out_plot) as tmp:
        plot_object_scores(
            table, tmp, title=f"{target}: 3D objects on held-out sections, matched at IoU > 0.5"
        )
    with atomic_path(out_crops) as tmp:
        plot_object_crops(
            _crops(matches, slabs),
            tmp,
            title=f"{target}: true objects (cyan) and predicted objects (other colours) "
            "over raw held-out sections, by size",
        )
    overall = table[table["dataset"] == "all"].iloc[0]
    return {
        "object_f1": float(overall["object_f1"]),
        "truth_objects": int(overall["truth_objects"]),
        "predicted_objects": int(overall["predicted_objects"]),
    }
