"""Config and datasets sheet: the shipped files validate; every bad input is one clear error."""

import copy
import os
import re

import pytest
import yaml

from tessera.errors import TesseraInputError
from tessera.workflow.config import (
    check_annotated_datasets,
    check_config_file,
    check_test_datasets,
    load_config,
    load_datasets,
    read_yaml,
    sheet_spacing,
    unusual_voxel_sizes,
)

HEADER = "dataset\tcondition\tsubject\tpath\tformat\tvoxel_z_nm\tvoxel_y_nm\tvoxel_x_nm\troi_mask"


def test_shipped_config_and_sheet_validate(repo, schemas, shipped_config):
    config = load_config(shipped_config, schemas / "config.schema.yaml")
    assert config["pyramid"]["levels"] == 3 and config["qc"]["exclude_flagged"] is True
    sheet = load_datasets(
        repo / config["datasets"],
        schemas / "datasets.schema.yaml",
        base_dir=repo,
        generated_dir="demo/data",
    )
    assert list(sheet.index) == ["tn1", "tn2", "tn3", "cd1", "cd2", "cd3"]
    assert set(sheet["condition"]) == {"thermoneutral", "cold"}
    assert sheet_spacing(sheet.loc["tn1"]) == (40.0, 8.0, 8.0)


def test_defaults_are_filled_from_the_schema(schemas):
    target = {"downsample": 2, "annotations": {"labels": "truth/{dataset}.tif"}}
    config = load_config(
        {"datasets": "x.tsv", "targets": {"mitochondria": target}}, schemas / "config.schema.yaml"
    )
    assert config["ingest"]["chunks"] == [1, 512, 512]
    assert config["qc"]["max_flat_fraction"] == 0.1
    assert config["targets"]["mitochondria"]["cascade"]["stages"] == 2
    assert config["targets"]["mitochondria"]["split"]["guard_sections"] == 2
    assert "demo" not in config


@pytest.mark.parametrize(
    ("edit", "message"),
    [
        (
            lambda c: c.update(colour="red"),
            r"key \(top level\): Additional properties are not allowed \('colour'",
        ),
        (
            lambda c: c["pyramid"].update(levles=3),
            r"key pyramid: Additional properties are not allowed \('levles' was unexpected\)",
        ),
        (
            lambda c: c["pyramid"].update(levels=-1),
            r"key pyramid.levels: -1 is less than the minimum of 0",
        ),
        (
            lambda c: c["qc"].update(max_flat_fraction=1.5),
            r"key qc.max_flat_fraction: 1.5 is greater than the maximum of 1",
        ),
        (
            lambda c: c["targets"]["mitochondria"].update(downsample=3),
            r"key targets.mitochondria.downsample: 3 is not one of 1, 2, 4, 8, 16$",
        ),
        (
            lambda c: c["ingest"].update(chunks=[1, 256]),
            r"key ingest.chunks: \[1, 256\] is too short",
        ),
        (
            lambda c: c["targets"]["mitochondria"]["annotations"].update(sections="some"),
            r'key targets.mitochondria.annotations.sections: "some" is not one of "all", "labelled"$',
        ),
        (
            lambda c: c["targets"]["mitochondria"].update(
                annotations={"painted": {"points": "p.tsv", "masks": "m"}, "sections": "all"}
            ),
            r"key targets.mitochondria.annotations: 'labels' is a dependency of 'sections'",
        ),
        (lambda c: c.pop("datasets"), r"'datasets' is a required property"),
        (
            lambda c: c["targets"].update({"Bad Name": {"downsample": 2}}),
            r"key targets: 'Bad Name' does not match",
        ),
        (
            lambda c: c["qc"].update(exclude_flagged="yes"),
            r"key qc.exclude_flagged: 'yes' is not of type 'boolean'",
        ),
        (
            lambda c: c["targets"]["mitochondria"]["cascade"].update(stages=0),
            r"key targets.mitochondria.cascade.stages: 0 is less than the minimum of 1",
        ),
        (
            lambda c: c["targets"]["mitochondria"]["cascade"].update(classifier="svm"),
            r'key targets.mitochondria.cascade.classifier: "svm" is not one of "ldnn", "mlp", ',
        ),
        (
            # spelled as the user writes YAML, not as Python prints it
            lambda c: c["pyramid"].update(downsample_z="yes"),
            r'key pyramid.downsample_z: "yes" is not one of true, false, "auto"$',
        ),
        (
            lambda c: c["targets"]["mitochondria"]["annotations"].update(labels="truth.tif"),
            r"key targets.mitochondria.annotations.labels: 'truth.tif' does not match",
        ),
        (
            lambda c: c["targets"]["mitochondria"]["split"].update(fractions=[0.5, 0.5]),
            r"key targets.mitochondria.split.fractions: \[0.5, 0.5\] is too short",
        ),
        (
            # sums to 1.1: checked when the config loads, not when the split job runs
            lambda c: c["targets"]["mitochondria"]["split"].update(fractions=[0.6, 0.2, 0.3]),
            r"key targets.mitochondria.split.fractions: \[0.6, 0.2, 0.3\]: expected the "
            r"training, validation and test fractions, each above 0, summing to 1",
        ),
        (
            # no validation tiles: no threshold could be chosen
            lambda c: c["targets"]["mitochondria"]["split"].update(fractions=[1, 0, 0]),
            r"key targets.mitochondria.split.fractions: \[1, 0, 0\]: expected",
        ),
        (
            # a brace too many: str.format would fail inside the workflow
            lambda c: c["targets"]["mitochondria"]["annotations"].update(labels="t/{dataset}}.tif"),
            r"key targets.mitochondria.annotations.labels: 't/\{dataset\}\}.tif' is not a path "
            r"template \(Single '\}' encountered in format string\)",
        ),
        (
            lambda c: c["targets"]["mitochondria"]["annotations"].update(
                labels="{dataset}_{z}.tif"
            ),
            r"annotations.labels: '\{dataset\}_\{z\}.tif' is not a path template \(it holds \{z\}\)",
        ),
        (
            # JSON Schema counts 1.0 as an integer; the jobs did not, and refused it only after
            # Snakemake had cleared their earlier outputs
            lambda c: c["pyramid"].update(levels=1.0),
            r"key pyramid.levels: 1.0 is not of type 'integer'; write the whole number without "
            r"a decimal point \(1\)$",
        ),
        (
            lambda c: c["targets"]["mitochondria"]["tiles"].update(size=48.0),
            r"key targets.mitochondria.tiles.size: 48.0 is not of type 'integer'",
        ),
        (
            # NaN passes every minimum and maximum (IEEE 754: comparisons with NaN are false);
            # as a minimum volume it removed every object without a word
            lambda c: c["targets"]["mitochondria"]["objects"].update(min_volume_um3=float("nan")),
            r"key targets.mitochondria.objects.min_volume_um3: .nan is not a number; expected a "
            r"number$",
        ),
        (
            lambda c: c["targets"]["mitochondria"]["objects"].update(high=float("nan")),
            r"key targets.mitochondria.objects.high: .nan is not a number; expected a number or "
            r"null$",
        ),
        (
            # checked when the config loads, not when the first ingest job runs
            lambda c: c["ingest"].update(percentiles=[99.9, 0.1]),
            r"key ingest.percentiles: \[99.9, 0.1\]: expected the lower percentile first and "
            r"below the upper one",
        ),
    ],
)
def test_bad_config_values_name_the_key(schemas, shipped_config, edit, message):
    config = copy.deepcopy(shipped_config)
    edit(config)
    with pytest.raises(TesseraInputError, match=message) as info:
        load_config(config, schemas / "config.schema.yaml", source="config/config.yaml")
    assert str(info.value).startswith("config/config.yaml: ")


