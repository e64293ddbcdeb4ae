"""Study statistics with the animal as the unit, against scipy and statsmodels."""

import logging
import math
import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import stats as sps

from tessera.errors import TesseraInputError
from tessera.statistics import animal_summaries, compare_conditions

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


def test_one_animal_per_condition_warns_instead_of_failing(caplog):
    objects = simulated_study(6, animals=1)
    animals = animal_summaries(objects, measures=["volume_um3", "touches_volume_border"])
    with caplog.at_level(logging.WARNING):
        row = compare_conditions(animals, measures=["volume_um3"], reference="control").iloc[0]
    assert math.isnan(row["ci_low"]) and row["warning"].startswith(
        "no interval: only 1 animal in 'treated' and 'control' (an interval needs 2 per condition)"
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
