"""The methods rule: the study's methods paragraph, from the files the run wrote."""

from tessera.io.atomic import write_text
from tessera.methods import methods_text
from tessera.workflow.files.comparison_table import read_comparison_table
from tessera.workflow.files.input_checksums import read_input_checksums
from tessera.workflow.files.object_table import read_object_settings
from tessera.workflow.files.qc_table import read_qc_table
from tessera.workflow.files.scores import read_scores
from tessera.workflow.versions import software_versions


def section_counts(qc_tables):
    """Sections checked, flagged and excluded over the QC tables, and how many per reason.

    A section's ``reason`` lists its flags joined by ``;``; each is counted as written, so a
    kind of flag added later is counted without a change here. A table without ``reason``
    counts its excluded sections as flagged (reasons unknown).

    Examples
    --------
    >>> import io
    >>> tables = [io.StringIO("z\\treason\\texcluded\\n0\\t\\tFalse\\n1\\tflat\\tTrue\\n"),
    ...           io.StringIO("z\\treason\\texcluded\\n0\\tblurred;shift\\tTrue\\n1\\tflat\\tTrue\\n")]
    >>> section_counts(tables)
    {'sections': 4, 'flagged': 3, 'excluded': 3, 'reasons': {'flat': 2, 'blurred': 1, 'shift': 1}}
    """
    counts = {"sections": 0, "flagged": 0, "excluded": 0, "reasons": {}}
    for path in qc_tables:
        table = read_qc_table(path)
        reasons = table["reason"].astype(str) if "reason" in table.columns else None
        flagged = table["excluded"] if reasons is None else reasons.str.strip() != ""
        counts["sections"] += len(table)
        counts["flagged"] += int(flagged.sum())
        counts["excluded"] += int(table["excluded"].sum())
        for text in [] if reasons is None else reasons:
            for reason in filter(None, (r.strip() for r in text.split(";"))):
                counts["reasons"][reason] = counts["reasons"].get(reason, 0) + 1
    return counts


def methods_job(
    config_sections,
    sheet_rows,
    scores,
    object_settings,
    comparisons,
    checksums,
    qc_tables,
    out_path,
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
    """
    targets = config_sections["targets"]
    # every dataset's settings file is read (a damaged one fails here); the text quotes the first
    used = {t: [read_object_settings(p) for p in object_settings[t]][0] for t in targets}
    tables = {t: read_comparison_table(comparisons[t]) for t in targets if t in comparisons}
    text = methods_text(
        config_sections,
        sheet_rows,
        scores={t: read_scores(scores[t]) for t in targets},
        object_settings=used,
        comparisons=tables,
        section_counts=section_counts(qc_tables),
        checksums=[pair for path in checksums for pair in read_input_checksums(path)],
        software=software_versions(),
    )
    write_text(out_path, text)
    return {"words": len(text.split())}
