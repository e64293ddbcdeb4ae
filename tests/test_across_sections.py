"""Smoothing of the final map across sections: scipy's Gaussian along z, the auto rule, and
refusal of bad settings naming the key."""

import numpy as np
import pytest
from scipy import ndimage

from tessera.cascade.across_sections import (
    AUTO_SECTION_SIGMA,
    mix_sections,
    section_sigma,
    sections_reach,
    smooth_across_sections,
)
from tessera.errors import TesseraInputError
from tessera.workflow.config import load_config


@pytest.mark.parametrize("sections", [1, 2, 3, 9])
@pytest.mark.parametrize("sigma", [0.4, 0.6, 1.3])
def test_smoothing_equals_scipy_gaussian_along_z_with_mirrored_ends(sections, sigma):
    # Reference: scipy.ndimage.gaussian_filter1d, mode "reflect" (half-sample symmetric, as
    # the image is mirrored beyond the volume), truncate 4; stacks shorter than the kernel's
    # reach mirror repeatedly, as scipy does.
    maps = np.random.default_rng(sections).random((sections, 6, 7)).astype(np.float32)
    reference = ndimage.gaussian_filter1d(maps, sigma, axis=0, mode="reflect", truncate=4.0)
    np.testing.assert_allclose(smooth_across_sections(maps, sigma), reference, atol=1e-6)


def test_a_section_reads_only_the_maps_within_reach_and_weights_sum_to_one():
    # A constant stack stays constant (the weights are normalised), and mix_sections asks only
    # for sections within int(4 sigma + 0.5) of its own, inside the volume.
    asked = []

    def map_of(z):
        asked.append(z)
        return np.full((2, 2), 0.25, np.float32)

    out = mix_sections(map_of, 5, 0.6, 20)
    assert sections_reach(0.6) == 2 and sorted(set(asked)) == [3, 4, 5, 6, 7]
    np.testing.assert_allclose(out, 0.25, rtol=1e-6)
    asked.clear()
    mix_sections(map_of, 0, 0.6, 20)  # sections -1 and -2 are read as 0 and 1
    assert sorted(set(asked)) == [0, 1, 2]


def test_auto_gives_smoothing_to_cascades_working_section_by_section_only():
    assert section_sigma("auto", dims=2) == AUTO_SECTION_SIGMA
    assert section_sigma("auto", dims=3) == 0.0
    assert section_sigma(0, dims=2) == 0.0 and section_sigma(1.5, dims=3) == 1.5


@pytest.mark.parametrize("setting", [-1, 9, "0.6 sections", True, float("nan")])
def test_bad_settings_are_refused(setting):
    with pytest.raises(TesseraInputError, match="output_smoothing_sections must be"):
        section_sigma(setting, dims=2)


def test_config_refuses_bad_smoothing_across_sections_naming_the_key(repo):
    def config(**target):
        mito = {"downsample": 2, "annotations": {"labels": "{dataset}.tif"}, **target}
        return {"datasets": "x.tsv", "targets": {"mito": mito}}

    schema = repo / "config" / "schemas" / "config.schema.yaml"
    assert load_config(config(), schema)["targets"]["mito"]["output_smoothing_sections"] == "auto"
    with pytest.raises(TesseraInputError) as unit_in_text:
        load_config(config(output_smoothing_sections="0.6 sections"), schema)
    assert (
        "key targets.mito.output_smoothing_sections: '0.6 sections' does not match '^auto$'"
        in str(unit_in_text.value)
    )
    with pytest.raises(TesseraInputError) as negative:
        load_config(config(output_smoothing_sections=-1), schema)
    assert "key targets.mito.output_smoothing_sections: -1 is less than" in str(negative.value)
