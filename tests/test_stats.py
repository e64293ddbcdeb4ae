"""Study statistics with the animal as the unit, against scipy and statsmodels."""

import io
import logging
import math
import re
import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import stats as sps

from tessera.errors import TesseraInputError
from tessera.morphometry import measure_objects, region_densities
from tessera.objects.label import label_objects
from tessera.statistics import (
    COMPARISON_COLUMNS,
    animal_summaries,
    compare_conditions,
    describe_conditions,
    holm_adjusted,
    region_animal_summaries,
    summarise_study,
)
from tessera.statistics_plot import plot_conditions
from tessera.workflow.config import check_reference_condition
from tessera.workflow.files.comparison_table import read_comparison_table
from tessera.workflow.files.morphometry_tables import (
    write_object_measures,
    write_region_densities,
)
from tessera.workflow.jobs.statistics import statistics_job

TREATED_RATIO = 1.25  # the simulated condition effect on object volume


def simulated_study(seed, *, effect=None, animals=4, objects=60, animal_sd=0.08, object_sd=0.5):
    """Log-normal object volumes nested in animals nested in two conditions (textbook design:
    random intercept per animal, fixed condition effect on the log scale)."""
    effect = math.log(TREATED_RATIO) if effect is None else effect
    rng = np.random.default_rng(seed)
    rows = []
    for condition, shift in (("control", 0.0), ("treated", effect)):
        for a in range(animals):
            u = rng.normal(0, animal_sd)
            for v in rng.normal(shift + u, object_sd, objects):
                rows.append(
                    {
                        "subject": f"{condition}{a}",
                        "condition": condition,
                        "volume_um3": math.exp(v),
                        "touches_volume_border": False,
                        "touches_excluded_section": False,
                    }
                )
    return pd.DataFrame(rows)


def test_per_animal_comparison_equals_welch_on_animal_means():
    # Reference: scipy.stats.ttest_ind(equal_var=False) on the per-animal mean log volumes.
    objects = simulated_study(1)
    animals = animal_summaries(objects, measures=["volume_um3"])
    row = compare_conditions(animals, measures=["volume_um3"], reference="control").iloc[0]
    a = np.log(animals.loc[animals.condition == "treated", "volume_um3"])
    b = np.log(animals.loc[animals.condition == "control", "volume_um3"])
    ref = sps.ttest_ind(a, b, equal_var=False)
    low, high = ref.confidence_interval(0.95)
    assert row["p_value"] == pytest.approx(ref.pvalue)
    assert (math.log(row["ci_low"]), math.log(row["ci_high"])) == pytest.approx((low, high))
    assert row["scale"] == "ratio" and row["animals"] == 4


def test_effect_matches_a_mixed_model_from_statsmodels():
    # Reference: statsmodels MixedLM, log volume ~ condition with a random intercept per animal.
    # In a balanced design its fixed effect equals the difference of per-animal means.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # statsmodels' own import-time deprecation notices
        import statsmodels.formula.api as smf  # noqa: PLC0415 - under catch_warnings, see above

        objects = simulated_study(2, animal_sd=0.2)
        objects["log_volume"] = np.log(objects["volume_um3"])
        fit = smf.mixedlm("log_volume ~ condition", objects, groups=objects["subject"]).fit()
        low, high = fit.conf_int().loc["condition[T.treated]"]
    animals = animal_summaries(objects, measures=["volume_um3"])
    row = compare_conditions(animals, measures=["volume_um3"], reference="control").iloc[0]
    assert math.log(row["effect"]) == pytest.approx(fit.params["condition[T.treated]"], abs=1e-9)
    # Welch on 4 + 4 animals is the more cautious interval (t with few degrees of freedom)
    assert math.log(row["ci_low"]) <= low and math.log(row["ci_high"]) >= high


def test_known_effect_is_recovered_with_interval_excluding_no_change():
    objects = simulated_study(3, effect=math.log(1.25), animals=5)
    animals = animal_summaries(objects, measures=["volume_um3"])
    row = compare_conditions(animals, measures=["volume_um3"], reference="control").iloc[0]
    assert row["ci_low"] > 1.0 and row["ci_low"] < 1.25 < row["ci_high"]