def test_a_key_given_twice_in_the_config_file_is_refused_naming_both_lines(tmp_path):
    # YAML readers keep the last of two equal keys (PyYAML does, silently): a second predict:
    # block would drop the first one's settings without a word.
    path = tmp_path / "config.yaml"
    path.write_text(
        "predict:\n  block: [8, 512, 512]\nstudy: {name: x}\npredict:\n  shard_jobs: 3\n"
    )
    with pytest.raises(TesseraInputError) as info:
        check_config_file(path)
    assert str(info.value) == (
        f"{path}: line 4: key 'predict' is given twice in one mapping (first on line 1); YAML "
        "would keep only the last one"
    )


def test_a_folder_given_as_the_datasets_sheet_is_refused(tmp_path, schemas, monkeypatch):
    (tmp_path / "config").mkdir()
    monkeypatch.chdir(tmp_path)  # the project folder: the sheet must lie under it
    with pytest.raises(TesseraInputError) as info:
        load_datasets("config", schemas / "datasets.schema.yaml")
    assert str(info.value) == (
        "config: is a folder; expected the datasets sheet, a tab-separated file (key datasets)"
    )


def test_yaml_is_loaded_safely(tmp_path):
    # yaml.safe_load refuses Python object tags (PyYAML documentation): no code runs on load.
    path = tmp_path / "c.yaml"
    path.write_text("datasets: !!python/object/apply:os.system ['echo hacked']\n")
    with pytest.raises(TesseraInputError, match="not valid YAML"):
        read_yaml(path)


def test_a_yaml_file_not_in_utf8_is_one_line(tmp_path):
    # YAML files are UTF-8 (YAML 1.2 allows UTF-8/16/32; PyYAML reads what it is given): a
    # Latin-1 accent is a byte UTF-8 cannot decode
    path = tmp_path / "c.yaml"
    path.write_bytes("study: {name: caf\u00e9}\n".encode("latin-1"))
    with pytest.raises(TesseraInputError, match=r"c\.yaml: not UTF-8 text; expected a YAML file"):
        read_yaml(path)


@pytest.mark.parametrize(
    "tag",
    [
        "!!python/object:argparse.Namespace {x: 1}",
        "!!python/object/new:argparse.Namespace {state: {x: 1}}",
        "!!python/object/apply:os.mkdir ['{marker}']",
        "!!python/name:os.mkdir",
        "!!python/tuple [1, 2]",
    ],
)
def test_yaml_python_tags_are_refused_by_our_loader(tmp_path, tag):
    # yaml.safe_load knows only the standard YAML tags (PyYAML documentation, SafeLoader)
    path = tmp_path / "c.yaml"
    path.write_text(f"datasets: {tag.replace('{marker}', str(tmp_path / 'ran'))}\n")
    with pytest.raises(
        TesseraInputError, match=r"c\.yaml: not valid YAML.*could not determine a constructor"
    ):
        read_yaml(path)
    assert not (tmp_path / "ran").exists()


