"""Shared fixtures: paths of the repository and of the open data beside it."""

from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
SHARED_DATA = REPO.parent / "shared" / "data"


@pytest.fixture
def repo():
    return REPO


@pytest.fixture
def vnc_sstem():
    """The open ssTEM stack (Gerhard et al. 2013, doi:10.6084/m9.figshare.856713), read in place."""
    path = SHARED_DATA / "vnc-sstem"
    if not (path / "raw").is_dir():
        pytest.skip("../shared/data/vnc-sstem is not present on this machine")
    return path
