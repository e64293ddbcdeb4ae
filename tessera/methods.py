"""A methods paragraph written from the run's own settings, results, software and data checksums.

Everything in the text comes from what the run used or produced, given as plain values: the
config subsections, the tile scores, the object settings, the statistics tables, the section
counts of QC, the installed package versions and the SHA-256 of every input file. So the
paragraph cannot drift from the analysis it describes.
"""

import math

from tessera import __version__
from tessera.cascade.across_sections import AUTO_SECTION_RULE, section_sigma
from tessera.cascade.features import default_sigmas
from tessera.interval_caution import MIN_TEST_TILES
from tessera.object_scores import mostly_cut
from tessera.objects.depth_limit import AUTO_DEPTH_RULE
from tessera.spacing import NEAR_ISOTROPIC_ASPECT

CLASSIFIER_NAMES = {
    "mlp": "multilayer perceptron",
    "ldnn": "logistic disjunctive normal network",
    "extra_trees": "extremely randomised trees",
    "random_forest": "random forest",
    "hist_gradient_boosting": "histogram gradient boosting",
}


def _fmt(values):
    return ", ".join(f"{v:g}" for v in values)


def _bank_text(cascade):
    """The finest level's filter bank as used: its dims and scales (unset scales follow dims).

    Examples
    --------
    >>> _bank_text({"sigmas": [1, 2], "dims": 2})
    'a 2D Gaussian-derivative filter bank of each section (σ = 1, 2 px'
    >>> _bank_text({"sigmas": None, "dims": 3})
    'a 3D Gaussian-derivative filter bank, round in nm (σ = 0.7, 1.6, 3.5, 5, 10 px'
    >>> _bank_text({"sigmas": None, "dims": "auto"})
    'a Gaussian-derivative filter bank (σ = 0.7, 1.6, 3.5, 7 px for 2D features, 0.7, 1.6, 3.5, 5, 10 px for 3D features'
    """
    dims = cascade.get("dims", 2)
    kind = {
        2: "a 2D Gaussian-derivative filter bank of each section",
        3: "a 3D Gaussian-derivative filter bank, round in nm",
    }.get(dims, "a Gaussian-derivative filter bank")
    if cascade.get("sigmas") is not None:
        return f"{kind} (σ = {_fmt(cascade['sigmas'])} px"
    if dims in (2, 3):
        return f"{kind} (σ = {_fmt(default_sigmas(dims))} px"
    return (
        f"{kind} (σ = {_fmt(default_sigmas(2))} px for 2D features, "
        f"{_fmt(default_sigmas(3))} px for 3D features"
    )


def _neighbours_text(neighbours):
    """The intensity of the sections around, when a 2D model read it.

    Examples
    --------
    >>> _neighbours_text(0), _neighbours_text(1), _neighbours_text(2)
    ('', ', plus the intensity of the section above and below', ', plus the intensity of the 2 sections above and below')
    """
    if not neighbours:
        return ""
    which = "the section" if neighbours == 1 else f"the {neighbours} sections"
    return f", plus the intensity of {which} above and below"


def _orientations_text(orientations):
    """How many orientations of each training tile were used, when more than one.

    Examples
    --------
    >>> _orientations_text(1), _orientations_text(4)
    ('', ' shared among 4 orientations of the tile (transposed and flipped)')
    """
    if orientations == 1:
        return ""
    turns = {2: "transposed", 4: "transposed and flipped"}.get(
        orientations, "every flip and quarter turn"
    )
    return f" shared among {orientations} orientations of the tile ({turns})"


def _unsure_text(test):
    """The share of test pixels left out of the scores as unsure, when there were any."""
    fraction = float(test.get("unsure_fraction", 0.0))
    if not fraction > 0:  # none, or a table written before the column existed (NaN)
        return ""
    return (
        f" ({fraction:.1%} of the test pixels, marked unsure by the annotator, were left out; "
        "scores over whole objects, borders included, are lower)"
    )