def test_config_file_read_by_snakemake_runs_no_code_and_objects_fail_the_schema(
    tmp_path, schemas, repo
):
    # Snakemake reads the `configfile:` itself (snakemake.common.configfile, through yte with
    # PyYAML's FullLoader). FullLoader refuses the tags that construct or call objects; the
    # `!!python/name` tag it does resolve yields a reference, which the schema then refuses.
    from snakemake.common.configfile import load_configfile
    from snakemake_interface_common.exceptions import WorkflowError

    marker = tmp_path / "ran"
    for tag in (
        f"!!python/object/apply:os.mkdir ['{marker}']",
        "!!python/object/new:argparse.Namespace {}",
        "!!python/object:argparse.Namespace {x: 1}",
    ):
        path = tmp_path / "c.yaml"
        path.write_text(f"datasets: {tag}\n")
        with pytest.raises(WorkflowError, match="not valid JSON or YAML"):
            load_configfile(str(path))
    assert not marker.exists()
    shipped = (repo / "config" / "config.yaml").read_text()
    path.write_text(
        shipped.replace("datasets: config/datasets.tsv", "datasets: !!python/name:os.mkdir")
    )
    config = load_configfile(str(path))
    with pytest.raises(
        TesseraInputError, match=r"key datasets: <built-in function mkdir> is not of type 'string'"
    ):
        load_config(config, schemas / "config.schema.yaml")
    assert not marker.exists()


def _sheet(tmp_path, *rows, header=HEADER):
    (tmp_path / "stack.tif").write_bytes(b"")
    path = tmp_path / "datasets.tsv"
    path.write_text("\n".join([header, *rows]) + "\n")
    return path


GOOD = "a1\tctrl\tm1\tstack.tif\ttiff_stack\t40\t8\t8\t"


def test_dataset_ids_that_differ_only_in_capitals_are_refused(tmp_path, schemas):
    # results/A1 and results/a1 are one folder where the file system ignores case (common on
    # laptops): the two datasets would overwrite each other's results.
    path = _sheet(tmp_path, GOOD, GOOD.replace("a1", "A1", 1).replace("m1", "m2"))
    with pytest.raises(TesseraInputError) as info:
        load_datasets(path, schemas / "datasets.schema.yaml", base_dir=tmp_path)
    assert str(info.value) == (
        f"{path}: dataset ids A1, a1 differ only in capitals; they would share result folders on "
        "file systems that ignore case: expected ids that differ otherwise"
    )


def test_an_in_plane_voxel_size_far_from_the_rest_is_named(tmp_path, schemas):
    # Common practice: the datasets of one study are imaged at in-plane voxel sizes of one
    # order; 0.4 beside 8 nm is a typing slip (20x), and 80 beside 8 nm is ångström typed for
    # nanometres, exactly 10x: both are named; 16 nm (2x) is not.
    rows = [
        GOOD.replace("a1", f"a{k}", 1).replace("m1", f"m{k}", 1).replace("stack.tif", f"s{k}.tif")
        for k in range(1, 5)
    ]
    rows.append("b1\tctrl\tm9\tstack.tif\ttiff_stack\t40\t0.4\t0.4\t")
    rows.append("c1\tctrl\tm8\tc.tif\ttiff_stack\t400\t80\t80\t")
    rows.append("d1\tctrl\tm7\td.tif\ttiff_stack\t40\t16\t16\t")
    path = _sheet(tmp_path, *rows)
    for name in ("s1", "s2", "s3", "s4", "c", "d"):
        (tmp_path / f"{name}.tif").write_bytes(b"")
    sheet = load_datasets(path, schemas / "datasets.schema.yaml", base_dir=tmp_path)
    assert unusual_voxel_sizes(sheet, sheet_path=path) == [
        f"{path}: dataset {d}: {c} {v} nm is {r}x {how} than the study's median in-plane "
        "voxel size (8 nm); expected sizes within 10x of it (a unit slip?)"
        for d, v, r, how in (("b1", "0.4", 20, "finer"), ("c1", "80", 10, "coarser"))
        for c in ("voxel_y_nm", "voxel_x_nm")
    ]
    assert unusual_voxel_sizes(sheet.iloc[:4], sheet_path=path) == []


def test_voxel_sizes_typed_in_another_order_are_refused(tmp_path, schemas):
    # EM pixels are square or nearly so (common practice; a tilt-corrected FIB-SEM image: 1.27):
    # a row with 8, 8, 40 nm under z, y, x is a stack of 40 nm sections typed as x, y, z, which
    # would run silently in 3D with every surface wrong. Refused in one line naming the row.
    path = _sheet(tmp_path, "a1\tctrl\tm1\tstack.tif\ttiff_stack\t8\t8\t40\t")
    with pytest.raises(TesseraInputError) as info:
        load_datasets(path, schemas / "datasets.schema.yaml", base_dir=tmp_path)
    assert str(info.value) == (
        f"{path}, row 2: voxel_y_nm 8 and voxel_x_nm 40 differ 5x; expected near-square pixels "
        "(sides within 2x), with the columns in the order z, y, x"
    )
    tilted = _sheet(tmp_path, "a1\tctrl\tm1\tstack.tif\ttiff_stack\t5\t6.35\t5\t")
    assert load_datasets(tilted, schemas / "datasets.schema.yaml", base_dir=tmp_path).shape[0] == 1


def test_a_sheet_saved_as_utf16_is_named_as_not_utf8(tmp_path, schemas):
    path = _sheet(tmp_path, GOOD)
    path.write_text(path.read_text(), encoding="utf-16")
    with pytest.raises(TesseraInputError) as info:
        load_datasets(path, schemas / "datasets.schema.yaml", base_dir=tmp_path)
    assert str(info.value) == f"{path}: not UTF-8 text; save the sheet as UTF-8 tab-separated text"


def test_good_sheet_with_blank_voxel_size_and_mask(tmp_path, schemas):
    (tmp_path / "stack.mrc").write_bytes(b"")
    sheet = load_datasets(
        _sheet(tmp_path, GOOD, "a2\tctrl\tm2\tstack.mrc\tmrc\t\t\t\t"),
        schemas / "datasets.schema.yaml",
        base_dir=tmp_path,
    )
    assert sheet_spacing(sheet.loc["a2"]) == (None, None, None)
    assert sheet.loc["a1", "roi_mask"] is None


