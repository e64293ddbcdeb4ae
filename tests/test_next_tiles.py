"""Suggesting tiles to annotate: entropy, ranking, spreading, and a sheet the exporter reads."""

import numpy as np
import pandas as pd
import pytest
from scipy.stats import entropy

from tessera.errors import TesseraInputError
from tessera.next_tiles import binary_entropy, candidate_scores, rank_tiles
from tessera.workflow.files.points import read_points


def test_binary_entropy_equals_scipy():
    # Reference: scipy.stats.entropy of the distribution (p, 1 - p) in base 2.
    p = np.linspace(0.01, 0.99, 50)
    expected = [entropy([q, 1 - q], base=2) for q in p]
    np.testing.assert_allclose(binary_entropy(p), expected, rtol=1e-9)


def test_window_scores_are_window_means():
    rng = np.random.default_rng(0)
    section = rng.random((40, 60))
    table = candidate_scores(section, size=10)
    h = binary_entropy(section)
    for row in table.sample(5, random_state=1).itertuples():
        assert row.score == pytest.approx(h[row.y - 5 : row.y + 5, row.x - 5 : row.x + 5].mean())


def no_tiles():
    return pd.DataFrame(columns=["dataset", "z", "y0", "x0", "height", "width"])


def test_ranking_finds_uncertain_regions_spreads_and_avoids_known_tiles():
    volume = np.zeros((6, 64, 64), np.float32)  # certain everywhere ...
    volume[2, 8:24, 8:24] = 0.5  # ... except two patches
    volume[4, 40:56, 40:56] = 0.45
    picks = rank_tiles({"d1": volume}, no_tiles(), size=16, count=2)
    assert [(r.z, r.y, r.x) for r in picks.itertuples()] == [(2, 16, 16), (4, 48, 48)]
    # the first patch already annotated: the next best lies elsewhere
    known = pd.DataFrame(
        {"dataset": ["d1"], "z": [2], "y0": [8], "x0": [8], "height": [16], "width": [16]}
    )
    picks = rank_tiles({"d1": volume}, known, size=16, count=1)
    assert (picks.loc[0, "z"], picks.loc[0, "y"]) == (4, 48)
    # an excluded section is never suggested
    picks = rank_tiles({"d1": volume}, no_tiles(), size=16, count=1, excluded={"d1": [2]})
    assert picks.loc[0, "z"] == 4


def test_suggestions_are_a_points_sheet_the_exporter_reads(tmp_path):
    volume = np.full((4, 32, 32), 0.5, np.float32)
    picks = rank_tiles({"d1": volume}, no_tiles(), size=16, count=3)
    sheet = tmp_path / "points.tsv"
    pd.DataFrame(
        {
            "dataset": picks["dataset"],
            "target": "mito",
            "z": picks["z"],
            "y": picks["y"],
            "x": picks["x"],
            "size": 16,
        }
    ).to_csv(sheet, sep="\t", index=False)
    points = read_points(sheet, datasets=["d1"], targets=["mito"])
    assert len(points) == 3 and points["tile_id"].is_unique


def test_bad_requests_are_refused():
    with pytest.raises(TesseraInputError, match=">= 1"):
        rank_tiles({"d1": np.zeros((2, 8, 8))}, no_tiles(), size=4, count=0)
    with pytest.raises(TesseraInputError, match="no sections"):
        rank_tiles(
            {"d1": np.zeros((2, 8, 8))}, no_tiles(), size=4, count=1, excluded={"d1": [0, 1]}
        )