def _few_tiles_text(tiles, informative_tiles):
    """A caution when the test scores rest on fewer tiles than an interval needs, counting
    only the tiles that hold a true or predicted target pixel.

    Examples
    --------
    >>> _few_tiles_text(12, 12)
    ''
    >>> _few_tiles_text(3, 3)
    ' (3 test tiles are too few for a dependable interval on these figures)'
    >>> _few_tiles_text(5, 1)
    ' (only 1 of the 5 test tiles held the target or a prediction: too few for a dependable interval on these figures)'
    """
    k = informative_tiles
    if k >= MIN_TEST_TILES:
        return ""
    if k == tiles:
        return f" ({_plural(tiles, 'test tile')} {'is' if tiles == 1 else 'are'} too few for a dependable interval on these figures)"
    return (
        f" (only {k} of the {tiles} test tiles held the target or a prediction: too few for a "
        "dependable interval on these figures)"
    )


def _ladder_clause(cascade):
    """How the cascade's size was chosen, when a ladder chose it (tessera.ladder)."""
    if cascade.get("mode") != "ladder":
        return ""
    return (
        " (chosen among the configured size and larger ones as the best pixel F1 on the "
        "validation tiles, ties going to the model with fewer nodes)"
    )


def _split_text(obj):
    """How touching organelles were separated, or nothing when splitting was off."""
    if not obj.get("split"):
        return ""
    return (
        "Touching organelles were then separated by a seeded watershed on the Euclidean distance "
        "to the background in nm, seeds being maxima of that distance at least "
        f"{obj['split_min_depth_nm']:g} nm above their saddle"
        + (f" ({AUTO_DEPTH_RULE})" if obj.get("split_min_depth_setting") == "auto" else "")
        + _valley_text(obj.get("split_valley_probability"))
        + "; size limits applied before splitting. "
    )


def _valley_text(valley):
    """How the probability took part in the split, or nothing when it did not."""
    if valley is None:
        return ""
    return (
        f", the distance being first scaled by min(p / {valley:g}, 1) with p the probability, "
        "so that a probability valley between touching organelles counts as a saddle"
    )


def _smoothing_text(settings):
    """The sentence on the final map's smoothing, in plane and across sections."""
    in_plane = settings.get("output_smoothing_px", 0.0)
    across = settings.get("output_smoothing_sections", 0.0)
    dims = settings.get("cascade", {}).get("dims")
    if across == "auto" and dims in (2, 3):
        # the rule applied to the cascade as trained: say what it gave
        across = section_sigma("auto", dims=dims)
    if across == "auto":
        across_text = f"across sections {AUTO_SECTION_RULE}"
    elif across:
        across_text = f"across sections a Gaussian of σ {across:g} sections"
    else:
        across_text = "no smoothing across sections"
    if not in_plane and not across:
        return "The final probability maps were not smoothed. "
    plane_text = (
        f"a Gaussian of σ {in_plane:g} px in plane" if in_plane else "no smoothing in plane"
    )
    return f"Before thresholding, the final probability maps were smoothed: {plane_text}, {across_text}. "


def _level_text(downsample):
    """The working level in words.

    Examples
    --------
    >>> _level_text(1), _level_text(2)
    ('the full-resolution images', 'the pyramid level downsampled 2×')
    """
    if downsample == 1:
        return "the full-resolution images"
    return f"the pyramid level downsampled {downsample}×"