@pytest.mark.parametrize(
    ("rows", "message"),
    [
        ([GOOD, GOOD], "dataset ids must be unique; repeated: a1"),
        (
            ["a 1\tctrl\tm1\tstack.tif\ttiff_stack\t40\t8\t8\t"],
            r"row 2: key dataset: 'a 1' does not match",
        ),
        (
            ["a/1\tctrl\tm1\tstack.tif\ttiff_stack\t40\t8\t8\t"],
            r"row 2: key dataset: 'a/1' does not match",
        ),
        (["a1\t\tm1\tstack.tif\ttiff_stack\t40\t8\t8\t"], r"row 2: column condition is empty"),
        (["a1\tctrl\t\tstack.tif\ttiff_stack\t40\t8\t8\t"], r"row 2: column subject is empty"),
        (
            ["a1\tctrl\tm1\tstack.tif\tjpeg\t40\t8\t8\t"],
            r'row 2: key format: "jpeg" is not one of "tiff_stack"',
        ),
        (
            ["a1\tctrl\tm1\tstack.tif\ttiff_stack\t0\t8\t8\t"],
            r"row 2: key voxel_z_nm: 0.0 is less than the minimum of 0.1",
        ),
        (
            ["a1\tctrl\tm1\tstack.tif\ttiff_stack\t40\t-8\t8\t"],
            r"row 2: key voxel_y_nm: -8.0 is less than the minimum",
        ),
        # 8 nm written in µm: no EM image has pixels below 0.1 nm (common practice)
        (
            ["a1\tctrl\tm1\tstack.tif\ttiff_stack\t0.04\t0.008\t0.008\t"],
            r"row 2: key voxel_x_nm: 0.008 is less than the minimum of 0.1",
        ),
        (
            ["a1\tctrl\tm1\tstack.tif\ttiff_stack\t40\t8\teight\t"],
            r"row 2, column voxel_x_nm: expected a number in nm, got 'eight'",
        ),
        (
            # Python's float() reads "4_0" as 40 (digit grouping); in a sheet it is a typo
            ["a1\tctrl\tm1\tstack.tif\ttiff_stack\t4_0\t8\t8\t"],
            r"row 2, column voxel_z_nm: expected a number in nm, got '4_0'",
        ),
        (
            ["a1\tctrl\tm1\tstack.tif\ttiff_stack\t40\t8\tnan\t"],
            r"row 2, column voxel_x_nm: expected a finite number",
        ),
        (
            ["a1\tctrl\tm1\tmissing.tif\ttiff_stack\t40\t8\t8\t"],
            r"row 2: column path: file or folder 'missing.tif' not found \(relative paths are "
            r"read from the project folder, ",
        ),
        (
            ["a1\tctrl\tm1\tstack.tif\ttiff_stack\t40\t8\t8\tcells.tif"],
            r"row 2: column roi_mask: file or folder 'cells.tif' not found",
        ),
        ([], "the sheet has no dataset rows"),
        (
            # the animal is the unit of the statistics: a typo in subject would otherwise
            # surface only when the statistics job runs, after every other job
            [GOOD, "a2\tcold\tm1\tstack.tif\ttiff_stack\t40\t8\t8\t"],
            r"datasets.tsv: column subject: animal 'm1' appears under conditions \['ctrl', "
            r"'cold'\] \(rows 2, 3\); expected one condition per animal",
        ),
        (
            # each spelling would be a group of its own in the statistics
            [GOOD, "a2\tCtrl\tm2\tstack.tif\ttiff_stack\t40\t8\t8\t"],
            r"datasets.tsv: column condition: 'ctrl' \(rows 2\) and 'Ctrl' \(rows 3\) differ only "
            r"in capitals or spaces; expected one spelling per condition",
        ),
    ],
)
def test_bad_sheet_rows_name_file_row_and_column(tmp_path, schemas, rows, message):
    path = _sheet(tmp_path, *rows)
    with pytest.raises(TesseraInputError, match=message) as info:
        load_datasets(path, schemas / "datasets.schema.yaml", base_dir=tmp_path)
    assert str(path) in str(info.value)


def test_a_voxel_size_written_in_micrometres_gets_the_nm_value_as_a_hint(tmp_path, schemas):
    # 5 nm written as 0.005 (µm): 1 µm = 1000 nm, so the hint reads 5 nm
    path = _sheet(tmp_path, "a1\tctrl\tm1\tstack.tif\ttiff_stack\t40\t5\t0.005\t")
    with pytest.raises(TesseraInputError) as info:
        load_datasets(path, schemas / "datasets.schema.yaml", base_dir=tmp_path)
    assert str(info.value) == (
        f"{path}, row 2: key voxel_x_nm: 0.005 is less than the minimum of 0.1; voxel sizes "
        "are in nm (0.005 µm = 5 nm?)"
    )
    # zero is no size in another unit: no hint
    path = _sheet(tmp_path, "a1\tctrl\tm1\tstack.tif\ttiff_stack\t0\t5\t5\t")
    with pytest.raises(TesseraInputError) as info:
        load_datasets(path, schemas / "datasets.schema.yaml", base_dir=tmp_path)
    assert str(info.value).endswith("key voxel_z_nm: 0.0 is less than the minimum of 0.1")