def test_objects_are_not_independent_samples():
    # With animal variation, the naive object-level test is overconfident; ours is not.
    objects = simulated_study(4, effect=0.0, animal_sd=0.3, objects=400)
    naive = sps.ttest_ind(
        np.log(objects.loc[objects.condition == "treated", "volume_um3"]),
        np.log(objects.loc[objects.condition == "control", "volume_um3"]),
        equal_var=False,
    )
    animals = animal_summaries(objects, measures=["volume_um3"])
    row = compare_conditions(animals, measures=["volume_um3"], reference="control").iloc[0]
    assert row["p_value"] > naive.pvalue


def test_cut_objects_are_left_out_and_empty_animals_kept():
    objects = simulated_study(5, animals=1, objects=3)
    objects.loc[0, "touches_volume_border"] = True
    animals = animal_summaries(
        objects,
        measures=["volume_um3"],
        subjects={"control0": "control", "treated0": "treated", "spare": "control"},
    )
    assert animals.set_index("subject")["objects"].to_dict() == {
        "control0": 2,
        "spare": 0,
        "treated0": 3,
    }
    assert math.isnan(animals.set_index("subject").loc["spare", "volume_um3"])


def test_objects_outside_every_region_of_a_mask_are_left_out_of_sizes():
    # With a roi_mask (cells, say; 0 outside every region) the regions are what is measured:
    # objects in region 0 do not enter the per-animal sizes. Worked by hand: the geometric mean
    # of the volumes 1 and 4 in region 1 is 2; the 100 outside would make it 7.4.
    objects = pd.DataFrame(
        {
            "subject": "a",
            "condition": "warm",
            "volume_um3": [1.0, 4.0, 100.0],
            "region": [1, 1, 0],
            "touches_volume_border": False,
        }
    )
    row = animal_summaries(objects, measures=["volume_um3"]).iloc[0]
    assert (row["objects"], row["volume_um3"]) == (2, pytest.approx(2.0))


def test_one_animal_per_condition_warns_instead_of_failing(caplog):
    objects = simulated_study(6, animals=1)
    animals = animal_summaries(objects, measures=["volume_um3", "touches_volume_border"])
    with caplog.at_level(logging.WARNING):
        row = compare_conditions(animals, measures=["volume_um3"], reference="control").iloc[0]
    assert math.isnan(row["ci_low"]) and row["warning"].startswith(
        "no interval: only 1 animal measured in 'treated' and 'control', and an interval needs 2 per condition"
    )
    assert "use at least 3 animals per condition" in caplog.text


def test_unknown_reference_and_animal_in_two_conditions_are_refused():
    objects = simulated_study(7, animals=2)
    animals = animal_summaries(objects, measures=["volume_um3"])
    with pytest.raises(
        TesseraInputError, match="reference condition 'sham' has no animals; conditions are "
    ):
        compare_conditions(animals, measures=["volume_um3"], reference="sham")
    objects.loc[0, "condition"] = "treated"
    with pytest.raises(
        TesseraInputError, match=r"animal\(s\) \[.*\] appear under several conditions"
    ):
        animal_summaries(objects, measures=["volume_um3"])


# --- study shapes: every one runs to the end and says in words what it could not compute ---


def animals_table(values_by_condition, measure="volume_um3"):
    """Per-animal values as :func:`animal_summaries` returns them, conditions in dict order."""
    rows = [
        {"subject": f"{c}{k}", "condition": c, "objects": 5, measure: v}
        for c, values in values_by_condition.items()
        for k, v in enumerate(values)
    ]
    return pd.DataFrame(rows)


