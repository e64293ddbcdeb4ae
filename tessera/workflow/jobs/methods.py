"""The methods rule: the study's methods paragraph, from the files the run wrote."""

from tessera.io.atomic import write_text
from tessera.io.omezarr import open_image
from tessera.methods import methods_text
from tessera.workflow.files.comparison_table import read_comparison_table
from tessera.workflow.files.input_checksums import read_input_checksums
from tessera.workflow.files.ladder import chosen_rung
from tessera.workflow.files.node_model import read_node
from tessera.workflow.files.object_table import read_object_settings
from tessera.workflow.files.objects_3d import overall_objects_3d
from tessera.workflow.files.qc_table import count_sections
from tessera.workflow.files.scores import read_scores
from tessera.workflow.versions import software_versions


def methods_job(
    config_sections,
    sheet_rows,
    scores,
    object_settings,
    comparisons,
    checksums,
    qc_tables,
    out_path,
    objects_3d=None,
    ladder=None,
    first_nodes=None,
    ingest_images=None,
    annotated=None,
):
    """Write the methods paragraph (Markdown) of the study.

    Parameters
    ----------
    config_sections : dict
        ``ingest``, ``pyramid``, ``qc``, ``statistics`` and ``targets`` of the validated config.
    sheet_rows : dict
        Dataset id → ``{"condition", "subject"}``.
    scores, comparisons : dict
        Target → tile scores table / statistics comparison table.
    object_settings : dict
        Target → list of the settings files written by the objects step (one per dataset).
    checksums : list of path
        The per-dataset checksum records.
    qc_tables : list of path
        Section QC tables (to count the flagged and excluded sections, per reason).
    objects_3d : dict, optional
        Target → its 3D object scores table (targets annotated with label volumes).
    ladder : dict, optional
        Target → the ladder's choice table, for targets whose cascade size a ladder chose: the
        text states the chosen stages and levels, not the configured ones.
    first_nodes : dict, optional
        Target → its trained stage-1 level-0 node: the text states the features' dims and scales
        that node was trained with (``dims: auto`` and unset ``sigmas`` are decided when a node
        is trained; every node of a target shares them).
    ingest_images : dict, optional
        Dataset → its ingested image, whose attributes record how its grey values were brought
        to 8 bits.
    annotated : dict, optional
        Target → the datasets that gave its tiles.
    """
    targets = dict(config_sections["targets"])
    for t, path in (ladder or {}).items():
        stages, levels = chosen_rung(path)
        targets[t] = {
            **targets[t],
            "cascade": {**targets[t]["cascade"], "stages": stages, "levels": levels},
        }
    for t, path in (first_nodes or {}).items():
        spec = read_node(path, target=t).spec
        targets[t] = {
            **targets[t],
            "cascade": {
                **targets[t]["cascade"],
                "dims": spec.dims,
                "sigmas": list(spec.sigmas),
                "neighbours": spec.neighbours,
            },
        }
    config_sections = {**config_sections, "targets": targets}
    # every dataset's settings file is read (a damaged one fails here); the text quotes the first
    used = {t: [read_object_settings(p) for p in object_settings[t]][0] for t in targets}
    tables = {t: read_comparison_table(comparisons[t]) for t in targets if t in comparisons}
    text = methods_text(
        config_sections,
        sheet_rows,
        scores={t: read_scores(scores[t]) for t in targets},
        object_settings=used,
        comparisons=tables,
        section_counts=count_sections(qc_tables),
        checksums=[pair for path in checksums for pair in read_input_checksums(path)],
        software=software_versions(),
        objects_3d={t: overall_objects_3d(p) for t, p in (objects_3d or {}).items()},
        grey_mappings={
            d: open_image(p)[1]["extra"].get("intensity_mapping")
            for d, p in (ingest_images or {}).items()
        },
        annotated=annotated,
    )
    write_text(out_path, text)
    return {"words": len(text.split())}