def _tile_split_text(size, split, dims):
    """How the annotated tiles were divided between training, validation and test.

    Examples
    --------
    >>> _tile_split_text(128, {"guard_sections": 2, "test_datasets": None}, 2)[:62]
    'Annotated tiles of 128 px were split per dataset into contiguo'
    >>> _tile_split_text(128, {"guard_sections": 2, "test_datasets": ["f2"]}, 3)[:66]
    'Annotated tiles of 128 px of dataset f2 were held out whole as the'
    """
    guard = split["guard_sections"]
    held = list(split.get("test_datasets") or ())
    if held:
        names = ", ".join(held)
        return (
            f"Annotated tiles of {size} px of dataset{'s' if len(held) > 1 else ''} {names} were "
            "held out whole as the test set; the other datasets' tiles were split per dataset "
            "into contiguous ranges of sections for training and validation (threshold choice), "
            f"the validation tiles at least {guard} sections from every training tile."
        )
    text = (
        f"Annotated tiles of {size} px were split per dataset into contiguous ranges of sections "
        "for training, validation (threshold choice) and test, every held-out tile at least "
        f"{guard} sections from every training tile."
    )
    if dims == 3:
        text += (
            " In a near-isotropic stack an organelle spans many sections, so test tiles may lie "
            "on organelles whose other sections were trained on; the test scores are therefore "
            "not fully independent of training."
        )
    return text


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
        f"**{name.capitalize()}** were segmented on {_level_text(settings['downsample'])} with a cascaded "
        f"hierarchical model (Seyedhosseini, Sajjadi & Tasdizen, ICCV 2013; Seyedhosseini & Tasdizen, TPAMI 2016) of "
        f"{cascade['stages']} stages × {cascade['levels']} levels{_ladder_clause(cascade)}, each node a "
        f"{CLASSIFIER_NAMES.get(cascade['classifier'], cascade['classifier'])} on "
        f"{_bank_text(cascade)}; {_fmt(cascade['coarse_sigmas'])} px in 2D at "
        f"coarser levels{_neighbours_text(cascade.get('neighbours', 0))}) with context sampled at radii {_fmt(cascade['stencil_radii'])} px, trained with "
        f"{cascade['folds']}-fold out-of-fold context ({cascade['samples_per_tile']} class-balanced pixels per tile"
        f"{_orientations_text(cascade.get('orientations', 1))}, "
        f"seed {cascade['seed']}). {_tile_split_text(settings['tiles']['size'], settings['split'], cascade.get('dims'))} The "
        f"probability threshold ({val['threshold']:.2f}) was chosen for the best F1 on {int(val['tiles'])} validation "
        f"tiles; on {int(test['tiles'])} held-out test tiles pixel precision was {test['precision']:.3f}, recall "
        f"{test['recall']:.3f}, F1 {test['f1']:.3f} and Jaccard index {test['jaccard']:.3f}"
        f"{_unsure_text(test)}{_few_tiles_text(int(test['tiles']), int(test['informative_tiles']))}. Whole volumes were "
        f"predicted block by block with a halo of the model's receptive field, which gives the same result as "
        f"predicting each volume in one piece. {_smoothing_text(settings)}Probability maps were thresholded with {hysteresis}"
        + (f", {', '.join(morph)}" if morph else "")
        + f"; {size}, and {obj['connectivity']}-connected voxels formed one object. "
        + _split_text(obj)
    )
    text += _results_text(name, comparison)
    return text


#: The measures the results sentence quotes (the others are in the comparison table).
QUOTED_MEASURES = ("volume_um3", "region_objects", "region_N_V")


def _results_text(name, comparison):
    """The results sentence of one target: quoted comparisons, or why there are none."""
    if comparison is None:
        return ""
    if comparison.empty:
        return (
            f"The study has one condition, so nothing was compared: {name} measures were "
            "described per animal and per condition. "
        )
    parts = [
        _result_phrase(row)
        for row in comparison.to_dict("records")
        if row["measure"] in QUOTED_MEASURES
    ]
    return "Results with the animal as the unit: " + "; ".join(parts) + ". " if parts else ""


def _finite(*values):
    return all(math.isfinite(float(v)) for v in values)