def test_one_condition_is_described_and_not_compared():
    # Reference: scipy.stats.gmean (the geometric mean of the per-animal values for sizes).
    animals = animals_table({"warm": [1.0, 2.0, 8.0]})
    animals["N_V"] = [1.0, 2.0, 6.0]
    comparison = compare_conditions(animals, measures=["volume_um3", "N_V"], reference="warm")
    assert comparison.empty and list(comparison.columns) == list(COMPARISON_COLUMNS)
    described = describe_conditions(animals, measures=["volume_um3", "N_V"]).set_index("measure")
    assert described.loc["volume_um3", "mean"] == pytest.approx(sps.gmean([1.0, 2.0, 8.0]))
    assert described.loc["N_V", "mean"] == pytest.approx(np.mean([1.0, 2.0, 6.0]))
    assert described.loc["volume_um3", ["lowest", "highest"]].tolist() == [1.0, 8.0]
    assert (described["measured_animals"] == 3).all() and (described["note"] == "").all()


def test_one_animal_per_condition_gives_the_effect_and_says_why_there_is_no_interval():
    # Reference: scipy's Welch test is undefined with one value per group (NaN statistic).
    animals = animals_table({"warm": [2.0], "cold": [3.0]})
    row = compare_conditions(animals, measures=["volume_um3"], reference="warm").iloc[0]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # scipy warns about the degrees of freedom
        assert math.isnan(sps.ttest_ind([3.0], [2.0], equal_var=False).pvalue)
    assert row["effect"] == pytest.approx(1.5)  # ratio of the two animals' values
    assert math.isnan(row["ci_low"]) and math.isnan(row["p_value"])
    assert row["warning"] == (
        "no interval: only 1 animal measured in 'cold' and 'warm', and an interval needs 2 per condition; "
        "use at least 3 animals per condition"
    )
    note = describe_conditions(animals, measures=["volume_um3"])["note"]
    assert note.tolist() == ["one animal: no spread between animals"] * 2


def test_three_conditions_each_against_the_stated_reference_in_sheet_order():
    # Reference: scipy.stats.ttest_ind(equal_var=False) of each condition against the reference.
    values = {"warm": [1.3, 1.2], "thermoneutral": [1.0, 1.2, 1.1], "cold": [1.5, 1.7, 1.4, 1.6]}
    animals = animals_table(values, measure="N_V")
    table = compare_conditions(
        animals,
        measures=["N_V"],
        reference="thermoneutral",
        conditions=["warm", "thermoneutral", "cold"],
    )
    assert table["condition"].tolist() == ["warm", "cold"]  # the sheet's order, not sorted
    assert set(table["reference"]) == {"thermoneutral"}
    for row in table.to_dict("records"):
        ref = sps.ttest_ind(values[row["condition"]], values["thermoneutral"], equal_var=False)
        assert row["p_value"] == pytest.approx(ref.pvalue)
        assert (row["ci_low"], row["ci_high"]) == pytest.approx(tuple(ref.confidence_interval()))
    assert table["warning"].tolist() == [
        "interval unreliable: only 2 animals measured in 'warm'; use at least 3 animals per condition",
        "",
    ]


def test_unbalanced_animals_use_welch_not_a_pooled_variance():
    # Reference: scipy.stats.ttest_ind(equal_var=False) (Welch–Satterthwaite); with 3 against 7
    # animals of unequal spread the pooled (Student) interval differs, so the check can tell them apart.
    values = {"control": [1.0, 1.5, 0.7], "treated": [2.0, 2.1, 1.9, 2.05, 1.95, 2.2, 1.8]}
    animals = animals_table(values, measure="N_V")
    row = compare_conditions(animals, measures=["N_V"], reference="control").iloc[0]
    welch = sps.ttest_ind(values["treated"], values["control"], equal_var=False)
    student = sps.ttest_ind(values["treated"], values["control"], equal_var=True)
    assert (row["animals"], row["reference_animals"]) == (7, 3)
    assert row["p_value"] == pytest.approx(welch.pvalue)
    assert (row["ci_low"], row["ci_high"]) == pytest.approx(tuple(welch.confidence_interval()))
    assert row["ci_low"] != pytest.approx(student.confidence_interval().low, rel=1e-3)


