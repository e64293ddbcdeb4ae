"""Shared fixtures: paths of the repository and of the open data beside it, and the tiny test
study (config and sheet from tests/test_workflow.py) for tests that run it more than once."""

import hashlib
import importlib.util
import os
from pathlib import Path

import pytest
import yaml

REPO = Path(__file__).resolve().parents[1]
SHARED_DATA = REPO.parent / "shared" / "data"


@pytest.fixture
def repo():
    return REPO


@pytest.fixture
def schemas(repo):
    """The folder of the config and sheet schemas."""
    return repo / "config" / "schemas"


@pytest.fixture
def shipped_config(repo):
    """The shipped config/config.yaml, read as the workflow reads it."""
    from tessera.workflow.config import read_yaml

    return read_yaml(repo / "config" / "config.yaml")


@pytest.fixture
def layout(tmp_path):
    """A project folder with its sheet and a stack, and a data folder outside the project."""
    project, outside = tmp_path / "project", tmp_path / "mnt" / "em"
    (project / "config").mkdir(parents=True)
    outside.mkdir(parents=True)
    for folder in (project, outside):
        (folder / "stack.tif").write_bytes(b"")
    return project, outside


@pytest.fixture
def vnc_sstem():
    """The open ssTEM stack (Gerhard et al. 2013, doi:10.6084/m9.figshare.856713), read in place.

    Skipped where the data are absent; with TESSERA_SHARED_DATA_REQUIRED=1 (as in CI) a missing
    stack fails the test instead, so the checks on real data cannot silently drop out."""
    path = SHARED_DATA / "vnc-sstem"
    if not (path / "raw").is_dir():
        required = os.environ.get("TESSERA_SHARED_DATA_REQUIRED") == "1"
        (pytest.fail if required else pytest.skip)(
            "../shared/data/vnc-sstem is not present on this machine"
        )
    return path


@pytest.fixture(scope="session")
def new_tiny_study():
    """A function writing the tiny test study's config and sheet into a new folder; returns it."""
    spec = importlib.util.spec_from_file_location(
        "tessera_test_workflow", REPO / "tests" / "test_workflow.py"
    )
    tiny = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(tiny)

    def make(root):
        (root / "config").mkdir(parents=True)
        (root / "config" / "config.yaml").write_text(yaml.safe_dump(tiny.tiny_config()))
        (root / "config" / "datasets.tsv").write_text(tiny.TINY_SHEET)
        return root

    return make


@pytest.fixture(scope="session")
def file_digests():
    """A function giving the SHA-256 of every file below a folder, by path relative to it."""

    def digests(folder):
        return {
            p.relative_to(folder).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*"))
            if p.is_file()
        }

    return digests


@pytest.fixture(scope="session")
def damage_tiff_page():
    """A function flipping one bit in the middle of page `page`'s pixel data of a TIFF: the
    file's layout stays sound, so only decoding that page (deflate, LZMA) finds the damage."""
    import tifffile

    def damage(path, page):
        data = bytearray(Path(path).read_bytes())
        with tifffile.TiffFile(path) as tif:
            start, count = tif.pages[page].dataoffsets[0], tif.pages[page].databytecounts[0]
        data[start + count // 2] ^= 0x10
        Path(path).write_bytes(bytes(data))

    return damage
