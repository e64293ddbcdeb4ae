"""Property-based checks of the config and sheet loaders (hypothesis): any input either loads or
fails with our own error type and a message naming the file, never a library traceback."""

import string

import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tessera.errors import TesseraInputError
from tessera.workflow.config import load_config, load_datasets

# JSON-like values: what a YAML config can hold
scalars = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(-(10**6), 10**6),
    st.floats(allow_nan=True),
    st.text(max_size=12),
)
values = st.recursive(
    scalars,
    lambda inner: st.one_of(
        st.lists(inner, max_size=4), st.dictionaries(st.text(max_size=10), inner, max_size=4)
    ),
    max_leaves=12,
)
KEYS = [
    "datasets",
    "targets",
    "study",
    "demo",
    "ingest",
    "pyramid",
    "qc",
    "predict",
    "statistics",
    "meshes",
]


@settings(
    max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(st.dictionaries(st.sampled_from(KEYS) | st.text(max_size=8), values, max_size=6))
def test_any_config_loads_or_fails_with_our_error(repo, config):
    try:
        load_config(config, repo / "config" / "schemas" / "config.schema.yaml")
    except TesseraInputError as error:
        assert str(error).startswith("config/config.yaml: ")


cells = st.text(alphabet=string.ascii_letters + string.digits + " _-./:\t\"'#,;\\", max_size=12)


@settings(
    max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    header=st.lists(
        st.sampled_from(
            [
                "dataset",
                "condition",
                "subject",
                "path",
                "format",
                "voxel_z_nm",
                "voxel_y_nm",
                "voxel_x_nm",
                "roi_mask",
                "notes",
            ]
        )
        | cells,
        min_size=0,
        max_size=10,
    ),
    rows=st.lists(st.lists(cells, max_size=10), max_size=4),
    raw=st.binary(max_size=40),
)
def test_any_sheet_loads_or_fails_with_our_error(repo, tmp_path_factory, header, rows, raw):
    folder = tmp_path_factory.mktemp("sheet")
    sheet = folder / "datasets.tsv"
    text = "\n".join(["\t".join(header), *("\t".join(r) for r in rows)]) + "\n"
    sheet.write_bytes(text.encode() + raw)
    try:
        load_datasets(sheet, repo / "config" / "schemas" / "datasets.schema.yaml", base_dir=folder)
    except TesseraInputError as error:
        assert str(sheet) in str(error)


def test_yaml_with_object_tags_is_refused_without_running_anything(tmp_path, repo):
    from tessera.workflow.config import read_yaml

    path = tmp_path / "config.yaml"
    path.write_text("datasets: !!python/object/apply:os.system ['echo unsafe']\n")
    try:
        read_yaml(path)
    except TesseraInputError as error:
        assert "not valid YAML" in str(error)
    else:
        raise AssertionError("an object tag was accepted")
    assert yaml.safe_load("a: 1") == {"a": 1}