def _result_phrase(row):
    """One comparison in words: the effect with its interval, without one, or why it is missing.

    Examples
    --------
    >>> row = {"measure": "volume_um3", "condition": "cold", "reference": "warm",
    ...        "scale": "ratio", "effect": 1.24, "ci_low": 1.1, "ci_high": 1.4,
    ...        "confidence": 0.95, "animals": 3, "reference_animals": 3, "warning": ""}
    >>> _result_phrase(row)
    'volume_um3 cold vs warm: ratio 1.24 (95% CI 1.1–1.4; 3 vs 3 animals)'
    >>> _result_phrase({**row, "ci_low": float("nan"), "ci_high": float("nan"), "animals": 1,
    ...     "warning": "no interval: only 1 animal measured in 'cold'; use at least 3 animals per condition"})
    "volume_um3 cold vs warm: ratio 1.24 (1 vs 3 animals; no interval: only 1 animal measured in 'cold')"
    >>> _result_phrase({**row, "effect": float("nan"), "animals": 0, "warning": ""})
    'volume_um3 cold vs warm: not compared (0 vs 3 animals with a value)'
    """
    pair = f"{row['measure']} {row['condition']} vs {row['reference']}"
    counts = f"{row['animals']} vs {row['reference_animals']} animals"
    # the table's warning in words, without its closing advice (after the first ";")
    why = str(row.get("warning") or "").split(";")[0].strip()
    if not _finite(row["effect"]):
        why = why.removeprefix("no comparison: ")
        return f"{pair}: not compared ({why or counts + ' with a value'})"
    kind = "ratio" if row["scale"] == "ratio" else "difference"
    if not _finite(row["ci_low"], row["ci_high"]):
        return f"{pair}: {kind} {row['effect']:.3g} ({counts}; {why or 'no interval'})"
    interval = f"{row['confidence']:.0%} CI {row['ci_low']:.3g}–{row['ci_high']:.3g}"
    return f"{pair}: {kind} {row['effect']:.3g} ({interval}; {counts}{'; ' + why if why else ''})"


def _plural(count, word, plural=None):
    """``1 animal``, ``3 animals``.

    Examples
    --------
    >>> _plural(1, "animal"), _plural(0, "condition"), _plural(2, "analysis", "analyses")
    ('1 animal', '0 conditions', '2 analyses')
    """
    return f"{count} {word if count == 1 else plural or word + 's'}"


def _study_text(c, sheet_rows, section_counts, grey_mappings=None):
    """The paragraph on the data: datasets, animals, conditions, grey values, section QC and
    the pyramid."""
    animals = {r["subject"] for r in sheet_rows.values()}
    conditions = list(dict.fromkeys(r["condition"] for r in sheet_rows.values()))
    return (
        f"{_plural(len(sheet_rows), 'dataset')} from {_plural(len(animals), 'animal')} in "
        f"{_plural(len(conditions), 'condition')} ({', '.join(conditions)}) "
        f"{'was' if len(sheet_rows) == 1 else 'were'} converted to OME-Zarr (NGFF 0.5; Moore et al. "
        f"2023) with tessera {__version__}, run by Snakemake (Mölder et al. 2021). "
        + _grey_text(grey_mappings or {})
        + _qc_sentence(c, section_counts)
        + f" A pyramid of {c['pyramid']['levels']} block-averaged levels beyond full resolution was built"
        + _pyramid_z_text(c["pyramid"].get("downsample_z", "auto"))
    )


def _held_out_animals_text(split, annotated, sheet_rows):
    """Whether the stacks held out whole come from animals that training stacks come from too
    ("" when they do not, or when no stack is held out).

    Examples
    --------
    >>> rows = {"a1": {"subject": "m1"}, "a2": {"subject": "m1"}, "b1": {"subject": "m2"}}
    >>> _held_out_animals_text({"test_datasets": ["b1"]}, None, rows)
    ''
    >>> _held_out_animals_text({"test_datasets": ["a2"]}, None, rows)
    'The held-out stack a2 comes from animal m1, whose other stacks were trained on: it tests the model on new stacks, not on new animals. '
    """
    held = list(split.get("test_datasets") or ())
    if not held:
        return ""
    trained = [d for d in (annotated or sheet_rows) if d not in set(held)]
    shared = sorted(
        {sheet_rows[d]["subject"] for d in held if d in sheet_rows}
        & {sheet_rows[d]["subject"] for d in trained if d in sheet_rows}
    )
    if not shared:
        return ""
    many = len(held) > 1
    return (
        f"The held-out {'stacks' if many else 'stack'} {', '.join(held)} "
        f"{'come' if many else 'comes'} from {'animals' if len(shared) > 1 else 'animal'} "
        f"{', '.join(shared)}, whose other stacks were trained on: "
        f"{'they test' if many else 'it tests'} the model on new stacks, not on new animals. "
    )