def test_several_datasets_of_one_animal_in_one_condition_load(tmp_path, schemas):
    rows = [GOOD, "a2\tctrl\tm1\tstack2.tif\ttiff_stack\t40\t8\t8\t"]
    (tmp_path / "stack2.tif").write_bytes(b"")
    sheet = load_datasets(
        _sheet(tmp_path, *rows), schemas / "datasets.schema.yaml", base_dir=tmp_path
    )
    assert list(sheet["subject"]) == ["m1", "m1"]


@pytest.mark.parametrize("spelling", ["stack.tif", "./sub/../stack.tif"])
def test_two_rows_naming_one_stack_are_refused(tmp_path, schemas, spelling):
    # One image under two rows would be measured twice and count as two animals in the
    # statistics (pseudo-replication; common practice: the animal is the unit).
    (tmp_path / "sub").mkdir()
    path = _sheet(tmp_path, GOOD, f"a2\tctrl\tm2\t{spelling}\ttiff_stack\t40\t8\t8\t")
    with pytest.raises(TesseraInputError) as info:
        load_datasets(path, schemas / "datasets.schema.yaml", base_dir=tmp_path)
    message = str(info.value)
    assert message.startswith(f"{path}: ") and "\n" not in message
    assert f"column path: rows 2 (a1) and 3 (a2) name the same stack '{spelling}'" in message
    assert (
        "expected one row per stack (one image under two rows would be measured twice, as two "
        "animals)" in message
    )


@pytest.mark.parametrize(
    ("rows", "where"),
    [
        # the open quote swallows the next row: read as it is, a dataset would silently vanish
        (
            ['a1\t"ctrl\tm1\tstack.tif\ttiff_stack\t40\t8\t8\t', "a2\tctrl\tm2\tb.tif"],
            "row 2, column condition",
        ),
        # on the last row it swallows the row's own later cells
        ([GOOD, 'a2\tctrl\t"m2\tb.tif\ttiff_stack\t40\t8\t8\t'], "row 3, column subject"),
    ],
)
def test_a_quote_left_open_in_the_sheet_is_refused(tmp_path, schemas, rows, where):
    # Python's csv module (like spreadsheet programs) reads a cell opened by a quote up to the
    # closing quote, across tabs and lines
    path = _sheet(tmp_path, *rows)
    with pytest.raises(TesseraInputError) as info:
        load_datasets(path, schemas / "datasets.schema.yaml", base_dir=tmp_path)
    message = str(info.value)
    assert message.startswith(f"{path}: {where}: a quote") and "\n" not in message
    assert 'a quote (") opened in this cell' in message
    assert "is not closed, so the cells or rows after it would be read into it" in message
    assert "remove the quote (cells need none) or close it" in message


def test_quoted_cells_that_close_read_as_plain_ones(tmp_path, schemas):
    path = _sheet(tmp_path, '"a1"\t"ctrl"\t"m1"\t"stack.tif"\ttiff_stack\t40\t8\t8\t')
    sheet = load_datasets(path, schemas / "datasets.schema.yaml", base_dir=tmp_path)
    assert list(sheet.index) == ["a1"] and sheet.loc["a1", "condition"] == "ctrl"


@pytest.mark.parametrize(("separator", "named"), [(" ", "spaces"), (",", "commas")])
def test_one_row_separated_by_spaces_or_commas_is_named(tmp_path, schemas, separator, named):
    # A row typed in a text editor with spaces for tabs reads as one cell: the problem to name
    # is its separator, not the columns that then look empty.
    _sheet(tmp_path)
    path = tmp_path / "datasets.tsv"
    path.write_text(f"{HEADER}\n{GOOD}\n{GOOD.replace(chr(9), separator)}\n")
    with pytest.raises(TesseraInputError) as info:
        load_datasets(path, schemas / "datasets.schema.yaml", base_dir=tmp_path)
    assert str(info.value).startswith(f"{path}: row 3 is one cell (")
    assert (
        f"where the header names 9 columns; its values look separated by {named}: separate them "
        "by tabs, like the header"
    ) in str(info.value)


@pytest.mark.parametrize("separator", [",", ";", " "])
def test_a_sheet_separated_by_commas_or_semicolons_is_named(tmp_path, schemas, separator):
    # Spreadsheet programs export "CSV" with commas, or semicolons where the comma is the
    # decimal mark (common practice); read as tab-separated, the header is one long column.
    _sheet(tmp_path)
    path = tmp_path / "datasets.tsv"
    path.write_text(HEADER.replace("\t", separator) + "\n" + GOOD.replace("\t", separator) + "\n")
    with pytest.raises(TesseraInputError) as info:
        load_datasets(path, schemas / "datasets.schema.yaml", base_dir=tmp_path)
    message = str(info.value)
    assert message.startswith(f"{path}: header: one column 'dataset{separator}condition")
    assert "expected columns separated by tabs" in message
    assert f"found them separated by {separator!r}: save the sheet as tab-separated text" in message
    assert "\n" not in message


@pytest.mark.parametrize(
    ("row", "message"),
    [
        (
            "a1\tctrl\tm1\tslices\ttiff_stack\t40\t8\t8\t",
            "row 2: column path: 'slices' is a folder; format tiff_stack is one file; a folder "
            "of section images is format slice_folder",
        ),
        ("a1\tctrl\tm1\tslices\tmrc\t40\t8\t8\t", "column path: 'slices' is a folder; format mrc"),
        (
            "a1\tctrl\tm1\tstack.tif\tslice_folder\t40\t8\t8\t",
            "row 2: column path: 'stack.tif' is a file; format slice_folder is a folder",
        ),
        (
            "a1\tctrl\tm1\tstack.tif\ttiff_stack\t40\t8\t8\tslices",
            "row 2: column roi_mask: 'slices' is a folder; a region mask (a label stack) is one file",
        ),
    ],
)
def test_a_path_of_the_wrong_kind_for_its_format_is_named(tmp_path, schemas, row, message):
    # Without this check the ingest job failed with the reader's own words ("Is a directory")
    # after the run had started.
    (tmp_path / "slices").mkdir()
    path = _sheet(tmp_path, row)
    with pytest.raises(TesseraInputError) as info:
        load_datasets(path, schemas / "datasets.schema.yaml", base_dir=tmp_path)
    assert str(info.value).startswith(f"{path}, ")
    assert message in str(info.value)


