"""Tests for per-section quality control (tessera.section_qc) and its table file."""

import numpy as np
import pandas as pd
import pytest
import tifffile
import zarr
from scipy import ndimage
from skimage.registration import phase_cross_correlation
from skimage.util import view_as_blocks

from tessera.errors import TesseraInputError
from tessera.section_qc import metrics as qc_metrics
from tessera.section_qc.flags import flag_sections
from tessera.section_qc.metrics import METRIC_COLUMNS, measure_sections, section_metrics
from tessera.section_qc.plot import plot_sections
from tessera.section_qc.shift import field_shift, phase_shift
from tessera.workflow.files.qc_table import (
    count_sections,
    excluded_sections,
    read_qc_table,
    write_qc_table,
)


def textured(shape, seed, *, sigma=1.0, level=100.0, contrast=25.0):
    """Smoothed Gaussian noise scaled to a given mean and standard deviation (float64)."""
    rng = np.random.default_rng(seed)
    field = ndimage.gaussian_filter(rng.normal(size=shape), sigma)
    return level + contrast * (field - field.mean()) / field.std()


# --------------------------------------------------------------------------------------------
# phase_shift


@pytest.mark.parametrize("shift", [(3, -5), (-7, 0), (0, 12), (-15, -9), (20, 31), (-1, 1)])
def test_phase_shift_recovers_circular_shift(shift):
    ref = textured((64, 80), seed=1)
    moving = np.roll(ref, shift, axis=(0, 1))
    got = phase_shift(ref, moving)
    # np.roll moves content by +shift, so registering it back needs -shift
    assert got == (-shift[0], -shift[1])
    # reference library: skimage.registration.phase_cross_correlation, same sign convention
    expected, _, _ = phase_cross_correlation(ref, moving)
    np.testing.assert_array_equal(got, expected)


@pytest.mark.parametrize("shift", [(6, -4), (-11, 9), (0, -17), (14, 14)])
@pytest.mark.parametrize("window", [False, True])
def test_phase_shift_recovers_cropped_shift(shift, window):
    big = np.rint(textured((160, 160), seed=2))
    y0 = x0 = 40
    ref = big[y0 : y0 + 80, x0 : x0 + 80]
    dy, dx = shift
    moving = big[y0 + dy : y0 + dy + 80, x0 + dx : x0 + dx + 80]
    # moving[y, x] == ref[y + dy, x + dx]: moving is ref moved by (-dy, -dx)
    got = phase_shift(ref, moving, window=window)
    assert got == (dy, dx)
    # reference library on the same pair (skimage does not taper, compare the plain form)
    if not window:
        expected, _, _ = phase_cross_correlation(ref, moving)
        np.testing.assert_array_equal(got, expected)


def test_phase_shift_subpixel():
    ref = textured((64, 64), seed=3)
    true = (1.3, -2.6)
    # scipy.ndimage.fourier_shift moves content by +true (periodic), so expect -true
    moving = np.fft.ifft2(ndimage.fourier_shift(np.fft.fft2(ref), true)).real
    got = phase_shift(ref, moving, upsample=10)
    np.testing.assert_allclose(got, (-true[0], -true[1]), atol=0.1)
    # reference library with the same resolution
    expected, _, _ = phase_cross_correlation(ref, moving, upsample_factor=10)
    np.testing.assert_allclose(got, expected, atol=0.1 + 1e-9)


def test_phase_shift_constant_image_gives_no_shift():
    # a section with no signal carries no evidence of displacement (definition in docstring)
    ref = textured((32, 32), seed=4)
    assert phase_shift(ref, np.zeros((32, 32)), window=True) == (0.0, 0.0)


# --------------------------------------------------------------------------------------------
# section_metrics


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16, np.float32, np.float64])
@pytest.mark.parametrize("strip_pixels", [None, 300])
def test_section_metrics_match_reference(dtype, strip_pixels, monkeypatch):
    if strip_pixels is not None:
        # force many strips: the result must not depend on the strip size
        monkeypatch.setattr(qc_metrics, "_STRIP_PIXELS", strip_pixels)
    section = np.clip(np.rint(textured((70, 53), seed=5, level=120)), 0, 255).astype(dtype)
    m = section_metrics(section)
    ref = section.astype(float)
    # reference: numpy mean / population std
    assert m["mean"] == pytest.approx(np.mean(ref), rel=1e-12)
    assert m["std"] == pytest.approx(np.std(ref), rel=1e-10)
    # reference: scipy.ndimage.laplace (default mode 'reflect'), variance by numpy
    assert m["sharpness"] == pytest.approx(np.var(ndimage.laplace(ref)), rel=1e-10)