def test_no_spread_gives_no_p_value_and_says_why():
    # Reference: scipy.stats.ttest_ind(equal_var=False) gives t = -inf and p = 0 when neither
    # group varies but their means differ, and NaN when they are equal: the statistic is
    # undefined (zero standard error). The table gives no p-value in either case (so nothing
    # reads as p = 0), keeps scipy's zero-width interval, and says why in words.
    animals = animals_table({"warm": [2.0, 2.0, 2.0], "cold": [3.0, 3.0, 3.0]}, measure="N_V")
    row = compare_conditions(animals, measures=["N_V"], reference="warm").iloc[0]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # scipy warns about the division by zero
        ref = sps.ttest_ind([3.0] * 3, [2.0] * 3, equal_var=False)
    assert ref.pvalue == 0.0 and np.isinf(ref.statistic)
    assert (row["ci_low"], row["ci_high"]) == tuple(ref.confidence_interval())
    assert np.isnan(row["p_value"]) and np.isnan(row["p_holm"])
    assert row["warning"].startswith("no test: the per-animal values do not vary")


def test_holm_adjustment_equals_statsmodels():
    # Reference: statsmodels.stats.multitest.multipletests(method="holm") on the tested p-values;
    # an untested comparison (NaN) is neither adjusted nor counted.
    from statsmodels.stats.multitest import multipletests

    p = np.random.default_rng(3).uniform(0, 0.2, 12)
    p[[2, 7]] = np.nan
    ours = holm_adjusted(p)
    tested = np.isfinite(p)
    assert np.isnan(ours[~tested]).all()
    np.testing.assert_allclose(ours[tested], multipletests(p[tested], method="holm")[1])


def test_comparisons_carry_p_values_adjusted_over_the_whole_table():
    # Three conditions against a reference on two measures: four tests, one family.
    rng = np.random.default_rng(4)
    values = {c: rng.normal(m, 0.2, 4) for c, m in (("ref", 1.0), ("a", 1.3), ("b", 1.05))}
    animals = animals_table(values, measure="N_V")
    animals["V_V"] = rng.normal(0.1, 0.01, len(animals))
    table = compare_conditions(animals, measures=["N_V", "V_V"], reference="ref")
    assert len(table) == 4
    np.testing.assert_allclose(table["p_holm"], holm_adjusted(table["p_value"]))
    assert (table["p_holm"] >= table["p_value"]).all()


def small_dataset(boxes, *, shape=(6, 16, 16), spacing=(50, 20, 20)):
    """Object and region tables of one dataset made as the pipeline makes them: labelled from a
    probability volume with cubes of 0.9 at `boxes` (z, y, x, side), then measured."""
    prob = np.zeros(shape, np.float32)
    for z, y, x, side in boxes:
        prob[z : z + side, y : y + side, x : x + side] = 0.9
    labels = np.zeros(shape, np.uint32)
    table = label_objects(prob, labels, spacing=spacing, high=0.5, block=shape)
    measured = measure_objects(labels, table, spacing=spacing)
    regions, home = region_densities(labels, None, measured, spacing=spacing)
    measured["region"] = home.to_numpy()
    return measured, regions


INSIDE = [(1, 2, 2, 3), (1, 8, 8, 4)]  # two whole cubes
AT_BORDER = [(0, 2, 2, 3), (2, 10, 10, 6)]  # both touch the volume border


