"""Sections QC excluded are read as their nearest kept section (tessera.section_qc.stand_ins)."""

import numpy as np
import pandas as pd
import pytest
import zarr

from tessera.cascade.api import mirrored_block
from tessera.errors import TesseraInputError
from tessera.section_qc.stand_ins import (
    SectionStandIns,
    stand_in_pairs,
    stand_in_sections,
    through_stand_ins,
)
from tessera.tile_windows import tile_window
from tessera.workflow.files.pyramid import level_arrays, working_stand_ins
from tessera.workflow.files.qc_table import write_qc_table


def nearest_by_search(n, excluded):
    """The rule written out the slow way: the kept section at the least distance, the lower of
    two at equal distance."""
    kept = [z for z in range(n) if z not in set(excluded)]
    if not kept:
        return list(range(n))
    return [z if z in kept else min(kept, key=lambda k: (abs(k - z), k)) for z in range(n)]


@pytest.mark.parametrize("seed", range(20))
def test_each_excluded_section_is_read_as_the_nearest_kept_one(seed):
    rng = np.random.default_rng(seed)
    n = int(rng.integers(1, 15))
    excluded = sorted(set(rng.integers(0, n, int(rng.integers(0, n + 1))).tolist()))
    assert stand_in_sections(n, excluded).tolist() == nearest_by_search(n, excluded)


def test_sections_outside_the_volume_are_refused(tmp_path):
    with pytest.raises(TesseraInputError, match=r"outside the volume's sections 0\.\.3"):
        stand_in_sections(4, [4])
    # a QC table of another, longer stack: named, with what was expected
    qc = tmp_path / "sections.tsv"
    write_qc_table(pd.DataFrame({"z": range(6), "excluded": [False] * 5 + [True]}), qc)
    with pytest.raises(
        TesseraInputError, match="expected the section QC table of this stack"
    ) as caught:
        working_stand_ins(qc, np.zeros((4, 2, 2)), (1, 1, 1))
    assert str(qc) in str(caught.value)


@pytest.mark.parametrize("store", ["numpy", "zarr"])
def test_mirrored_reads_through_stand_ins_equal_numpy_take(store, tmp_path):
    # Reference: numpy.take of the stand-in index, then numpy.pad in mode "symmetric" (the
    # mirroring beyond the edges, numpy documentation) for windows reaching past the volume.
    rng = np.random.default_rng(0)
    volume = rng.integers(0, 255, (9, 12, 10), dtype=np.uint8)
    if store == "zarr":
        array = zarr.open_array(
            store=str(tmp_path / "v.zarr"),
            mode="w",
            shape=volume.shape,
            dtype=np.uint8,
            chunks=(2, 5, 5),
            zarr_format=3,
        )
        array[:] = volume
    else:
        array = volume
    index = stand_in_sections(9, [0, 4, 5, 8])
    view = SectionStandIns(array, index)
    replaced = np.take(volume, index, axis=0)
    reference = np.pad(replaced, ((3, 4), (2, 1), (0, 5)), mode="symmetric")
    got = mirrored_block(view, -3, 13, -2, 13, 0, 15)
    assert np.array_equal(got, reference)
    assert np.array_equal(view[2:7, 1:4, :], replaced[2:7, 1:4, :])


def test_no_exclusion_reads_the_array_itself():
    volume = np.zeros((3, 2, 2))
    assert through_stand_ins(volume, stand_in_pairs(3, [])) is volume


def test_training_tiles_read_the_same_stand_ins_as_prediction(tmp_path):
    # A tile beside an excluded section: its window (the sections around it, as neighbours
    # read them) takes the stand-in, in the working level's numbering (z reduced by 2 here).
    volume = np.arange(6 * 4 * 4, dtype=np.uint8).reshape(6, 4, 4)
    qc = tmp_path / "sections.tsv"
    write_qc_table(pd.DataFrame({"z": range(12), "excluded": [z == 7 for z in range(12)]}), qc)
    # level-0 section 7 lies in working section 3 of a level reduced by 2 in z
    assert working_stand_ins(qc, volume, (2, 1, 1)) == [[3, 2]]
    view = through_stand_ins(volume, [[3, 2]])
    row = {"z": 4, "y0": 0, "x0": 0, "height": 4, "width": 4}
    expected = np.take(volume, [2, 4, 5], axis=0)
    assert np.array_equal(tile_window(view, row, 0, 1), expected)


def test_level_arrays_read_through_the_qc_tables(tmp_path, monkeypatch):
    from tessera.workflow.files import pyramid

    volume = np.arange(5 * 2 * 2, dtype=np.uint8).reshape(5, 2, 2)
    monkeypatch.setattr(pyramid, "working_array", lambda path, d: (volume, (40, 8, 8), (1, 1, 1)))
    qc = tmp_path / "sections.tsv"
    write_qc_table(pd.DataFrame({"z": range(5), "excluded": [False, True, False, False, True]}), qc)
    registry = pd.DataFrame({"dataset": ["a"]})
    arrays = level_arrays({"a": "raw.ome.zarr"}, registry, downsample=1, qc_tables={"a": qc})
    assert np.array_equal(arrays["a"][0:5, :, :], np.take(volume, [0, 0, 2, 3, 3], axis=0))
    plain = level_arrays({"a": "raw.ome.zarr"}, registry, downsample=1)
    assert plain["a"] is volume