def _unannotated_text(name, annotated, sheet_rows):
    """Which datasets gave no tiles of a target ("" when all did, or when not known).

    Examples
    --------
    >>> rows = {d: {} for d in ("a1", "a2", "b1")}
    >>> _unannotated_text("mitochondria", ["a1", "a2", "b1"], rows)
    ''
    >>> _unannotated_text("mitochondria", ["a1"], rows)
    'Datasets a2 and b1 gave no mitochondria tiles: they were predicted and measured with the model trained on the others, without a held-out accuracy of their own. '
    """
    if annotated is None:
        return ""
    others = [d for d in sheet_rows if d not in set(annotated)]
    if not others:
        return ""
    names = others[0] if len(others) == 1 else ", ".join(others[:-1]) + " and " + others[-1]
    return (
        f"{'Dataset' if len(others) == 1 else 'Datasets'} {names} gave no {name} tiles: "
        f"{'it was' if len(others) == 1 else 'they were'} predicted and measured with the model "
        "trained on the others, without a held-out accuracy of "
        f"{'its' if len(others) == 1 else 'their'} own. "
    )


def _grey_text(grey_mappings):
    """How stacks of more than 8 bits were brought to 8 bits (ingest's recorded mappings).

    Examples
    --------
    >>> _grey_text({"a": None, "b": None})
    ''
    >>> m = {"method": "percentile stretch", "percentiles": [0.1, 99.9], "source_dtype": "uint16"}
    >>> print(_grey_text({"a": m, "b": None}))  # doctest: +NORMALIZE_WHITESPACE
    1 of the 2 stacks (uint16) was mapped linearly to 8 bits between its own grey-value
    percentiles 0.1 and 99.9, which depend on what the stack holds: grey values are comparable
    within a stack, not between stacks.
    >>> _grey_text({"a": m})[:40], _grey_text({"a": m, "b": m})[:42]
    ('The stack (uint16) was mapped linearly t', 'All 2 stacks (uint16) were mapped linearly')
    """
    stretched = [m for m in grey_mappings.values() if m and m["method"] == "percentile stretch"]
    if not stretched:
        return ""
    k, n = len(stretched), len(grey_mappings)
    dtypes = ", ".join(sorted({m["source_dtype"] for m in stretched}))
    low, high = (f"{p:g}" for p in stretched[0]["percentiles"])
    which = {n: "the stack" if n == 1 else f"all {n} stacks"}.get(k, f"{k} of the {n} stacks")
    its, was = ("its", "was") if k == 1 else ("their", "were")
    return (
        f"{which[0].upper()}{which[1:]} ({dtypes}) {was} mapped linearly to 8 bits between "
        f"{its} own grey-value percentiles {low} and {high}, which depend on what the stack "
        "holds: grey values are comparable within a stack, not between stacks. "
    )


def _pyramid_z_text(downsample_z):
    """What each pyramid level averages, by the ``pyramid.downsample_z`` setting.

    Examples
    --------
    >>> _pyramid_z_text(False)
    ', each level averaging 2 × 2 pixels of the one before within each section.'
    >>> _pyramid_z_text("auto").split("; ")[1]
    'in near-isotropic stacks (sections at most 2× their pixel size) 2 sections as well.'
    """
    if downsample_z == "auto":
        return (
            ", each level averaging 2 × 2 pixels of the one before; in near-isotropic stacks "
            f"(sections at most {NEAR_ISOTROPIC_ASPECT:g}× their pixel size) 2 sections as well."
        )
    if downsample_z:
        return ", each level averaging 2 × 2 pixels over 2 sections of the one before."
    return ", each level averaging 2 × 2 pixels of the one before within each section."


