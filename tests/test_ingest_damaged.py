"""Ingest of damaged, incomplete or ambiguous stacks: each refused in one line naming the file,
with nothing written, or (a lost section, a numbering that needs reading) taken as documented."""

import json
import logging
import os
import warnings

import mrcfile
import numpy as np
import pytest
import tifffile
import zarr
from PIL import Image as PILImage

from tessera.errors import TesseraInputError
from tessera.io.omezarr import open_image
from tessera.io.section_numbers import number_sections
from tessera.workflow.files.label_volumes import read_label_volume
from tessera.workflow.files.qc_table import excluded_sections, read_qc_table
from tessera.workflow.jobs.ingest import check_stack_job, ingest_job
from tessera.workflow.jobs.section_qc import section_qc_job

SPACING = (40.0, 8.0, 8.0)


# Damaged inputs. Every refusal is checked to leave the folder as it was: nothing is written.


def _listing(folder):
    return sorted(os.listdir(folder))


def _ingest(src, tmp_path, **kwargs):
    kwargs = {"fmt": "tiff_stack", "spacing": SPACING, **kwargs}
    return ingest_job(src, tmp_path / "o.ome.zarr", **kwargs)


def _one_line_and_nothing_written(info, src, tmp_path, before):
    message = str(info.value)
    assert message.startswith(str(src))  # the message names the file first
    assert "\n" not in message  # one line
    assert _listing(tmp_path) == before
    return message


def test_a_tiff_written_with_one_directory_for_all_pages_is_named_as_such(tmp_path):
    # tifffile's truncate=True writes one page directory and the stack's shape in the
    # description: an intact file whose sections cannot be checked one by one. The message says
    # so and how to save it, instead of calling it damaged (tifffile documents the option).
    src = tmp_path / "stack.tif"
    tifffile.imwrite(src, np.zeros((12, 32, 32), np.uint8), truncate=True)
    before = _listing(tmp_path)
    with pytest.raises(TesseraInputError) as info:
        _ingest(src, tmp_path)
    message = _one_line_and_nothing_written(info, src, tmp_path, before)
    assert "the shape description states 12 pages, and the file holds one page directory" in message
    assert "(tifffile's truncate=True)" in message
    assert "expected an ordinary multi-page TIFF (save it again without truncate=True)" in message
    assert "damaged" not in message