@pytest.mark.parametrize(
    ("header", "missing"),
    [
        (HEADER.replace("\tpath", ""), "path"),
        (HEADER.replace("\tformat", ""), "format"),
        # a sheet without its header line: the first row is read as the header
        (GOOD, "dataset, condition, subject, path, format"),
    ],
)
def test_a_header_without_a_required_column_is_named(tmp_path, schemas, header, missing):
    # Before, each row was refused for lacking the key ("row 2: key (top level): 'path' is a
    # required property"), or a missing header line read as repeated columns.
    path = _sheet(tmp_path, GOOD, header=header)
    with pytest.raises(TesseraInputError) as info:
        load_datasets(path, schemas / "datasets.schema.yaml", base_dir=tmp_path)
    assert str(info.value) == (
        f"{path}: header: column(s) {missing} missing; expected a first line naming the columns, "
        "among them dataset, condition, subject, path, format"
    )


@pytest.mark.parametrize("dataset", ["study", "Provenance"])
def test_a_dataset_id_naming_a_folder_of_the_study_is_refused(tmp_path, schemas, dataset):
    # results/study/ and results/provenance/ hold the study's own files; a dataset's results
    # would be written among them (on some file systems whatever the case of its id)
    path = _sheet(tmp_path, GOOD, GOOD.replace("a1", dataset).replace("m1", "m2"))
    with pytest.raises(TesseraInputError) as info:
        load_datasets(path, schemas / "datasets.schema.yaml", base_dir=tmp_path)
    assert str(info.value) == (
        f"{path}, row 3: column dataset: {dataset!r} is the name of the study's own folder "
        f"results/{dataset.lower()}; expected another id (not study or provenance)"
    )


def test_unknown_sheet_column_is_refused(tmp_path, schemas):
    path = _sheet(tmp_path, GOOD + "\tx", header=HEADER + "\tcolour")
    with pytest.raises(
        TesseraInputError, match=r"row 2: key \(top level\): Additional properties.*'colour'"
    ):
        load_datasets(path, schemas / "datasets.schema.yaml", base_dir=tmp_path)


def test_spreadsheet_exports_read_like_the_plain_sheet(tmp_path, schemas):
    # Spreadsheet exports add a UTF-8 byte-order mark, CRLF line ends and empty cells after the
    # last column (common practice: spreadsheet programs' text and CSV exports); they hold nothing.
    second = GOOD.replace("a1", "a2").replace("stack.tif", "stack2.tif")
    text = "\ufeff" + "\r\n".join([HEADER + "\t\t", GOOD + "\t\t\t", second])
    (tmp_path / "stack.tif").write_bytes(b"")
    (tmp_path / "stack2.tif").write_bytes(b"")
    (tmp_path / "datasets.tsv").write_bytes(text.encode() + b"\r\n")
    sheet = load_datasets(
        tmp_path / "datasets.tsv", schemas / "datasets.schema.yaml", base_dir=tmp_path
    )
    assert list(sheet.index) == ["a1", "a2"]
    assert list(sheet["format"]) == ["tiff_stack", "tiff_stack"]
    assert list(sheet["voxel_z_nm"]) == [40.0, 40.0]


def test_a_filled_cell_beyond_the_header_is_refused_not_shifted(tmp_path, schemas):
    # One cell too many would shift a row's cells into other columns (pandas then takes the
    # first cells as the index): the row is refused instead.
    path = _sheet(tmp_path, GOOD + "\tsynthetic")
    with pytest.raises(
        TesseraInputError,
        match=r"datasets.tsv: row 2 has a cell beyond the 9 columns of the header \('synthetic'\); "
        r"expected one cell per header column",
    ):
        load_datasets(path, schemas / "datasets.schema.yaml", base_dir=tmp_path)


def test_missing_sheet_is_named(tmp_path, schemas):
    with pytest.raises(TesseraInputError, match="nope.tsv: datasets sheet not found"):
        load_datasets(tmp_path / "nope.tsv", schemas / "datasets.schema.yaml", base_dir=tmp_path)


def test_demo_paths_need_not_exist_yet(tmp_path, schemas):
    path = _sheet(tmp_path, "d1\tctrl\tm1\tdemo/data/d1/raw.tif\ttiff_stack\t40\t8\t8\t")
    sheet = load_datasets(
        path, schemas / "datasets.schema.yaml", base_dir=tmp_path, generated_dir="demo/data"
    )
    assert list(sheet.index) == ["d1"]


def test_schema_files_are_strict(schemas):
    # Common practice for workflow schemas: every object forbids keys it does not define.
    def objects(node):
        if isinstance(node, dict):
            if node.get("type") == "object":
                yield node
            for value in node.values():
                yield from objects(value)
        elif isinstance(node, list):
            for value in node:
                yield from objects(value)

    for name in ("config.schema.yaml", "datasets.schema.yaml"):
        schema = yaml.safe_load((schemas / name).read_text())
        for node in objects(schema):
            assert "additionalProperties" in node, f"{name}: an object schema allows unknown keys"