def _qc_sentence(c, section_counts):
    """What section QC checked, how many sections it flagged for which reason, and what followed.

    `section_counts` holds ``sections`` and ``excluded``, and optionally ``flagged`` (default:
    the excluded ones) and ``reasons`` (reason → sections flagged for it; a section flagged for
    two reasons counts under both). Reasons are quoted as given, so a new kind needs no change
    here.

    Examples
    --------
    >>> c = {"qc": {"sharpness_sigma": 1.5}}
    >>> counts = {"sections": 40, "flagged": 3, "excluded": 3,
    ...           "reasons": {"flat": 1, "blurred": 2, "shift": 1}}
    >>> print(_qc_sentence(c, counts).split("; ")[1])
    QC flagged 3 of 40 sections (2 blurred, 1 flat, 1 shift
    >>> print(_qc_sentence(c, {"sections": 40, "excluded": 0}).split("; ")[1])
    QC flagged none of the 40 sections.
    """
    sections, excluded = section_counts["sections"], section_counts["excluded"]
    flagged = section_counts.get("flagged", excluded)
    reasons = section_counts.get("reasons") or {}
    checks = (
        "Each section was checked for sharpness (variance of the Laplacian of a Gaussian, "
        f"σ = {c['qc']['sharpness_sigma']:g} px), blank or torn area, intensity and shift "
        "(phase correlation)"
    )
    if not flagged:
        return f"{checks}; QC flagged none of the {sections} sections."
    ranked = sorted(reasons.items(), key=lambda item: (-item[1], item[0]))
    why = ", ".join(f"{n} {reason}" for reason, n in ranked)
    if sum(reasons.values()) > flagged:
        why += "; a section can have several reasons"
    text = f"{checks}; QC flagged {flagged} of {_plural(sections, 'section')}" + (
        f" ({why})" if why else ""
    )
    which = "which was" if flagged == 1 else "which were"
    read = " (the model read the nearest kept section in place of each)"
    if excluded == flagged:
        return f"{text}, {which} excluded from training and flagged in the object tables{read}."
    if excluded == 0:
        return f"{text}, {which} kept (exclusion switched off)."
    return (
        f"{text}, of which {excluded} were excluded from training and flagged in the object "
        f"tables{read}."
    )


def _statistics_sentence(c, sheet_rows):
    """How conditions were summarised and compared: against which reference, or not at all.

    Examples
    --------
    >>> c = {"statistics": {"confidence": 0.95, "reference_condition": None}}
    >>> rows = {"a": {"condition": "warm"}, "b": {"condition": "cold"}, "c": {"condition": "hot"}}
    >>> print(_statistics_sentence(c, rows).split(". ")[1])
    Each other condition (cold, hot) was compared with the reference condition, warm (the first condition of the datasets sheet), on the per-animal values (two-sided Welch t-test and interval, 95%, which allow unequal numbers of animals per condition; sizes on the log scale, as ratios; p-values also Holm-adjusted over every comparison of the target); objects were never treated as independent samples.
    >>> print(_statistics_sentence(c, {"a": {"condition": "warm"}}).split(". ")[1])
    With one condition (warm) nothing was compared: each measure was described per animal and per condition; objects were never treated as independent samples.
    """
    stats = c["statistics"]
    conditions = list(dict.fromkeys(r["condition"] for r in sheet_rows.values()))
    text = "Each measure was averaged per animal (geometric mean for sizes). "
    if len(conditions) < 2:
        text += (
            f"With one condition ({', '.join(conditions)}) nothing was compared: each measure was "
            "described per animal and per condition"
        )
    else:
        reference = stats.get("reference_condition")
        why = "set in the config" if reference else "the first condition of the datasets sheet"
        reference = reference or conditions[0]
        others = ", ".join(x for x in conditions if x != reference)
        text += (
            f"Each other condition ({others}) was compared with the reference condition, "
            f"{reference} ({why}), on the per-animal values (two-sided Welch t-test and interval, "
            f"{stats['confidence']:.0%}, which allow unequal numbers of animals per condition; "
            "sizes on the log scale, as ratios; p-values also Holm-adjusted over every comparison "
            "of the target)"
        )
    return text + "; objects were never treated as independent samples."