def test_a_dataset_without_objects_keeps_its_animal_with_no_value():
    sheet = {
        "w1": {"condition": "warm", "subject": "m1"},
        "w2": {"condition": "warm", "subject": "m2"},
        "c1": {"condition": "cold", "subject": "m3"},
    }
    made = {"w1": small_dataset(INSIDE), "w2": small_dataset([]), "c1": small_dataset(INSIDE)}
    assert made["w2"][0].empty  # the pipeline's own empty table, columns and all
    _, animals, comparison = summarise_study(
        {d: m[0] for d, m in made.items()},
        {d: m[1] for d, m in made.items()},
        sheet,
        target="mito",
        measures=["volume_um3"],
        accuracy={"test_f1": 0.9},
    )
    m2 = animals.set_index("subject").loc["m2"]
    assert m2["objects"] == 0 and math.isnan(m2["volume_um3"]) and m2["region_objects"] == 0
    volume = comparison.set_index("measure").loc["volume_um3"]
    assert (volume["animals"], volume["reference_animals"]) == (1, 1)
    # the animal left out is said so, not dropped silently
    assert volume["warning"].endswith(
        "; 1 of 2 animals in 'warm' without a whole object to measure, left out"
    )
    described = describe_conditions(animals, measures=["volume_um3"]).set_index("condition")
    assert described.loc["warm", "note"] == (
        "1 of 2 animals without a whole object to measure, left out of the mean; one animal: no "
        "spread between animals"
    )


def test_a_target_without_whole_objects_is_not_compared_and_says_why():
    sheet = {f"d{k}": {"condition": c, "subject": f"m{k}"} for k, c in enumerate(["warm", "cold"])}
    made = {d: small_dataset(AT_BORDER) for d in sheet}
    assert all(m[0]["touches_volume_border"].all() for m in made.values())
    objects, animals, comparison = summarise_study(
        {d: m[0] for d, m in made.items()},
        {d: m[1] for d, m in made.items()},
        sheet,
        target="nuclei",
        measures=["volume_um3", "sphericity"],
        accuracy={"test_f1": 0.9},
    )
    objects_rows = comparison[comparison["measure"].isin(["volume_um3", "sphericity"])]
    assert objects_rows["effect"].isna().all()
    assert set(objects_rows["warning"]) == {
        "no comparison: no animal in 'cold' or 'warm' has a whole object to measure"
    }
    # the region counts include cut objects, so they are still compared
    assert comparison.set_index("measure").loc["region_objects", "effect"] == 0
    titles = plot_conditions(
        objects, animals, comparison, io.BytesIO(), target="nuclei", accuracy={"test_f1": math.nan}
    )  # a target scored without test tiles has no test-tile F1
    assert titles[0] == "volume_um3\ncold/warm: not compared"
    assert "no test-tile F1 (no test tiles)" in titles[-1]
    assert not any("nan" in title.lower() for title in titles)


def test_skeleton_lengths_of_zero_count_in_the_animals_mean():
    # A compact object's skeleton is one point, of length 0; a geometric mean cannot hold a 0,
    # and leaving such objects out would average only the elongated ones. The arithmetic mean
    # of 0, 0 and 1.5 is 0.5, and conditions are compared as a difference.
    table = pd.DataFrame(
        {
            "subject": ["a", "a", "a", "b"],
            "condition": ["x", "x", "x", "y"],
            "skeleton_length_um": [0.0, 0.0, 1.5, 2.0],
            "touches_volume_border": False,
        }
    )
    animals = animal_summaries(table, measures=["skeleton_length_um"]).set_index("subject")
    assert animals.loc["a", "skeleton_length_um"] == pytest.approx(0.5)
    row = compare_conditions(animals.reset_index(), measures=["skeleton_length_um"], reference="x")
    assert row.iloc[0]["scale"] == "difference"


def test_an_animals_density_pools_its_regions_by_volume():
    # The ratio estimator of stereology (common practice): the density of several regions
    # together is their summed contents over their summed volume. A sliver of a cell at the
    # volume's side (0.31 um^3, no objects) beside a cell of 10 um^3 with N_V 3.8 per um^3
    # barely moves the animal's N_V; a plain mean over the two regions would halve it.
    regions = pd.DataFrame(
        {
            "subject": ["m1", "m1"],
            "region_volume_um3": [10.0, 0.31],
            "objects": [38, 0],
            "V_V": [0.12, 0.0],
            "S_V": [1.5, 0.0],
            "N_V": [3.8, 0.0],
        }
    )
    row = region_animal_summaries(regions).iloc[0]
    assert row["region_N_V"] == pytest.approx(3.8 * 10.0 / 10.31)  # 38 objects in 10.31 um^3
    assert row["region_V_V"] == pytest.approx(0.12 * 10.0 / 10.31)
    assert row["region_objects"] == 19.0  # objects per region stays a plain mean


