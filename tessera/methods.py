"""A methods paragraph written from the run's own settings, results, software and data checksums.

Everything in the text is read from what the run used or produced (the config subsections, the
tile scores, the object settings, the statistics tables, installed package versions and the
SHA-256 of every input file), so the paragraph cannot drift from the analysis it describes.
"""

import json
from pathlib import Path

import pandas as pd

from tessera import __version__
from tessera.io.atomic import write_text
from tessera.io.digests import file_sha256
from tessera.workflow.versions import software_versions

CLASSIFIER_NAMES = {
    "mlp": "multilayer perceptron",
    "ldnn": "logistic disjunctive normal network",
    "extra_trees": "extremely randomised trees",
    "random_forest": "random forest",
    "hist_gradient_boosting": "histogram gradient boosting",
}


def checksum_job(paths, out_path):
    """Write ``<sha256>  <path>`` lines for the input files of one dataset (an audit record)."""
    lines = [f"{file_sha256(p)}  {p}" for p in paths]
    write_text(out_path, "\n".join(lines) + "\n")
    return {"files": len(paths)}


def _fmt(values):
    return ", ".join(f"{v:g}" for v in values)


def _target_text(name, settings, scores, objects_settings, comparison, qc):
    cascade = settings["cascade"]
    test = scores[scores["role"] == "test"].iloc[0]
    val = scores[scores["role"] == "validation"].iloc[0]
    obj = objects_settings
    hysteresis = (
        f"a threshold of {obj['high']:.2f}"
        if obj["high"] == obj["low"]
        else f"hysteresis thresholds of {obj['low']:.2f} and {obj['high']:.2f}"
    )
    morph = []
    if obj["open_radius_nm"]:
        morph.append(f"opened with a {obj['open_radius_nm']:g} nm ball")
    if obj["close_radius_nm"]:
        morph.append(f"closed with a {obj['close_radius_nm']:g} nm ball")
    if obj["fill_holes"]:
        morph.append("enclosed cavities filled")
    limits = []
    if obj["min_volume_um3"]:
        limits.append(f"smaller than {obj['min_volume_um3']:g} µm³")
    if obj["max_volume_um3"] is not None:
        limits.append(f"larger than {obj['max_volume_um3']:g} µm³")
    size = f"objects {' or '.join(limits)} were removed" if limits else "no size limit was applied"
    text = (
        f"**{name.capitalize()}** were segmented at {settings['downsample']}× in-plane downsampling with a cascaded "
        f"hierarchical model (Seyedhosseini, Sajjadi & Tasdizen, ICCV 2013; Seyedhosseini & Tasdizen, TPAMI 2016) of "
        f"{cascade['stages']} stages × {cascade['levels']} levels, each node a "
        f"{CLASSIFIER_NAMES.get(cascade['classifier'], cascade['classifier'])} on a "
        f"Gaussian-derivative filter bank (σ = {_fmt(cascade['sigmas'])} px; {_fmt(cascade['coarse_sigmas'])} px at "
        f"coarser levels) with context sampled at radii {_fmt(cascade['stencil_radii'])} px, trained with "
        f"{cascade['folds']}-fold out-of-fold context ({cascade['samples_per_tile']} class-balanced pixels per tile, "
        f"seed {cascade['seed']}). Annotated tiles of {settings['tiles']['size']} px were split per dataset into "
        f"training, validation and test tiles at least {settings['split']['guard_sections']} sections apart. The "
        f"probability threshold ({val['threshold']:.2f}) was chosen for the best F1 on {int(val['tiles'])} validation "
        f"tiles; on {int(test['tiles'])} held-out test tiles pixel precision was {test['precision']:.3f}, recall "
        f"{test['recall']:.3f}, F1 {test['f1']:.3f} and Jaccard index {test['jaccard']:.3f}. Whole volumes were "
        f"predicted block by block with a halo of the model's receptive field, which gives the same result as "
        f"predicting each volume in one piece. Probability maps were thresholded with {hysteresis}"
        + (f", {', '.join(morph)}" if morph else "")
        + f"; {size}, and {obj['connectivity']}-connected voxels formed one object. "
    )
    if comparison is not None and not comparison.empty:
        parts = []
        for row in comparison.itertuples(index=False):
            if row.measure in ("volume_um3", "region_objects", "region_N_V"):
                kind = "ratio" if row.scale == "ratio" else "difference"
                parts.append(
                    f"{row.measure} {row.condition} vs {row.reference}: {kind} {row.effect:.3g} "
                    f"({row.confidence:.0%} CI {row.ci_low:.3g}–{row.ci_high:.3g}; "
                    f"{row.animals} vs {row.reference_animals} animals)"
                )
        if parts:
            text += "Results with the animal as the unit: " + "; ".join(parts) + ". "
    return text


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
        Section QC tables (to count excluded sections).
    """
    qc = pd.concat(
        [pd.read_csv(p, sep="\t", keep_default_na=False) for p in qc_tables], ignore_index=True
    )
    excluded = int((qc["excluded"].astype(str) == "True").sum())
    animals = {r["subject"] for r in sheet_rows.values()}
    conditions = sorted({r["condition"] for r in sheet_rows.values()})
    c = config_sections
    text = [
        "# Methods (generated from this run)",
        "",
        (
            f"{len(sheet_rows)} datasets from {len(animals)} animals in {len(conditions)} conditions "
            f"({', '.join(conditions)}) were converted to OME-Zarr (NGFF 0.5; Moore et al. 2023) with tessera "
            f"{__version__}, run by Snakemake (Mölder et al. 2021). Each section was checked for sharpness (variance "
            f"of the Laplacian of a Gaussian, σ = {c['qc']['sharpness_sigma']:g} px), blank or torn area, intensity and "
            f"shift (phase correlation); {excluded} of {len(qc)} sections were flagged and "
            + (
                "excluded from training and flagged in the object tables. "
                if c["qc"]["exclude_flagged"]
                else "kept (exclusion switched off). "
            )
            + f"A pyramid of {c['pyramid']['levels']} block-averaged levels was built."
        ),
        "",
    ]
    for target, settings in c["targets"].items():
        used = [json.loads(Path(p).read_text(encoding="utf-8")) for p in object_settings[target]]
        comparison = (
            pd.read_csv(comparisons[target], sep="\t", keep_default_na=False)
            if target in comparisons
            else None
        )
        if comparison is not None:
            for col in ("effect", "ci_low", "ci_high"):
                comparison[col] = pd.to_numeric(comparison[col], errors="coerce")
        text += [
            _target_text(
                target, settings, pd.read_csv(scores[target], sep="\t"), used[0], comparison, qc
            ),
            "",
        ]
    text += [
        (
            "Morphometry used the voxel size throughout: surface area by marching cubes (Lorensen & Cline 1987), "
            "sphericity ψ = π^(1/3)(6V)^(2/3)/A (Wadell 1935), principal axes from second moments, 3D skeletons, and "
            "the mitochondrial complexity index (Vincent et al. 2019). QC-excluded sections were bridged by "
            "interpolating the probabilities of their neighbours; objects cut by the volume border were left out of "
            "size and shape summaries. Each measure was averaged per animal "
            "(geometric mean for sizes) and conditions were compared on the per-animal values (Welch interval, "
            f"{c['statistics']['confidence']:.0%}); objects were never treated as independent samples."
        ),
        "",
        "Automatic segmentation is a research measurement: the accuracies above hold for tiles like the annotated "
        "ones, and each new dataset should be validated against held-out annotation.",
        "",
        "Software: " + ", ".join(f"{k} {v}" for k, v in software_versions().items()) + ".",
        "",
        "Input data (SHA-256):",
        "",
    ]
    for path in checksums:
        for line in Path(path).read_text(encoding="utf-8").splitlines():
            digest, _, name = line.partition("  ")
            text.append(f"- `{name}`: `{digest}`")
    write_text(out_path, "\n".join(text) + "\n")
    return {"words": sum(len(t.split()) for t in text)}