@pytest.mark.parametrize(
    ("writer", "states"),
    [
        (
            {"photometric": "minisblack"},
            "the shape description states 12 pages (truncated or damaged?)",
        ),
        (
            {"imagej": True, "metadata": {"axes": "ZYX"}},
            "the ImageJ description states 12 pages (truncated or damaged?)",
        ),
    ],
)
def test_tiff_cut_short_in_copying_is_refused_not_shortened(tmp_path, writer, states):
    # A 12-section stack with half its bytes: the page chain ends early. tifffile only logs
    # "invalid page offset" and offers the pages it reached; that must not become a short stack.
    src = tmp_path / "stack.tif"
    volume = np.random.default_rng(1).integers(0, 256, (12, 32, 32), dtype=np.uint8)
    tifffile.imwrite(src, volume, **writer)
    src.write_bytes(src.read_bytes()[: src.stat().st_size // 2])
    before = _listing(tmp_path)
    with pytest.raises(
        TesseraInputError, match=r"page directories damaged or cut short after \d+ readable page"
    ) as info:
        _ingest(src, tmp_path)
    message = _one_line_and_nothing_written(info, src, tmp_path, before)
    assert "invalid page offset" in message
    assert states in message


def test_a_reader_complaint_reaches_the_user_once_in_the_error_line(tmp_path, caplog):
    # tifffile logs "invalid page offset" (and, for a compressed stack, that its series failed
    # to reshape) at ERROR level; caught into the one error line, the records are not printed
    # besides (pytest's caplog sees what would reach the root logger's handlers)
    src = tmp_path / "stack.tif"
    volume = np.random.default_rng(1).integers(0, 64, (16, 64, 64), dtype=np.uint8)
    tifffile.imwrite(src, volume, compression="zlib")
    src.write_bytes(src.read_bytes()[: src.stat().st_size // 2])
    with caplog.at_level(logging.DEBUG), pytest.raises(TesseraInputError) as info:
        check_stack_job(src, tmp_path / "check.json", fmt="tiff_stack", spacing=SPACING)
    assert "invalid page offset" in str(info.value) and "\n" not in str(info.value)
    assert [r.getMessage() for r in caplog.records if r.name.startswith("tifffile")] == []
    assert logging.getLogger("tifffile").propagate  # as it was before the check


def test_ome_tiff_cut_short_is_refused(tmp_path):
    # tifffile writes the OME-XML description after the pixels: a cut file loses it too.
    src = tmp_path / "stack.ome.tif"
    tifffile.imwrite(src, np.zeros((12, 32, 32), np.uint8), ome=True, photometric="minisblack")
    src.write_bytes(src.read_bytes()[: src.stat().st_size // 2])
    before = _listing(tmp_path)
    with pytest.raises(TesseraInputError, match="cannot read as TIFF: ") as info:
        _ingest(src, tmp_path)
    message = _one_line_and_nothing_written(info, src, tmp_path, before)
    assert "invalid value offset" in message


def test_one_bit_mask_tiff_is_read_not_refused_as_damaged(tmp_path):
    # A bilevel (1 bit per pixel) page packs 8 pixels in a byte, each row starting on a byte
    # boundary (TIFF 6.0 specification, section 9): 13 rows of 21 pixels take 13 * 3 bytes,
    # not 13 * 21. Label volumes may be such masks (> 0 = target).
    mask = np.random.default_rng(2).random((3, 13, 21)) > 0.5
    src = tmp_path / "mask.tif"
    tifffile.imwrite(src, mask, photometric="minisblack")
    with tifffile.TiffFile(src) as tif:
        assert tif.pages[0].bitspersample == 1
        assert sum(tif.pages[0].databytecounts) == 13 * 3
    np.testing.assert_array_equal(read_label_volume(src, mask.shape), mask)


def test_one_bit_page_storing_too_few_bytes_is_refused(tmp_path):
    src = tmp_path / "mask.tif"
    tifffile.imwrite(src, np.ones((2, 13, 21), bool), photometric="minisblack", contiguous=False)
    with tifffile.TiffFile(src, mode="r+b") as tif:
        tif.pages[1].tags["StripByteCounts"].overwrite(20)
    with pytest.raises(
        TesseraInputError,
        match=r"page 1 stores 20 bytes of pixels, expected at least 39 for an uncompressed 13 x "
        r"21 bool plane \(truncated or damaged\?\)",
    ):
        read_label_volume(src, (2, 13, 21))


def test_tiff_losing_its_last_bytes_is_refused(tmp_path):
    # Page by page, each page's pixels follow its directory: the cut lands in the last pixels.
    src = tmp_path / "stack.tif"
    with tifffile.TiffWriter(src) as tif:
        for _ in range(4):
            tif.write(np.ones((16, 16), np.uint8), photometric="minisblack", contiguous=False)
    size = src.stat().st_size
    src.write_bytes(src.read_bytes()[:-10])
    before = _listing(tmp_path)
    with pytest.raises(
        TesseraInputError,
        match=rf"the pixels of page 3 end at byte {size}, the file has {size - 10} "
        r"\(truncated or damaged\?\)",
    ) as info:
        _ingest(src, tmp_path)
    _one_line_and_nothing_written(info, src, tmp_path, before)
    # The same cut into the tag values of the last directory.
    with tifffile.TiffWriter(src) as tif:
        for _ in range(4):
            tif.write(np.ones((16, 16), np.uint8), photometric="minisblack", contiguous=False)
        tif.write(
            np.ones((16, 16), np.uint8),
            photometric="minisblack",
            contiguous=False,
            description="x" * 40,
            metadata=None,
        )  # an out-of-line value written last
    src.write_bytes(src.read_bytes()[: src.stat().st_size - 16 * 16 - 20])
    before = _listing(tmp_path)
    with pytest.raises(
        TesseraInputError, match=r"damaged or cut short after 5 readable page\(s\) \("
    ) as info:
        _ingest(src, tmp_path)
    message = _one_line_and_nothing_written(info, src, tmp_path, before)
    assert "invalid value offset" in message


@pytest.mark.parametrize(
    ("tag", "value", "message"),
    [
        ("StripOffsets", "page0", "the pixels of page 0 and the pixels of page 2 overlap"),
        ("StripByteCounts", 100, "page 2 stores 100 bytes of pixels, expected at least 256"),
        ("StripOffsets", "text", "tag ImageDescription of page 0 and the pixels of page 2 overlap"),
    ],
)
def test_tiff_with_damaged_offsets_is_refused(tmp_path, tag, value, message):
    # Offsets and byte counts of a page's strips (TIFF 6.0, tags 273 and 279) rewritten in
    # place, as a bit error in the directory would: page 2 pointing at page 0's pixels would
    # silently duplicate a section; a short byte count would leave pixels undefined.
    src = tmp_path / "stack.tif"
    volume = (np.arange(3 * 256) % 251).astype(np.uint8).reshape(3, 16, 16)
    tifffile.imwrite(src, volume, photometric="minisblack")
    with tifffile.TiffFile(src, mode="r+") as tif:
        if value == "page0":
            value = tif.pages[0].dataoffsets[0]
        elif value == "text":  # pixels read from the description's text
            value = tif.pages[0].tags["ImageDescription"].valueoffset
        tif.pages[2].tags[tag].overwrite(value)
    before = _listing(tmp_path)
    with pytest.raises(TesseraInputError, match=message) as info:
        _ingest(src, tmp_path)
    _one_line_and_nothing_written(info, src, tmp_path, before)


def test_tiff_with_header_and_garbage_is_one_line(tmp_path):
    src = tmp_path / "stack.tif"
    garbage = np.random.default_rng(5).integers(0, 256, 4096, dtype=np.uint8).tobytes()
    src.write_bytes(b"II*\x00" + garbage)  # little-endian TIFF signature (TIFF 6.0, section 2)
    before = _listing(tmp_path)
    with pytest.raises(TesseraInputError, match="cannot read as TIFF: ") as info:
        _ingest(src, tmp_path)
    _one_line_and_nothing_written(info, src, tmp_path, before)


def test_tiff_page_count_must_match_its_imagej_description(tmp_path):
    # ImageJ's description line images=N is the number of planes in the file (ImageJ's TIFF
    # writer; from memory). Eleven pages that claim twelve lost one.
    src = tmp_path / "stack.tif"
    description = "ImageJ=1.54f\nimages=12\nslices=12\nunit=nm\nspacing=40.0\n"
    tifffile.imwrite(src, np.zeros((11, 16, 16), np.uint8), description=description, metadata=None)
    before = _listing(tmp_path)
    with pytest.raises(
        TesseraInputError, match="the ImageJ description states 12 pages, the file has 11"
    ) as info:
        _ingest(src, tmp_path)
    _one_line_and_nothing_written(info, src, tmp_path, before)


@pytest.mark.parametrize(
    ("shape", "writer", "states"),
    [
        # ImageJ hyperstacks keep channels, slices and frames as consecutive pages, the
        # channels varying fastest (ImageJ hyperstack page order, as tifffile writes it)
        (
            (6, 2, 16, 16),
            {"imagej": True, "metadata": {"axes": "ZCYX"}},
            "the ImageJ description states 2 channels",
        ),
        (
            (3, 4, 16, 16),
            {"imagej": True, "metadata": {"axes": "TZYX"}},
            "the ImageJ description states 3 time points of 4 slices",
        ),
        (
            (2, 3, 16, 16),
            {"ome": True, "metadata": {"axes": "ZCYX"}},
            "the OME-XML states SizeZ=2, SizeC=3, SizeT=1",
        ),
        (
            (2, 3, 16, 16),
            {"photometric": "minisblack", "metadata": {"axes": "ZCYX"}},
            "the shape description states shape (2, 3, 16, 16) (axes ZCYX)",
        ),
    ],
)
def test_tiff_of_several_channels_or_time_points_is_refused(tmp_path, shape, writer, states):
    # Each channel (or time point) is a page of its own, so read page by page a 6-section,
    # 2-channel hyperstack would come back as 12 sections alternating between the channels.
    src = tmp_path / "stack.tif"
    volume = np.arange(np.prod(shape), dtype=np.uint32).reshape(shape).astype(np.uint8)
    tifffile.imwrite(src, volume, **writer)
    before = _listing(tmp_path)
    with pytest.raises(
        TesseraInputError, match="expected one page per z section of one greyscale channel"
    ) as info:
        _ingest(src, tmp_path)
    message = _one_line_and_nothing_written(info, src, tmp_path, before)
    assert states in message


@pytest.mark.parametrize(
    "writer",
    [
        {"imagej": True, "metadata": {"axes": "ZYX"}},
        {"imagej": True, "metadata": {"axes": "TYX"}},  # a z stack labelled as frames
        {"ome": True, "metadata": {"axes": "ZYX"}},
        # without named axes tifffile states the planes of an OME-TIFF as channels (SizeC)
        {"ome": True, "photometric": "minisblack"},
        {"photometric": "minisblack", "metadata": {"axes": "QZYX"}},  # a leading axis of 1
    ],
)
def test_tiff_of_one_z_stack_passes_whatever_its_description(tmp_path, writer):
    volume = np.random.default_rng(3).integers(0, 256, (5, 16, 16), dtype=np.uint8)
    src = tmp_path / "stack.tif"
    data = volume[np.newaxis] if "Q" in writer.get("metadata", {}).get("axes", "") else volume
    tifffile.imwrite(src, data, **writer)
    _ingest(src, tmp_path)
    _, info = open_image(tmp_path / "o.ome.zarr")
    np.testing.assert_array_equal(info["levels"][0][...], volume)


def test_tiff_pages_laid_out_differently_are_refused(tmp_path):
    src = tmp_path / "stack.tif"
    with tifffile.TiffWriter(src) as tif:
        tif.write(np.zeros((16, 16), np.uint8), photometric="minisblack")
        tif.write(np.zeros((16, 16), np.uint16), photometric="minisblack")
    before = _listing(tmp_path)
    with pytest.raises(
        TesseraInputError, match="page 1 has dtype uint16, expected uint8 like page 0"
    ) as info:
        _ingest(src, tmp_path)
    _one_line_and_nothing_written(info, src, tmp_path, before)


def _mrc(path, volume):
    with mrcfile.new(path, overwrite=True) as mrc:
        mrc.set_data(volume)


def test_mrc_cut_short_is_refused_against_its_header(tmp_path):
    # MRC2014: a 1024-byte header, then nsymbt extended-header bytes, then nx*ny*nz voxels of the
    # mode's type (mode 1 = int16); the file size follows from the header.
    src = tmp_path / "stack.mrc"
    _mrc(src, np.zeros((12, 8, 10), np.int16))
    assert src.stat().st_size == 1024 + 12 * 8 * 10 * 2
    src.write_bytes(src.read_bytes()[:2000])
    before = _listing(tmp_path)
    with pytest.raises(
        TesseraInputError,
        match=r"header says nx=10, ny=8, nz=12, mode 1 \(int16\) after 1024 \+ 0 header bytes: "
        r"expected 2944 bytes, the file has 2000 \(truncated or damaged\?\)",
    ) as info:
        _ingest(src, tmp_path, fmt="mrc")
    _one_line_and_nothing_written(info, src, tmp_path, before)


def test_mrc_with_surplus_bytes_or_permuted_axes_is_refused(tmp_path):
    src = tmp_path / "stack.mrc"
    _mrc(src, np.zeros((3, 8, 10), np.int16))
    src.write_bytes(src.read_bytes() + bytes(7))
    before = _listing(tmp_path)
    with pytest.raises(
        TesseraInputError,
        match=r"expected 1504 bytes, the file has 1511 \(extra bytes: damaged\?\)",
    ) as info:
        _ingest(src, tmp_path, fmt="mrc")
    _one_line_and_nothing_written(info, src, tmp_path, before)
    _mrc(src, np.zeros((3, 8, 10), np.int16))
    with mrcfile.open(src, mode="r+") as mrc:
        mrc.header.mapc, mrc.header.mapr = 2, 1  # rows and columns swapped on disk
    before = _listing(tmp_path)
    with pytest.raises(
        TesseraInputError, match=r"axis order mapc, mapr, maps = \(2, 1, 3\), expected \(1, 2, 3\)"
    ) as info:
        _ingest(src, tmp_path, fmt="mrc")
    _one_line_and_nothing_written(info, src, tmp_path, before)


def test_float_stack_with_nan_is_refused(tmp_path):
    src = tmp_path / "stack.tif"
    volume = np.ones((3, 8, 8), np.float32)
    volume[2, 4, 4] = np.nan
    tifffile.imwrite(src, volume, photometric="minisblack")
    before = _listing(tmp_path)
    with pytest.raises(
        TesseraInputError,
        match=r"section 2 holds 1 NaN or infinite value\(s\); expected finite numbers",
    ) as info:
        _ingest(src, tmp_path)
    _one_line_and_nothing_written(info, src, tmp_path, before)


def test_float64_values_beyond_float32_range_keep_their_grey_levels(tmp_path):
    # IEEE 754: float32 holds magnitudes up to about 3.4e38; these values overflowed to
    # infinity in a float32 mapping and came in as a black image
    rng = np.random.default_rng(2)
    grey = rng.integers(0, 256, (3, 16, 16)).astype(np.float64)
    tifffile.imwrite(tmp_path / "big.tif", grey * 1e304, photometric="minisblack")
    tifffile.imwrite(tmp_path / "small.tif", grey, photometric="minisblack")
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no overflow on the way
        for name in ("big", "small"):
            ingest_job(
                tmp_path / f"{name}.tif",
                tmp_path / f"{name}.ome.zarr",
                fmt="tiff_stack",
                spacing=SPACING,
            )
    big, small = (
        open_image(tmp_path / f"{n}.ome.zarr")[1]["levels"][0][:] for n in ("big", "small")
    )
    # a scale factor does not change a percentile stretch (up to rounding at a level's edge)
    assert big.std() > 30 and np.abs(big.astype(int) - small.astype(int)).max() <= 1


def _numbered_folder(folder, volume, numbers, name="sec_{:04d}.tif"):
    folder.mkdir()
    for n, plane in zip(numbers, volume, strict=True):
        tifffile.imwrite(folder / name.format(n), plane)


def test_lost_section_becomes_an_excluded_placeholder(tmp_path):
    # Serial sections numbered 1..12 with number 5 lost (common practice: one file per section,
    # numbered in cutting order). Closing the gap would join sections 4 and 6 as neighbours.
    volume = np.random.default_rng(2).integers(1, 256, (11, 32, 32), dtype=np.uint8)
    numbers = [n for n in range(1, 13) if n != 5]
    _numbered_folder(tmp_path / "slices", volume, numbers)
    out = tmp_path / "o.ome.zarr"
    summary = ingest_job(tmp_path / "slices", out, fmt="slice_folder", spacing=SPACING)
    assert summary["shape"] == [12, 32, 32] and summary["missing_sections"] == [4]
    _, info = open_image(out)
    expected = np.insert(volume, 4, 0, axis=0)  # the written sections, a blank at z = 4
    np.testing.assert_array_equal(info["levels"][0][:], expected)
    assert info["extra"]["missing_sections"] == [4]
    result = section_qc_job(
        out, table_path=tmp_path / "sections.tsv", plot_path=tmp_path / "qc.png"
    )
    table = read_qc_table(tmp_path / "sections.tsv")
    assert table.loc[table["z"] == 4, "reason"].tolist() == ["missing"]
    assert excluded_sections(tmp_path / "sections.tsv") == [4]
    assert result["flagged"] == {4: "missing"}
    # exclude_flagged=False keeps imaged sections but never a section that was not imaged
    section_qc_job(
        out,
        table_path=tmp_path / "info.tsv",
        plot_path=tmp_path / "info.png",
        exclude_flagged=False,
    )
    assert excluded_sections(tmp_path / "info.tsv") == [4]


def test_lost_section_is_refused_when_asked(tmp_path):
    volume = np.zeros((10, 8, 8), np.uint8)
    _numbered_folder(tmp_path / "slices", volume, [n for n in range(12) if n not in (3, 7)])
    before = _listing(tmp_path)
    with pytest.raises(
        TesseraInputError,
        match=r"section number\(s\) 3, 7 missing from the sequence 0\.\.11: expected 12 sections, "
        r"found 10 files; set ingest.missing_sections: placeholder",
    ) as info:
        _ingest(tmp_path / "slices", tmp_path, fmt="slice_folder", missing_sections="refuse")
    _one_line_and_nothing_written(info, tmp_path / "slices", tmp_path, before)


@pytest.mark.parametrize(
    ("numbers", "message"),
    [
        # a stray file far beyond the others: 4996 blank sections
        (
            [0, 1, 2, 3, 5000],
            r"section numbers 0 to 5000 in steps of 1 make 5001 sections, 4996 of them without a file",
        ),
        # depths in steps of 50 with one at 140: the common step becomes 10, 44 blank sections
        (
            [0, 50, 100, 140, 200, 250, 300, 350, 400, 450, 500, 550],
            r"section numbers 0 to 550 in steps of 10 make 56 sections, 44 of them without a file",
        ),
    ],
)
def test_a_numbering_that_would_be_mostly_blank_sections_is_refused(tmp_path, numbers, message):
    # A lost section becomes a blank placeholder; a numbering with more lost than a quarter of
    # its sections is refused in one line instead of becoming a stack of mostly blank sections.
    volume = np.zeros((len(numbers), 8, 8), np.uint8)
    _numbered_folder(tmp_path / "slices", volume, numbers)
    before = _listing(tmp_path)
    with pytest.raises(TesseraInputError, match=message) as info:
        _ingest(tmp_path / "slices", tmp_path, fmt="slice_folder")
    _one_line_and_nothing_written(info, tmp_path / "slices", tmp_path, before)
    assert (
        "expected at most a quarter lost (a stray file, or numbers that are not a regular "
        "sequence? rename or remove them)" in str(info.value)
    )


def _pages_of_two_sizes(src):
    # pages written one by one by tifffile each carry a shape of their own
    with tifffile.TiffWriter(src) as writer:
        for z in range(5):
            writer.write(np.zeros((20, 20) if z == 3 else (32, 32), np.uint8))


@pytest.mark.parametrize(
    ("write", "message"),
    [
        # one page of another size: the problem to name, not a page count
        (
            _pages_of_two_sizes,
            "the shape description states arrays of shape (32, 32), (20, 20), not a whole number "
            "of sections of page 0's 32 x 32 pixels; expected one stack of sections of one size",
        ),
        # one 2D image: objects one section thick would get volumes and surfaces, and no tile
        # split into sections apart in z exists
        (
            lambda src: tifffile.imwrite(src, np.zeros((48, 64), np.uint8)),
            "holds a single section of 48 x 64 pixels; expected a stack of sections (z, y, x): "
            "save every section into one multi-page file, or use format slice_folder for one "
            "file per section",
        ),
    ],
)
def test_a_tiff_that_is_not_one_stack_of_equal_sections_is_refused(tmp_path, write, message):
    src = tmp_path / "stack.tif"
    write(src)
    before = _listing(tmp_path)
    with pytest.raises(TesseraInputError) as info:
        _ingest(src, tmp_path)
    assert _one_line_and_nothing_written(info, src, tmp_path, before) == f"{src}: {message}"


def test_numbering_by_a_constant_step_has_no_gap(tmp_path):
    # Files named by cutting depth in nm (z0000, z0050, ...): a step of 50, nothing lost.
    volume = np.random.default_rng(4).integers(0, 256, (4, 8, 8), dtype=np.uint8)
    folder = tmp_path / "slices"
    folder.mkdir()
    for depth, plane in zip([0, 50, 100, 150], volume, strict=True):
        PILImage.fromarray(plane).save(folder / f"z{depth:04d}.png")
    summary = ingest_job(folder, tmp_path / "o.ome.zarr", fmt="slice_folder", spacing=SPACING)
    assert summary["missing_sections"] == []
    np.testing.assert_array_equal(open_image(tmp_path / "o.ome.zarr")[1]["levels"][0][:], volume)


@pytest.mark.parametrize(
    ("names", "message"),
    [
        (
            ["s1.tif", "s01.tif", "s2.tif"],
            r"section number 1 appears twice \('s01\.tif' and 's1\.tif'\)",
        ),
        (["s1.tif", "s1.png", "s2.tif"], "section number 1 appears twice"),
        (["s1.tif", "overview.tif"], "section file 'overview.tif' has no section number"),
    ],
)
def test_ambiguous_section_numbers_are_refused(tmp_path, names, message):
    folder = tmp_path / "slices"
    folder.mkdir()
    for name in names:
        if name.endswith(".png"):
            PILImage.fromarray(np.zeros((8, 8), np.uint8)).save(folder / name)
        else:
            tifffile.imwrite(folder / name, np.zeros((8, 8), np.uint8))
    before = _listing(tmp_path)
    with pytest.raises(TesseraInputError, match=message) as info:
        _ingest(folder, tmp_path, fmt="slice_folder")
    _one_line_and_nothing_written(info, folder, tmp_path, before)


@pytest.mark.parametrize(
    ("names", "numbers"),
    [
        # numbers worked by hand from the invented names: the one group of digits that
        # changes from file to file is the section number, wherever it stands
        (["s_0000_5nm.tif", "s_0001_5nm.tif", "s_0003_5nm.tif"], [0, 1, 2, 3]),
        (["em5nm_z0003.tif", "em5nm_z0004.tif", "em5nm_z0005.tif"], [3, 4, 5]),
        (["run2_sec010_tile1.tif", "run2_sec011_tile1.tif", "run2_sec012_tile1.tif"], [10, 11, 12]),
        # two groups change and the last tells the files apart: the last one numbers them
        (["a1_s3.tif", "a2_s4.tif", "a1_s5.tif"], [3, 4, 5]),
        # one name per section, nothing else in it
        (["7.tif", "8.tif"], [7, 8]),
    ],
)
def test_the_group_of_digits_that_changes_numbers_the_sections(names, numbers):
    # `names` are listed in section order by hand; the folder lists them in another
    out = number_sections(names[::-1])
    assert out["numbers"] == numbers
    assert out["names"] == names


def test_a_folder_numbered_in_the_middle_of_its_names_is_ingested_in_order(tmp_path):
    # sections 0, 1, 2 and 4 with the pixel size after the number; section 3 lost
    volume = np.random.default_rng(9).integers(1, 256, (4, 8, 8), dtype=np.uint8)
    _numbered_folder(tmp_path / "slices", volume, [0, 1, 2, 4], name="s_{:04d}_5nm.tif")
    summary = ingest_job(
        tmp_path / "slices", tmp_path / "o.ome.zarr", fmt="slice_folder", spacing=SPACING
    )
    assert summary["shape"] == [5, 8, 8] and summary["missing_sections"] == [3]
    expected = np.insert(volume, 3, 0, axis=0)  # the planes as written, a blank at z = 3
    np.testing.assert_array_equal(open_image(tmp_path / "o.ome.zarr")[1]["levels"][0][:], expected)


def test_names_where_several_groups_of_digits_change_and_the_last_clashes_are_refused(tmp_path):
    names = [
        "run2_sec010_tile1.tif",
        "run2_sec010_tile2.tif",
        "run2_sec011_tile1.tif",
        "run2_sec011_tile2.tif",
    ]
    folder = tmp_path / "slices"
    folder.mkdir()
    for name in names:
        tifffile.imwrite(folder / name, np.zeros((8, 8), np.uint8))
    before = _listing(tmp_path)
    with pytest.raises(TesseraInputError) as info:
        _ingest(folder, tmp_path, fmt="slice_folder")
    message = _one_line_and_nothing_written(info, folder, tmp_path, before)
    assert message == (
        f"{folder}: section number 1 appears twice ('run2_sec010_tile1.tif' and "
        "'run2_sec011_tile1.tif'): digit groups 2 and 3 of the names (counted from the left) "
        "vary from file to file, so which one numbers the sections is ambiguous, and the last "
        "one gives both files this number; expected one group of digits that changes from "
        "section to section (rename the files)"
    )


def test_palette_png_is_refused_not_read_as_indices(tmp_path):
    # A palette ("P" mode) PNG stores colour-table indices, not grey values (PNG spec, colour
    # type 3); reading the indices would silently alter the section.
    folder = tmp_path / "slices"
    folder.mkdir()
    for z in range(2):
        PILImage.fromarray(np.full((8, 8), 3 * z, np.uint8)).convert("P").save(folder / f"{z}.png")
    before = _listing(tmp_path)
    with pytest.raises(
        TesseraInputError, match="expected a greyscale image .*, got mode P"
    ) as info:
        _ingest(folder, tmp_path, fmt="slice_folder")
    _one_line_and_nothing_written(info, folder, tmp_path, before)


def test_zarr_declaring_fewer_sections_than_written_is_refused(tmp_path):
    # zarr would read the first 4 sections and ignore the chunk files of the fifth
    src = tmp_path / "stack.zarr"
    arr = zarr.create_array(store=str(src), shape=(5, 8, 8), chunks=(1, 8, 8), dtype="uint8")
    arr[:] = 1
    meta = json.loads((src / "zarr.json").read_text())
    meta["shape"] = [4, 8, 8]
    (src / "zarr.json").write_text(json.dumps(meta))
    before = _listing(tmp_path)
    with pytest.raises(
        TesseraInputError,
        match=r"chunk file c/4/0/0 lies outside the declared shape \(4, 8, 8\) \(chunk grid "
        r"\(4, 1, 1\)\): the metadata state less than was written",
    ) as info:
        _ingest(src, tmp_path, fmt="zarr")
    _one_line_and_nothing_written(info, src, tmp_path, before)


@pytest.mark.parametrize("compression", ["zlib", "lzma"])
def test_tiff_with_a_damaged_compressed_stream_is_refused(tmp_path, compression, damage_tiff_page):
    # A deflate or LZMA page (TIFF compression 8 and 34925) is decoded by Python's zlib or lzma
    # when imagecodecs is absent; their errors for a broken stream are neither OSError nor
    # ValueError. One changed byte in the middle of page 1's stream breaks it.
    src = tmp_path / "stack.tif"
    volume = np.random.default_rng(3).integers(0, 256, (3, 16, 16), dtype=np.uint8)
    tifffile.imwrite(src, volume, photometric="minisblack", compression=compression)
    damage_tiff_page(src, 1)
    before = _listing(tmp_path)
    with pytest.raises(TesseraInputError, match="cannot read page 1: ") as info:
        _ingest(src, tmp_path)
    assert str(info.value).endswith(
        "expected a page that decodes whole: the file is damaged (copy or export it again)"
    )
    _one_line_and_nothing_written(info, src, tmp_path, before)


def test_the_stack_check_reads_every_section_only_where_an_earlier_image_would_be_lost(
    tmp_path, damage_tiff_page
):
    # A deflate page with one changed byte opens like a sound one; only decoding it finds the
    # damage. The check leaves decoding to ingest while the dataset has no image (nothing to
    # lose), and decodes every section when an earlier image exists, refusing the stack in
    # the line ingest would give.
    src = tmp_path / "stack.tif"
    volume = np.random.default_rng(5).integers(0, 256, (3, 16, 16), dtype=np.uint8)
    tifffile.imwrite(src, volume, photometric="minisblack", compression="zlib")
    earlier = tmp_path / "raw.ome.zarr"
    sound = check_stack_job(
        src, tmp_path / "a.json", fmt="tiff_stack", spacing=SPACING, earlier_image=earlier
    )
    assert sound["sections_read"] == 0 and sound["shape"] == [3, 16, 16]
    earlier.mkdir()
    sound = check_stack_job(
        src, tmp_path / "b.json", fmt="tiff_stack", spacing=SPACING, earlier_image=earlier
    )
    assert sound["sections_read"] == 3
    damage_tiff_page(src, 2)
    check = tmp_path / "c.json"
    with pytest.raises(TesseraInputError, match="cannot read page 2: ") as info:
        check_stack_job(src, check, fmt="tiff_stack", spacing=SPACING, earlier_image=earlier)
    assert str(src) in str(info.value) and "\n" not in str(info.value)
    assert not check.exists()
    # without an earlier image the damage is left for ingest to find
    found = check_stack_job(src, check, fmt="tiff_stack", spacing=SPACING)
    assert found["sections_read"] == 0 and check.exists()


def test_a_tiff_header_the_sheet_overrides_is_logged(tmp_path, caplog):
    # ImageJ's TIFF calibration: XResolution/YResolution in pixels per unit, "spacing" and
    # "unit" in the description (tifffile's imagej=True writer). The sheet wins, and says so.
    src = tmp_path / "stack.tif"
    volume = np.zeros((3, 16, 16), np.uint8)
    tifffile.imwrite(
        src,
        volume,
        imagej=True,
        resolution=(1 / 8, 1 / 8),
        metadata={"axes": "ZYX", "spacing": 40, "unit": "nm"},
    )
    with caplog.at_level("WARNING"):
        found = check_stack_job(src, tmp_path / "a.json", fmt="tiff_stack", spacing=(40, 10, 10))
    assert found["spacing"] == [40.0, 10.0, 10.0]
    lines = [r.getMessage() for r in caplog.records]
    assert any(
        "header gives voxel size 8 nm along y; the sheet's voxel_y_nm (10 nm)" in m for m in lines
    )
    caplog.clear()
    with caplog.at_level("WARNING"):
        check_stack_job(src, tmp_path / "b.json", fmt="tiff_stack", spacing=(None, None, None))
    assert not caplog.records  # taken from the header: nothing to say


def test_a_plain_stack_saved_as_imagej_channels_is_refused_with_the_fix(tmp_path):
    # tifffile's ImageJ writer labels the pages of a 3D array "channels" unless given its axes
    # (its imagej=True default, checked here on the file it writes): a user's plain z stack
    # then reads as 12 channels. Refused as any multi-channel TIFF, with how to save it.
    src = tmp_path / "stack.tif"
    tifffile.imwrite(src, np.zeros((12, 16, 16), np.uint8), imagej=True)
    with tifffile.TiffFile(src) as tif:
        assert tif.imagej_metadata["channels"] == 12 and "slices" not in tif.imagej_metadata
    before = _listing(tmp_path)
    with pytest.raises(TesseraInputError) as info:
        _ingest(src, tmp_path)
    message = _one_line_and_nothing_written(info, src, tmp_path, before)
    assert "the ImageJ description states 12 channels; expected one page per z section" in message
    assert "if the pages are z sections, save the stack with ImageJ axes ZYX (slices" in message