# --- the statistics job on written tables, as the rule runs it ---


def write_study(folder, made, sheet_conditions):
    """Morphometry tables and a scores table on disk; returns the job's input arguments."""
    objects, regions, sheet = {}, {}, {}
    for k, (dataset, (measured, densities)) in enumerate(made.items()):
        objects[dataset] = folder / f"{dataset}_objects.tsv"
        regions[dataset] = folder / f"{dataset}_regions.tsv"
        write_object_measures(objects[dataset], measured)
        write_region_densities(regions[dataset], densities)
        sheet[dataset] = {"condition": sheet_conditions[k], "subject": f"m{k}"}
    scores = folder / "scores.tsv"
    pd.DataFrame(
        {"role": ["validation", "test"], "f1": [0.9, 0.88], "jaccard": [0.8, 0.79]}
    ).to_csv(scores, sep="\t", index=False)
    return {"object_tables": objects, "region_tables": regions, "datasets": sheet, "scores": scores}


def run_statistics(folder, made, conditions, **options):
    inputs = write_study(folder, made, conditions)
    outputs = {
        name: folder / f"{name}.{ext}"
        for name, ext in (("animals", "tsv"), ("comparison", "tsv"), ("conditions", "tsv"))
    }
    statistics_job(
        **inputs,
        out_animals=outputs["animals"],
        out_comparison=outputs["comparison"],
        out_conditions=outputs["conditions"],
        out_plot=folder / "conditions.png",
        target="mito",
        measures=["volume_um3", "sphericity"],
        **options,
    )
    assert (folder / "conditions.png").read_bytes()[:4] == b"\x89PNG"
    for path in outputs.values():  # no cell a person reads says nan
        assert not re.search(r"\bnan\b", path.read_text(), re.IGNORECASE), path.name
    tables = {name: pd.read_csv(path, sep="\t") for name, path in outputs.items()}
    tables["comparison"] = read_comparison_table(outputs["comparison"])
    return tables, inputs


def test_job_with_one_condition_writes_a_description_and_an_empty_comparison(tmp_path):
    made = {"d0": small_dataset(INSIDE), "d1": small_dataset(INSIDE[:1])}
    tables, _ = run_statistics(tmp_path, made, ["warm", "warm"])
    assert tables["comparison"].empty and "effect" in tables["comparison"].columns
    described = tables["conditions"].set_index("measure")
    assert set(described["condition"]) == {"warm"} and described["measured_animals"].min() == 2
    # Reference: scipy.stats.gmean of the two animals' own geometric means.
    per_animal = tables["animals"]["volume_um3"]
    assert described.loc["volume_um3", "mean"] == pytest.approx(sps.gmean(per_animal))


def test_job_compares_three_conditions_with_the_configured_reference(tmp_path):
    made = {f"d{k}": small_dataset(INSIDE[: 1 + k % 2]) for k in range(6)}
    conditions = ["hot", "warm", "cold", "warm", "hot", "cold"]
    tables, _ = run_statistics(tmp_path, made, conditions, reference="warm")
    comparison = tables["comparison"]
    assert set(comparison["reference"]) == {"warm"}
    # every other condition once per measure, in the sheet's order
    assert comparison.loc[comparison["measure"] == "volume_um3", "condition"].tolist() == [
        "hot",
        "cold",
    ]