# --------------------------------------------------------------------------------------------
# allowed data roots


def _row(path, roi=""):
    return f"a1\tctrl\tm1\t{path}\ttiff_stack\t40\t8\t8\t{roi}"


def _outside_message(column, cell, resolved):
    # the resolved path is what POSIX realpath gives (os.path.realpath: links followed, ".." removed)
    import os
    import re

    return (
        rf"datasets\.tsv, row 2, column {column}: {re.escape(repr(cell))} resolves to "
        rf"'{re.escape(os.path.realpath(resolved))}', outside the allowed data roots \[.*\]; add its folder to "
        r"data_roots in config/config\.yaml"
    )


@pytest.mark.parametrize("kind", ["dotdot", "absolute", "symlink", "roi_mask"])
def test_sheet_paths_outside_the_data_roots_are_refused(layout, schemas, kind):
    project, outside = layout
    if kind == "symlink":  # a link inside the project whose target lies elsewhere
        (project / "data").symlink_to(outside, target_is_directory=True)
    cell = {
        "dotdot": "../mnt/em/stack.tif",
        "absolute": str(outside / "stack.tif"),
        "symlink": "data/stack.tif",
        "roi_mask": "stack.tif",
    }[kind]
    row = _row("stack.tif", roi="../../etc/passwd") if kind == "roi_mask" else _row(cell)
    sheet = _sheet(project / "config", row)
    column, shown = ("roi_mask", "../../etc/passwd") if kind == "roi_mask" else ("path", cell)
    with pytest.raises(TesseraInputError, match=_outside_message(column, shown, project / shown)):
        load_datasets(sheet, schemas / "datasets.schema.yaml", base_dir=project)


@pytest.mark.parametrize("root", ["absolute", "relative"])
def test_data_roots_from_the_config_admit_their_folders(layout, schemas, root):
    project, outside = layout
    sheet = _sheet(project / "config", _row(str(outside / "stack.tif")))
    named = str(outside) if root == "absolute" else "../mnt/em"  # relative to the project folder
    frame = load_datasets(
        sheet, schemas / "datasets.schema.yaml", base_dir=project, data_roots=[named]
    )
    assert frame.loc["a1", "path"] == str(outside / "stack.tif")


def test_a_sheet_outside_the_data_roots_is_refused_until_its_folder_is_named(layout, schemas):
    project, outside = layout
    sheet = _sheet(outside, _row(str(outside / "stack.tif")))  # a sheet kept beside its data
    expected = (
        rf"config/config\.yaml, key datasets: {re.escape(repr(str(sheet)))} resolves to "
        rf"'{re.escape(os.path.realpath(sheet))}', outside the allowed data roots \[.*\]; add its "
        r"folder to data_roots in config/config\.yaml"
    )
    with pytest.raises(TesseraInputError, match=expected):
        load_datasets(sheet, schemas / "datasets.schema.yaml", base_dir=project)
    frame = load_datasets(
        sheet, schemas / "datasets.schema.yaml", base_dir=project, data_roots=[str(outside)]
    )
    assert list(frame.index) == ["a1"]


@pytest.mark.parametrize("kind", ["dotdot", "absolute", "symlink"])
def test_a_sheet_path_leading_outside_is_refused_before_it_is_read(layout, schemas, kind):
    project, outside = layout
    sheet = _sheet(outside, _row("stack.tif"))
    if kind == "symlink":  # a link inside the project whose target lies elsewhere
        (project / "data").symlink_to(outside, target_is_directory=True)
    named = {
        "dotdot": "../mnt/em/datasets.tsv",
        "absolute": str(sheet),
        "symlink": "data/datasets.tsv",
    }[kind]
    sheet.write_bytes(b"\xff\xfe not a sheet")  # refused by place, so never parsed
    with pytest.raises(TesseraInputError, match=r"key datasets: .* outside the allowed data roots"):
        load_datasets(project / named, schemas / "datasets.schema.yaml", base_dir=project)


def test_data_roots_go_through_the_schema(schemas, shipped_config):
    config = copy.deepcopy(shipped_config)
    assert load_config(copy.deepcopy(config), schemas / "config.schema.yaml")["data_roots"] == []
    config["data_roots"] = "/mnt/em"
    with pytest.raises(
        TesseraInputError, match=r"key data_roots: '/mnt/em' is not of type 'array'"
    ):
        load_config(config, schemas / "config.schema.yaml")


INNER = HEADER + "\tinternal_path"


@pytest.mark.parametrize(
    ("row", "message"),
    [
        (
            "a1\tctrl\tm1\tstack.tif\thdf5\t40\t8\t8\t\t",
            r"row 2: column internal_path is blank; format hdf5 and n5 rows need the array's path "
            r"inside the file \(e\.g\. volumes/raw\)",
        ),
        (
            "a1\tctrl\tm1\tstack.tif\tn5\t40\t8\t8\t\t",
            r"row 2: column internal_path is blank; format hdf5 and n5 rows need",
        ),
        (
            "a1\tctrl\tm1\tstack.tif\ttiff_stack\t40\t8\t8\t\tvolumes/raw",
            r"row 2: column internal_path must be blank for this format: only hdf5, n5 and zarr "
            r"files hold arrays at a path inside them",
        ),
        (
            "a1\tctrl\tm1\tstack.tif\thdf5\t40\t8\t8\t\tvolumes/../../raw",
            r"row 2: column internal_path must not contain '\.\.' steps",
        ),
    ],
)
def test_internal_path_column_is_checked_per_format(tmp_path, schemas, row, message):
    (tmp_path / "stack.tif").write_bytes(b"")
    path = _sheet(tmp_path, row, header=INNER)
    with pytest.raises(TesseraInputError, match=message) as info:
        load_datasets(path, schemas / "datasets.schema.yaml", base_dir=tmp_path)
    assert str(path) in str(info.value)