def _closing_lines(c, sheet_rows, software, checksums):
    """Morphometry and statistics, the caveat, the software and the input checksums."""
    lines = [
        (
            "Morphometry used the voxel size throughout: surface area by marching cubes (Lorensen & Cline 1987), "
            "sphericity ψ = π^(1/3)(6V)^(2/3)/A (Wadell 1935), principal axes from second moments, 3D skeletons "
            "(side branches shorter than twice the local radius pruned), and the mitochondrial complexity index "
            "(Vincent et al. 2019). QC-excluded sections were bridged by interpolating the probabilities of their "
            "neighbours; objects cut by the volume border, and those outside every region of a region mask, were "
            "left out of size and shape summaries. " + _statistics_sentence(c, sheet_rows)
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


def _whole_text(row):
    """How many true objects lay whole within the scored sections, when fewer than half did.

    Examples
    --------
    >>> _whole_text({"truth_whole": 7, "truth_objects": 102})
    '; only 7 of the 102 true objects lay whole within those sections and the volume, so most were scored on their cut part'
    >>> _whole_text({"truth_whole": 60, "truth_objects": 102}), _whole_text({})
    ('', '')
    """
    whole, total = row.get("truth_whole"), row.get("truth_objects")
    if whole is None or whole != whole or not mostly_cut(whole, total):
        return ""
    return (
        f"; only {int(whole)} of the {int(total)} true objects lay whole within those sections "
        "and the volume, so most were scored on their cut part"
    )


def _objects_3d_text(objects_3d):
    """One sentence on the 3D object scores of every target that has them ('' if none).

    Examples
    --------
    >>> row = {"truth_source": "instance volume", "sections": 12, "object_f1": 0.8,
    ...        "object_precision": 0.75, "object_recall": 0.857, "arand": 0.1,
    ...        "voi_split": 0.2, "voi_merge": 0.3, "voxel_jaccard": 0.9}
    >>> _objects_3d_text({"mitochondria": row})[:56]
    'In 3D, the mitochondria objects on 12 held-out test sect'
    """
    parts = [
        f"the {name} objects on {int(row['sections'])} held-out test sections matched the true "
        f"objects ({row['truth_source']}) with F1 {row['object_f1']:.3f} (precision "
        f"{row['object_precision']:.3f}, recall {row['object_recall']:.3f}; adapted Rand error "
        f"{row['arand']:.3f}, VOI split {row['voi_split']:.3f} and merge {row['voi_merge']:.3f} "
        f"bits; voxel Jaccard of the objects mask {row['voxel_jaccard']:.3f} at full resolution"
        f"{_whole_text(row)})"
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
    grey_mappings=None,
    annotated=None,
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
    grey_mappings : dict, optional
        Dataset → how ingest brought its stack to 8 bits (None for 8-bit data).
    annotated : dict, optional
        Target → the datasets that gave its tiles; the others are named as measured without
        a held-out accuracy of their own.

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
    1 dataset from 1 animal in 1 condition (warm) was converte
    >>> "QC flagged 2 of 40 sections, which were excluded from training" in text
    True
    >>> text.splitlines()[-5:]
    ['Software: numpy 2.1.0.', '', 'Input data (SHA-256):', '', '- `data/a.tif`: `ab12`']
    """
    c = config_sections
    text = [
        "# Methods (generated from this run)",
        "",
        _study_text(c, sheet_rows, section_counts, grey_mappings),
        "",
    ]
    for target, settings in c["targets"].items():
        text += [
            _target_text(
                target, settings, scores[target], object_settings[target], comparisons.get(target)
            )
            + _unannotated_text(target, (annotated or {}).get(target), sheet_rows)
            + _held_out_animals_text(settings["split"], (annotated or {}).get(target), sheet_rows),
            "",
        ]
    text += [_objects_3d_text(objects_3d), ""] if objects_3d else []
    text += _closing_lines(c, sheet_rows, software, checksums)
    return "\n".join(text) + "\n"