def test_job_quotes_the_3d_object_scores_beside_every_comparison(tmp_path):
    # Counts are what a study publishes: the all row of the target's 3D object scores (a table
    # written here by hand) is copied beside each comparison; without it the columns are empty.
    made = {f"d{k}": small_dataset(INSIDE) for k in range(4)}
    conditions = ["warm", "cold", "warm", "cold"]
    scores_3d = tmp_path / "objects_3d.tsv"
    scores_3d.write_text(
        "dataset\ttruth_source\tobject_f1\tcount_error\n"
        "d0\tinstance volume\t0.8\t-0.1\nall\tinstance volume\t0.85\t-0.06\n"
    )
    tables, _ = run_statistics(tmp_path, made, conditions, objects_3d=scores_3d)
    comparison = tables["comparison"]
    assert comparison["object_f1_3d"].tolist() == [0.85] * len(comparison)
    assert comparison["count_error_3d"].tolist() == [-0.06] * len(comparison)
    without, _ = run_statistics(tmp_path / "none", made, conditions)
    assert without["comparison"]["object_f1_3d"].isna().all()


def test_job_default_reference_is_the_first_condition_of_the_sheet(tmp_path):
    made = {f"d{k}": small_dataset(INSIDE) for k in range(4)}
    tables, _ = run_statistics(tmp_path, made, ["warm", "cold", "warm", "cold"])
    assert set(tables["comparison"]["reference"]) == {"warm"}


def test_a_reference_the_sheet_lacks_is_refused_at_load_and_by_the_job(tmp_path):
    # at load (rules/common.smk), naming the config key and the sheet's conditions
    with pytest.raises(
        TesseraInputError,
        match=r"config/config.yaml: key statistics.reference_condition: 'sham' is not a condition "
        r"of the datasets sheet; its conditions are \['warm', 'cold'\]",
    ):
        check_reference_condition("sham", ["warm", "cold", "warm"])
    check_reference_condition(None, ["warm"])  # null: the first condition of the sheet
    # the job, called without the workflow, refuses it before writing anything
    made = {f"d{k}": small_dataset(INSIDE) for k in range(2)}
    with pytest.raises(TesseraInputError, match="reference condition 'sham' has no animals"):
        run_statistics(tmp_path, made, ["warm", "cold"], reference="sham")
    assert not (tmp_path / "comparison.tsv").exists() and not (tmp_path / "animals.tsv").exists()


def test_job_on_a_target_without_whole_objects_and_one_animal_per_condition(tmp_path):
    # The demo's nuclei: every object touches the volume border, one animal per condition.
    made = {"d0": small_dataset(AT_BORDER), "d1": small_dataset(AT_BORDER)}
    tables, _ = run_statistics(tmp_path, made, ["warm", "cold"])
    volume = tables["comparison"].set_index("measure").loc["volume_um3"]
    assert volume["warning"].startswith("no comparison: no animal in 'cold' or 'warm'")
    # empty cells come back as numbers (NaN), never as text
    assert math.isnan(volume["p_value"]) and math.isnan(volume["mean"])
    notes = tables["conditions"].set_index("measure").loc["volume_um3", "note"]
    assert set(notes) == {"no animal in this condition has a whole object to measure"}


def test_job_with_a_dataset_without_objects_and_unbalanced_animals(tmp_path):
    # 3 warm animals (one without any object) against 2 cold: read back from the written tables.
    made = {
        "d0": small_dataset(INSIDE),
        "d1": small_dataset([]),
        "d2": small_dataset(INSIDE[:1]),
        "d3": small_dataset(INSIDE),
        "d4": small_dataset(INSIDE[1:]),
    }
    tables, _ = run_statistics(tmp_path, made, ["warm", "warm", "warm", "cold", "cold"])
    animals = tables["animals"].set_index("subject")
    assert animals.loc["m1", "objects"] == 0 and math.isnan(animals.loc["m1", "volume_um3"])
    rows = tables["comparison"].set_index("measure")
    assert rows.loc["volume_um3", ["animals", "reference_animals"]].tolist() == [2, 2]
    assert rows.loc["region_objects", ["animals", "reference_animals"]].tolist() == [2, 3]
    # Reference: scipy.stats.ttest_ind(equal_var=False) on the per-animal object counts.
    counts = animals.groupby("condition")["region_objects"]
    ref = sps.ttest_ind(counts.get_group("cold"), counts.get_group("warm"), equal_var=False)
    assert rows.loc["region_objects", "p_value"] == pytest.approx(ref.pvalue)
