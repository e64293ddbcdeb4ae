"""A methods paragraph written from the run's own settings, results, software and data checksums.

Everything in the text comes from what the run used or produced, given as plain values: the
config subsections, the tile scores, the object settings, the statistics tables, the section
counts of QC, the installed package versions and the SHA-256 of every input file. So the
paragraph cannot drift from the analysis it describes.
"""

from tessera import __version__

CLASSIFIER_NAMES = {
    "mlp": "multilayer perceptron",
    "ldnn": "logistic disjunctive normal network",
    "extra_trees": "extremely randomised trees",
    "random_forest": "random forest",
    "hist_gradient_boosting": "histogram gradient boosting",
}


def _fmt(values):
    return ", ".join(f"{v:g}" for v in values)


def _target_text(name, settings, scores, objects_settings, comparison):
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


def _study_text(c, sheet_rows, section_counts):
    """The paragraph on the data: datasets, animals, conditions, section QC and the pyramid."""
    animals = {r["subject"] for r in sheet_rows.values()}
    conditions = sorted({r["condition"] for r in sheet_rows.values()})
    excluded, sections = section_counts["excluded"], section_counts["sections"]
    return (
        f"{len(sheet_rows)} datasets from {len(animals)} animals in {len(conditions)} conditions "
        f"({', '.join(conditions)}) were converted to OME-Zarr (NGFF 0.5; Moore et al. 2023) with tessera "
        f"{__version__}, run by Snakemake (Mölder et al. 2021). Each section was checked for sharpness (variance "
        f"of the Laplacian of a Gaussian, σ = {c['qc']['sharpness_sigma']:g} px), blank or torn area, intensity and "
        f"shift (phase correlation); {excluded} of {sections} sections were flagged and "
        + (
            "excluded from training and flagged in the object tables. "
            if c["qc"]["exclude_flagged"]
            else "kept (exclusion switched off). "
        )
        + f"A pyramid of {c['pyramid']['levels']} block-averaged levels was built."
    )


def _closing_lines(c, software, checksums):
    """Morphometry and statistics, the caveat, the software and the input checksums."""
    lines = [
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
        "Software: " + ", ".join(f"{k} {v}" for k, v in software.items()) + ".",
        "",
        "Input data (SHA-256):",
        "",
    ]
    return lines + [f"- `{name}`: `{digest}`" for digest, name in checksums]


def _objects_3d_text(objects_3d):
    """One sentence on the 3D object scores of every target that has them ('' if none).

    Examples
    --------
    >>> row = {"truth_source": "instance volume", "sections": 12, "object_f1": 0.8,
    ...        "object_precision": 0.75, "object_recall": 0.857, "arand": 0.1,
    ...        "voi_split": 0.2, "voi_merge": 0.3}
    >>> _objects_3d_text({"mitochondria": row})[:56]
    'In 3D, the mitochondria objects on 12 held-out test sect'
    """
    parts = [
        f"the {name} objects on {int(row['sections'])} held-out test sections matched the true "
        f"objects ({row['truth_source']}) with F1 {row['object_f1']:.3f} (precision "
        f"{row['object_precision']:.3f}, recall {row['object_recall']:.3f}; adapted Rand error "
        f"{row['arand']:.3f}, VOI split {row['voi_split']:.3f} and merge {row['voi_merge']:.3f} "
        "bits)"
        for name, row in (objects_3d or {}).items()
    ]
    if not parts:
        return ""
    return (
        "In 3D, " + "; ".join(parts) + "; objects were matched one-to-one at an intersection "
        "over union above 0.5."
    )


def methods_text(
    config_sections,
    sheet_rows,
    *,
    scores,
    object_settings,
    comparisons,
    section_counts,
    checksums,
    software,
    objects_3d=None,
):
    """The methods paragraph (Markdown) of the study.

    Parameters
    ----------
    config_sections : dict
        ``qc``, ``pyramid``, ``statistics`` and ``targets`` of the validated config (targets in
        the order they are described).
    sheet_rows : dict
        Dataset id → ``{"condition", "subject"}``.
    scores : dict
        Target → tile scores table (a ``validation`` and a ``test`` row).
    object_settings : dict
        Target → the settings the objects step used (as it records them).
    comparisons : dict
        Target → statistics comparison table; a target without one gets no results sentence.
    section_counts : dict
        ``sections`` and ``excluded``: sections checked by QC, and those it flagged.
    checksums : sequence of (str, str)
        ``(sha256, file)`` of every input file.
    software : dict
        Package → version, listed as given.
    objects_3d : dict, optional
        Target → the pooled 3D object scores on the held-out sections (``truth_source``,
        ``sections``, ``object_f1``, ``object_precision``, ``object_recall``, ``arand``,
        ``voi_split``, ``voi_merge``); targets without them get no sentence.

    Returns
    -------
    str

    Examples
    --------
    >>> sections = {"qc": {"sharpness_sigma": 1.5, "exclude_flagged": True},
    ...             "pyramid": {"levels": 3}, "statistics": {"confidence": 0.95}, "targets": {}}
    >>> text = methods_text(sections, {"a": {"condition": "warm", "subject": "m1"}}, scores={},
    ...                     object_settings={}, comparisons={},
    ...                     section_counts={"sections": 40, "excluded": 2},
    ...                     checksums=[("ab12", "data/a.tif")], software={"numpy": "2.1.0"})
    >>> print(text.splitlines()[2][:58])
    1 datasets from 1 animals in 1 conditions (warm) were conv
    >>> "2 of 40 sections were flagged and excluded from training" in text
    True
    >>> text.splitlines()[-5:]
    ['Software: numpy 2.1.0.', '', 'Input data (SHA-256):', '', '- `data/a.tif`: `ab12`']
    """
    c = config_sections
    text = [
        "# Methods (generated from this run)",
        "",
        _study_text(c, sheet_rows, section_counts),
        "",
    ]
    for target, settings in c["targets"].items():
        text += [
            _target_text(
                target, settings, scores[target], object_settings[target], comparisons.get(target)
            ),
            "",
        ]
    text += [_objects_3d_text(objects_3d), ""] if objects_3d else []
    text += _closing_lines(c, software, checksums)
    return "\n".join(text) + "\n"