@pytest.mark.parametrize("strip_pixels", [None, 300])
@pytest.mark.parametrize("sigma", [1.0, 2.5])
def test_smoothed_sharpness_matches_gaussian_laplace(sigma, strip_pixels, monkeypatch):
    if strip_pixels is not None:
        # halo rows make strips exact
        monkeypatch.setattr(qc_metrics, "_STRIP_PIXELS", strip_pixels)
    section = textured((70, 53), seed=8, level=120)
    m = section_metrics(section, sharpness_sigma=sigma)
    # reference: scipy.ndimage.gaussian_laplace (Laplacian of Gaussian, mode 'reflect')
    assert m["sharpness"] == pytest.approx(
        np.var(ndimage.gaussian_laplace(section, sigma)), rel=1e-10
    )


def test_smoothing_reveals_defocus_under_detector_noise():
    # Defocus happens before the detector adds noise; the plain Laplacian of the noise then
    # dominates, the Laplacian of Gaussian does not (common practice for noisy images).
    rng = np.random.default_rng(9)
    clean = textured((128, 128), seed=9, sigma=2.0, level=120, contrast=30)
    sharp = clean + rng.normal(0, 12, clean.shape)
    defocused = ndimage.gaussian_filter(clean, 4.0) + rng.normal(0, 12, clean.shape)
    plain = [section_metrics(x)["sharpness"] for x in (sharp, defocused)]
    smoothed = [section_metrics(x, sharpness_sigma=1.5)["sharpness"] for x in (sharp, defocused)]
    assert plain[1] > 0.5 * plain[0]
    assert smoothed[1] < 0.25 * smoothed[0]


def test_small_relative_changes_are_not_flagged_in_a_uniform_stack():
    # Sharpness within 5 % and means within 3 grey levels of the trend: no section is
    # defective, however small the spread makes the robust z-scores.
    t = pd.DataFrame(
        {
            "z": range(8),
            "mean": [100, 100, 100, 100, 100, 100, 100, 103.0],
            "sharpness": [50, 50.2, 49.9, 50.1, 47.5, 50, 50.1, 49.9],
            "flat_fraction": 0.0,
            "shift_y": 0.0,
            "shift_x": 0.0,
            "shift": 0.0,
        }
    )
    assert not flag_sections(t)["excluded"].any()
    strict = flag_sections(t, min_sharpness_drop=0.0, min_intensity_change=0.0)
    assert strict["reason"].tolist()[4] == "blurred" and strict["reason"].tolist()[7] == "intensity"


def test_sharpness_drops_for_blurred_section():
    # variance of the Laplacian, a common focus measure (common practice): blur lowers it
    section = textured((96, 96), seed=6)
    sharp = section_metrics(section)["sharpness"]
    blurred = section_metrics(ndimage.gaussian_filter(section, 2.0))["sharpness"]
    assert blurred < 0.05 * sharp


def test_flat_fraction_constant_and_half_blank():
    # a constant section is flat everywhere (std 0 in every tile)
    assert section_metrics(np.full((64, 64), 200, np.uint8))["flat_fraction"] == 1.0
    section = np.rint(textured((64, 64), seed=7))
    section[:, 32:] = 0
    assert section_metrics(section, flat_block=16)["flat_fraction"] == pytest.approx(0.5)
    # torn area not aligned with the tiles: within one tile column of the true fraction
    section = np.rint(textured((100, 100), seed=8))
    section[:, 60:] = 255
    frac = section_metrics(section, flat_block=16)["flat_fraction"]
    assert abs(frac - 0.4) <= 16 / 100