def test_internal_path_column_is_optional_for_zarr_and_absent_for_old_sheets(tmp_path, schemas):
    (tmp_path / "stack.tif").write_bytes(b"")
    (tmp_path / "other.h5").write_bytes(b"")
    rows = [
        "a1\tctrl\tm1\tstack.tif\tzarr\t40\t8\t8\t\t",
        "a2\tctrl\tm2\tstack.tif\tzarr\t40\t8\t8\t\t/volumes/raw",
        "a3\tctrl\tm3\tother.h5\thdf5\t40\t8\t8\t\tvolumes/raw/",
    ]
    sheet = load_datasets(
        _sheet(tmp_path, *rows, header=INNER), schemas / "datasets.schema.yaml", base_dir=tmp_path
    )
    # one spelling per array: HDF5, zarr and N5 paths inside a container are relative to its
    # root whether or not they start with "/" (h5py and zarr read both alike)
    assert sheet["internal_path"].tolist() == [None, "volumes/raw", "volumes/raw"]
    # so the same array under two spellings is one stack named twice
    twice = rows[:2] + ["a4\tctrl\tm4\tstack.tif\tzarr\t40\t8\t8\t\tvolumes//raw"]
    with pytest.raises(TesseraInputError, match=r"rows 3 \(a2\) and 4 \(a4\) name the same stack"):
        load_datasets(
            _sheet(tmp_path, *twice, header=INNER),
            schemas / "datasets.schema.yaml",
            base_dir=tmp_path,
        )
    old = load_datasets(_sheet(tmp_path, GOOD), schemas / "datasets.schema.yaml", base_dir=tmp_path)
    assert old.loc["a1", "internal_path"] is None  # the schema's default


def test_annotated_datasets_missing_from_the_sheet_are_refused_at_load():
    # A typo in annotated_datasets is named when the config loads, in one line, instead of
    # surfacing while Snakemake plans jobs (common practice: validate configuration up front).
    targets = {"nuclei": {"annotated_datasets": ["a1", "x9"]}, "mito": {"annotated_datasets": None}}
    with pytest.raises(
        TesseraInputError,
        match=r"config/config.yaml: key targets.nuclei.annotated_datasets: \['x9'\] are not "
        r"datasets of the sheet; its datasets are \['a1', 'a2'\]",
    ):
        check_annotated_datasets(targets, ["a1", "a2"])
    check_annotated_datasets({"nuclei": {"annotated_datasets": ["a2"]}}, ["a1", "a2"])


@pytest.mark.parametrize(
    ("settings", "expected"),
    [
        ({"split": {"test_datasets": ["x9"]}}, r"\['x9'\] are not in the sheet"),
        (
            {"annotated_datasets": ["a1"], "split": {"test_datasets": ["a2"]}},
            r"\['a2'\] are not in annotated_datasets",
        ),
        (
            {"split": {"test_datasets": ["a1", "a2"]}},
            "hold out every annotated dataset; expected at least one left to train on",
        ),
        (
            {"train_datasets": ["a2"], "split": {"test_datasets": ["a2"]}},
            r"\['a2'\] are also in train_datasets",
        ),
    ],
)
def test_datasets_held_out_whole_are_checked_at_load(settings, expected):
    # A held-out test set must be annotated, leave something to train on, and never be trained
    # on (common practice); each mistake is one line naming the key before anything runs.
    with pytest.raises(
        TesseraInputError, match=r"config/config.yaml: key targets.mito.split.test_datasets: "
    ) as error:
        check_test_datasets({"mito": settings}, ["a1", "a2"])
    assert re.search(expected, str(error.value))
    check_test_datasets({"mito": {"split": {"test_datasets": ["a2"]}}}, ["a1", "a2"])


def test_the_sheet_holds_voxel_sizes_to_the_range_ingest_holds_file_metadata_to(repo):
    # One range for voxel sizes, whatever gives them: the schema for the sheet's columns,
    # tessera.spacing.VOXEL_NM_RANGE for sizes read from a file's header or attributes.
    from tessera.spacing import VOXEL_NM_RANGE

    schema = yaml.safe_load((repo / "config/schemas/datasets.schema.yaml").read_text())
    for axis in "zyx":
        column = schema["properties"][f"voxel_{axis}_nm"]
        assert (column["minimum"], column["maximum"]) == VOXEL_NM_RANGE


@pytest.mark.parametrize(
    ("text", "message"),
    [
        # a tab where YAML wants spaces (YAML 1.2 spec, section 6.1: tabs never indent)
        ("study:\n\tname: x\n", "line 2: a tab in the indentation; YAML indents with spaces only"),
        ("", "the file holds no settings; expected a mapping of keys such as datasets:"),
        ("# only a comment\n", "the file holds no settings"),
        ("- a\n- b\n", "expected a mapping of settings at the top level, found a list"),
        ("study: {name: x\n", "line 2: not valid YAML"),
    ],
)
def test_a_config_file_that_is_no_yaml_mapping_is_named_with_its_line(tmp_path, text, message):
    path = tmp_path / "config.yaml"
    path.write_text(text)
    with pytest.raises(TesseraInputError, match=re.escape(message)) as caught:
        check_config_file(path)
    assert str(path) in str(caught.value) and "\n" not in str(caught.value)


def test_the_demo_config_file_passes_the_file_check(repo):
    check_config_file(repo / "config" / "config.yaml")