def test_flat_fraction_matches_block_reference():
    # reference: skimage.util.view_as_blocks, tile std by numpy, on a tile-aligned shape
    section = textured((96, 128), seed=9, contrast=3.0)
    section[20:70, 10:90] = 50.0
    blocks = view_as_blocks(section, (16, 16))
    expected = np.mean(blocks.std(axis=(2, 3)) < 2.0)
    got = section_metrics(section, flat_block=16, flat_std=2.0)["flat_fraction"]
    assert got == pytest.approx(expected)
    assert 0 < expected < 1  # the check covers both flat and textured tiles


# --------------------------------------------------------------------------------------------
# a synthetic stack with known defects

N, SIZE, MARGIN, PAD = 30, 96, 24, 6
BLANK, TORN, BLUR, SHIFT, BRIGHT = 5, 10, 15, 20, 25
JUMP = (18, -15)  # displacement in pixels, length 23.4 > the default 20


def make_stack(*, drift=1.5, defects=True, displaced_only=False, seed=11):
    """Correlated sections of one smooth 3D field plus a linear intensity drift.

    With `defects`, one section is blank, one torn (half blank), one blurred, one brighter
    (charging) and the field jumps by JUMP at SHIFT: from there on (a step), or only for that
    one section when `displaced_only`.
    """
    rng = np.random.default_rng(seed)
    shape = (N + 2 * PAD, SIZE + 2 * MARGIN, SIZE + 2 * MARGIN)
    field = ndimage.gaussian_filter(rng.normal(size=shape), (1.2, 1.0, 1.0))
    field = field[PAD:-PAD] / field.std() * 25  # drop the ends, where smoothing is one-sided
    vol = np.empty((N, SIZE, SIZE), np.uint8)
    for z in range(N):
        moved = defects and (z == SHIFT if displaced_only else z >= SHIFT)
        oy, ox = (MARGIN + JUMP[0], MARGIN + JUMP[1]) if moved else (MARGIN, MARGIN)
        sec = field[z, oy : oy + SIZE, ox : ox + SIZE] + 90 + drift * z
        if defects and z == BLUR:
            sec = ndimage.gaussian_filter(sec, 2.5)
        if defects and z == BRIGHT:
            sec = sec + 40
        sec = np.clip(np.rint(sec), 0, 255)
        if defects and z == BLANK:
            sec[:] = 0
        if defects and z == TORN:
            sec[:, SIZE // 2 :] = 255
        vol[z] = sec
    return vol


@pytest.mark.parametrize("displaced_only", [False, True])
def test_flags_exactly_the_defective_sections(displaced_only):
    vol = make_stack(displaced_only=displaced_only)
    table = flag_sections(measure_sections(vol, shift_crop=64))
    expected = {BLANK: "flat", TORN: "flat", BLUR: "blurred", SHIFT: "shift", BRIGHT: "intensity"}
    reasons = dict(zip(table["z"], table["reason"], strict=True))
    assert {z: r for z, r in reasons.items() if r} == expected
    assert table["excluded"].tolist() == [z in expected for z in range(N)]
    for name in ("flat", "blurred", "intensity", "shift"):
        col = table[f"flag_{name}"]
        assert col.dtype == bool
        assert set(table.loc[col, "z"]) == {z for z, r in expected.items() if r == name}
    # measured jump: registering back needs (dy, dx) == JUMP (phase_shift sign convention)
    assert (table.loc[SHIFT, "shift_y"], table.loc[SHIFT, "shift_x"]) == JUMP
    assert table.loc[SHIFT, "shift"] == pytest.approx(np.hypot(*JUMP))


def test_sections_sharing_no_detail_are_not_flagged_shifted():
    # Featureless sections (one grey level plus independent noise) share no detail, so each
    # measuring tile's phase-correlation peak lands anywhere (Kuglin & Hines 1975: the peak
    # marks shared structure only) and the tiles disagree. Their median is no measurement: no
    # such section may be flagged, while the displaced section of a textured stack still is.
    rng = np.random.default_rng(5)
    noise = np.clip(np.rint(rng.normal(120, 6, (40, 512, 512))), 0, 255).astype(np.uint8)
    table = measure_sections(noise)
    assert (table["shift_agreement"][1:] < 1 / 3).all()
    assert not flag_sections(table)["flag_shift"].any()
    # without the agreement rule, the random medians do raise flags
    assert flag_sections(table, min_shift_agreement=0.0)["flag_shift"].any()
    textured_stack = measure_sections(make_stack(displaced_only=True), shift_crop=64)
    assert textured_stack.loc[SHIFT, "shift_agreement"] == 1.0
    assert flag_sections(textured_stack).loc[SHIFT, "flag_shift"]


def test_real_sections_agree_and_a_displaced_one_is_flagged(vnc_sstem):
    # Open ssTEM data (Gerhard et al. 2013): neighbouring sections 50 nm apart share enough
    # detail for the agreement rule to judge every shift, and a section displaced by
    # (15, -25) px (29 px, above max_shift_px) is flagged there and nowhere else.
    files = sorted((vnc_sstem / "raw").glob("*.tif"))[:12]
    stack = np.stack([tifffile.imread(f) for f in files])
    table = measure_sections(stack)
    assert (table["shift_agreement"] >= 1 / 3).all()
    assert (flag_sections(table)["reason"] == "").all()
    stack[6] = np.roll(stack[6], (15, -25), axis=(0, 1))
    flagged = flag_sections(measure_sections(stack))
    assert flagged.loc[flagged["flag_shift"], "z"].tolist() == [6]


def test_drift_alone_is_not_flagged():
    # a steady drift of 3 grey levels per section, 87 over the stack, and no defects
    table = flag_sections(measure_sections(make_stack(drift=3.0, defects=False)))
    assert not table[["flag_flat", "flag_blurred", "flag_intensity", "flag_shift"]].any().any()
    assert (table["reason"] == "").all()
    assert not table["excluded"].any()
    # the drift is really there (numpy reference)
    assert np.polyfit(table["z"], table["mean"], 1)[0] == pytest.approx(3.0, rel=0.1)


def test_flags_kept_but_not_excluded_on_request():
    table = measure_sections(make_stack(), shift_crop=64)
    kept = flag_sections(table, exclude_flagged=False)
    assert (kept["reason"] != "").sum() == 5
    assert not kept["excluded"].any()


def test_measure_sections_zarr_equals_numpy(tmp_path):
    vol = make_stack()
    arr = zarr.create_array(
        store=tmp_path / "a.zarr", shape=vol.shape, chunks=(1, 32, 32), dtype="uint8"
    )
    arr[:] = vol
    from_zarr = measure_sections(arr, shift_crop=64)
    from_numpy = measure_sections(vol, shift_crop=64)
    pd.testing.assert_frame_equal(from_zarr, from_numpy)
    assert list(from_numpy.columns) == [
        "z",
        "mean",
        "std",
        "sharpness",
        "flat_fraction",
        "shift_y",
        "shift_x",
        "shift",
        "shift_agreement",
    ]
    assert from_numpy["z"].tolist() == list(range(N))


class _OneSectionOnly:
    """Array-like that allows only single-section reads, and counts them."""

    def __init__(self, array):
        self._array = array
        self.shape, self.dtype, self.reads = array.shape, array.dtype, []

    def __getitem__(self, key):
        assert isinstance(key, int), f"read other than one section: {key!r}"
        self.reads.append(key)
        return self._array[key]


def test_measure_sections_reads_one_section_at_a_time():
    vol = make_stack(defects=False)[:6]
    proxy = _OneSectionOnly(vol)
    table = measure_sections(proxy, shift_crop=32)
    assert proxy.reads == list(range(6))
    pd.testing.assert_frame_equal(table, measure_sections(vol, shift_crop=32))


# --------------------------------------------------------------------------------------------
# jumps, not drift; stack edges judged against the neighbours they have

DRIFT = (15, -20)  # content moves by this per section: 25 px, more than max_shift_px (20)
EXTRA = (-20, -15)  # a jump of 25 px on top of the drift
JUMP_AT, NZ, SIDE = 6, 12, 320


def drifting_stack(*, extra_at=(), seed=5):
    """One textured field, each section moved by DRIFT from the last (plus EXTRA at `extra_at`).

    Sections are whole-pixel periodic shifts (scipy.ndimage.shift, grid-wrap) of one field
    with independent noise, so the true shift between neighbours is known exactly.
    """
    rng = np.random.default_rng(seed)
    field = textured((SIDE, SIDE), 31, sigma=1.5)
    vol = np.empty((NZ, SIDE, SIDE), np.uint8)
    for z in range(NZ):
        offset = np.multiply(DRIFT, z) + (EXTRA if z in extra_at else (0, 0))
        moved = ndimage.shift(field, offset, order=0, mode="grid-wrap")
        vol[z] = np.clip(np.rint(moved + rng.normal(0, 4, field.shape)), 0, 255)
    return vol


def test_field_shift_matches_reference_for_a_whole_field_shift():
    vol = drifting_stack()
    # the tiled median agrees with skimage.registration.phase_cross_correlation on the pair
    expected, _, _ = phase_cross_correlation(vol[0], vol[1])
    assert field_shift(vol[0], vol[1]) == tuple(expected) == (-DRIFT[0], -DRIFT[1])


def test_field_shift_ignores_one_structure_moving_alone():
    # Neighbouring sections share a coarse texture but not their fine detail; a dark straight
    # band (a membrane cut at a shallow angle) lies near one corner and moves 22 px across
    # its length between them, while the rest of the field stays put.
    size = 256
    yy, xx = np.mgrid[0:size, 0:size]
    common = textured((size, size), 1, sigma=3.0, contrast=20)

    def section(band_offset, seed):
        across = yy * 0.6 + xx * 0.8 - 60 - band_offset
        band = np.where(np.abs(across) < 5, -60.0, 0.0)
        return common + band + textured((size, size), seed, contrast=10)

    ref, moving = section(0.0, 2), section(22.0, 3)
    # reference library: whole-image phase correlation (skimage) locks onto the band
    whole, _, _ = phase_cross_correlation(ref, moving)
    assert np.hypot(*whole) > 20
    assert np.hypot(*phase_shift(ref, moving, window=True)) > 20
    # the median over tiles reports the field, which did not move
    assert np.hypot(*field_shift(ref, moving)) <= 2


def test_steady_drift_is_not_flagged():
    table = flag_sections(measure_sections(vol := drifting_stack()))
    assert (table["reason"] == "").all()
    assert not table["excluded"].any()
    # the drift is really measured, every section past the first, larger than max_shift_px;
    # reference: skimage.registration.phase_cross_correlation on each neighbouring pair
    for z in range(1, NZ):
        expected, _, _ = phase_cross_correlation(vol[z - 1], vol[z])
        assert (table.loc[z, "shift_y"], table.loc[z, "shift_x"]) == tuple(expected)
    np.testing.assert_allclose(table["shift"][1:], np.hypot(*DRIFT))
    assert np.hypot(*DRIFT) > 20


@pytest.mark.parametrize("extra_at", [(JUMP_AT,), tuple(range(JUMP_AT, NZ))])
def test_a_jump_in_a_drifting_stack_is_flagged(extra_at):
    # one displaced section, or a step (every section from JUMP_AT on moved by EXTRA)
    vol = drifting_stack(extra_at=extra_at)
    table = flag_sections(measure_sections(vol))
    assert table.loc[table["reason"] != "", "z"].tolist() == [JUMP_AT]
    assert table.loc[JUMP_AT, "reason"] == "shift"
    # the jump is the displacement beyond the drift (phase_cross_correlation as reference)
    expected, _, _ = phase_cross_correlation(vol[JUMP_AT - 1], vol[JUMP_AT])
    assert tuple(expected) == (-DRIFT[0] - EXTRA[0], -DRIFT[1] - EXTRA[1])
    assert table.loc[JUMP_AT, "shift_jump"] == pytest.approx(np.hypot(*EXTRA))


EDGE_NZ, EDGE_RAMP = 24, 5


def tapering_stack(*, blur_at=None, seed=12):
    """Correlated sections whose contrast falls steadily over the last EDGE_RAMP at each end.

    Like a block whose organelles thin out towards its faces: the sharpness (a variance,
    proportional to contrast squared) of the first and last sections is well under half the
    stack's median, yet every section is in focus. `blur_at` defocuses one section.
    """
    rng = np.random.default_rng(seed)
    field = ndimage.gaussian_filter(rng.normal(size=(EDGE_NZ + 12, 96, 96)), (1.2, 1.0, 1.0))
    field = field[6:-6] / field.std()
    from_end = np.minimum(np.arange(EDGE_NZ), EDGE_NZ - 1 - np.arange(EDGE_NZ))
    contrast = 30.0 * 0.8 ** np.clip(EDGE_RAMP - from_end, 0, None)  # log-linear taper
    vol = np.empty(field.shape, np.uint8)
    for z in range(EDGE_NZ):
        section = 120 + contrast[z] * field[z]
        if z == blur_at:
            section = ndimage.gaussian_filter(section, 2.5)
        vol[z] = np.clip(np.rint(section), 0, 255)
    return vol


def test_sharp_stack_edges_are_not_flagged_as_blurred():
    vol = tapering_stack()
    table = flag_sections(measure_sections(vol))
    assert not table["flag_blurred"].any()
    assert (table["reason"] == "").all()
    # the input really is a hard case: the end sections have lost more than min_sharpness_drop
    # (0.5) of the median sharpness; reference: variance of scipy.ndimage.laplace
    sharp = [ndimage.laplace(s.astype(np.float64), mode="reflect").var() for s in vol]
    assert max(sharp[0], sharp[-1]) < 0.5 * np.median(sharp)


@pytest.mark.parametrize("blur_at", [0, EDGE_NZ - 1])
def test_blurred_edge_section_is_flagged(blur_at):
    table = flag_sections(measure_sections(tapering_stack(blur_at=blur_at)))
    assert table.loc[table["reason"] != "", "z"].tolist() == [blur_at]
    assert table.loc[blur_at, "reason"] == "blurred"


# --------------------------------------------------------------------------------------------
# bad input


def _table():
    return measure_sections(make_stack(defects=False)[:5], shift_crop=32)


@pytest.mark.parametrize(
    "call, name",
    [
        (lambda: section_metrics(np.zeros((4, 4, 4))), "section"),
        (lambda: section_metrics(np.zeros((0, 5))), "section"),
        (lambda: section_metrics(np.zeros((5, 5), bool)), "section"),
        (lambda: section_metrics(np.array([["a", "b"]])), "section"),
        (lambda: section_metrics(np.full((5, 5), np.nan)), "section"),
        (lambda: section_metrics(np.zeros((8, 8)), flat_block=1), "flat_block"),
        (lambda: section_metrics(np.zeros((8, 8)), flat_block=4.5), "flat_block"),
        (lambda: section_metrics(np.zeros((8, 8)), flat_std=0), "flat_std"),
        (lambda: section_metrics(np.zeros((8, 8)), flat_std=float("inf")), "flat_std"),
        (lambda: phase_shift(np.zeros((8, 8)), np.zeros((8, 9))), "same shape"),
        (lambda: phase_shift(np.zeros((8, 8)), np.zeros((8, 8)), upsample=0), "upsample"),
        (lambda: phase_shift(np.zeros((8, 8)), np.zeros((8, 8)), window=1), "window"),
        (lambda: field_shift(np.zeros((8, 8)), np.zeros((8, 9))), "same shape"),
        (lambda: field_shift(np.zeros((8, 8)), np.zeros((8, 8)), tiles=0), "tiles"),
        (lambda: field_shift(np.zeros((8, 8)), np.zeros((8, 8)), tile_fraction=0), "tile_fraction"),
        (
            lambda: field_shift(np.zeros((8, 8)), np.zeros((8, 8)), tile_fraction=1.5),
            "tile_fraction",
        ),
        (lambda: measure_sections(np.zeros((8, 8))), "volume"),
        (lambda: measure_sections(np.zeros((0, 8, 8))), "volume"),
        (lambda: measure_sections([[[1]]]), "volume"),
        (lambda: measure_sections(np.zeros((2, 8, 8)), shift_crop=4), "shift_crop"),
        (lambda: flag_sections({"z": [0]}), "table"),
        (lambda: flag_sections(_table().drop(columns="sharpness")), "sharpness"),
        (lambda: flag_sections(_table(), max_flat_fraction=1.5), "max_flat_fraction"),
        (lambda: flag_sections(_table(), sharpness_z=-1), "sharpness_z"),
        (lambda: flag_sections(_table(), intensity_z=0), "intensity_z"),
        (lambda: flag_sections(_table(), max_shift_px=-2), "max_shift_px"),
        (lambda: flag_sections(_table(), neighbours=1), "neighbours"),
        (lambda: flag_sections(_table(), exclude_flagged="yes"), "exclude_flagged"),
        (lambda: flag_sections(_table().iloc[::-1]), "increasing"),
        (lambda: plot_sections(_table().drop(columns="shift"), "x.png"), "shift"),
    ],
)
def test_bad_input_raises(call, name):
    with pytest.raises(TesseraInputError, match=name):
        call()


# --------------------------------------------------------------------------------------------
# output


def test_plot_sections_writes_png(tmp_path):
    table = flag_sections(measure_sections(make_stack(), shift_crop=64))
    path = tmp_path / "sections.png"
    plot_sections(table, path, title="synthetic stack")
    data = path.read_bytes()
    # PNG file signature (PNG specification, ISO/IEC 15948, section 5.2)
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    assert len(data) > 1000
    # unflagged tables plot too
    plot_sections(table[list(METRIC_COLUMNS)], tmp_path / "plain.png")
    assert (tmp_path / "plain.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_write_sections_round_trip(tmp_path):
    table = flag_sections(measure_sections(make_stack(), shift_crop=64))
    path = tmp_path / "sections.tsv"
    write_qc_table(table, path)
    back = pd.read_csv(path, sep="\t", keep_default_na=False)  # pandas reader as reference
    assert list(back.columns) == list(table.columns)
    np.testing.assert_allclose(back["sharpness"], table["sharpness"], rtol=1e-5)
    assert back["reason"].tolist() == table["reason"].tolist()
    assert back["excluded"].tolist() == table["excluded"].tolist()


def test_qc_table_readers_agree_with_the_written_table(tmp_path):
    table = flag_sections(measure_sections(make_stack(), shift_crop=64))
    path = tmp_path / "sections.tsv"
    write_qc_table(table, path)
    back = read_qc_table(path)
    # reference: the in-memory table the file was written from
    assert list(back.columns) == list(table.columns)
    assert back["excluded"].tolist() == table["excluded"].tolist()
    assert back["reason"].tolist() == table["reason"].tolist()
    excluded_z = [int(z) for z in table["z"][table["excluded"]]]
    assert excluded_sections(path) == excluded_z
    assert excluded_sections(path, z_factor=2) == sorted({z // 2 for z in excluded_z})
    counts = count_sections([path, path])
    assert (counts["sections"], counts["excluded"]) == (2 * N, 2 * len(excluded_z))


def test_qc_table_without_excluded_column_names_file_and_column(tmp_path):
    path = tmp_path / "sections.tsv"
    path.write_text("z\tmean\n0\t1.5\n")
    with pytest.raises(TesseraInputError) as error:
        read_qc_table(path)
    assert str(error.value) == (
        f"{path}: missing column(s) ['excluded']; expected a section QC table with columns z and "
        "excluded"
    )


def test_a_blurred_section_partly_flat_is_reported_blurred_not_flat():
    # Defocus lowers the variance of the Laplacian (Pech-Pacheco et al., ICPR 2000) and evens
    # out fine texture, so a blurred section can pass the flat test in part of its area; a
    # blank one is flat nearly everywhere. Both are excluded; the reason tells them apart.
    table = pd.DataFrame(
        {
            "z": range(7),
            "mean": [100, 101, 102, 103, 104, 105, 106.0],
            "sharpness": [50, 52, 49, 1, 1, 51, 50.0],
            "flat_fraction": [0, 0, 0, 1.0, 0.3, 0, 0.0],
            "shift_y": 0.0,
            "shift_x": 0.0,
            "shift": 0.0,
        }
    )
    flagged = flag_sections(table)
    assert flagged["reason"].tolist() == ["", "", "", "flat", "blurred", "", ""]
    assert flagged["excluded"].tolist() == [False, False, False, True, True, False, False]
