"""Pinned environments: the lock is exact and complete; the conda file agrees with it."""

import ast
import re
import sys

import yaml

PIN = re.compile(r"^([A-Za-z0-9_.\-]+)==([A-Za-z0-9_.+\-]+)$")


def _canonical(name):
    # PEP 503 name normalisation.
    return re.sub(r"[-_.]+", "-", name).lower()


def _lock(repo):
    pins = {}
    for line in (repo / "requirements.lock").read_text().splitlines():
        if line.strip() and not line.startswith("#"):
            match = PIN.match(line.strip())
            assert match, f"requirements.lock: {line!r} is not an exact 'name==version' pin"
            pins[_canonical(match[1])] = match[2]
    return pins


def test_conda_environment_pins_match_the_lock(repo):
    lock = _lock(repo)
    env = yaml.safe_load((repo / "envs" / "tessera.yaml").read_text())
    pip_section = next(d["pip"] for d in env["dependencies"] if isinstance(d, dict))
    assert pip_section, "envs/tessera.yaml has no pip packages"
    for line in pip_section:
        match = PIN.match(line)
        assert match, f"envs/tessera.yaml: {line!r} is not an exact pin"
        assert lock.get(_canonical(match[1])) == match[2], (
            f"envs/tessera.yaml: {line} disagrees with requirements.lock"
        )
    python = next(d for d in env["dependencies"] if isinstance(d, str) and d.startswith("python="))
    assert python == f"python={sys.version_info.major}.{sys.version_info.minor}"


def test_every_third_party_import_of_the_package_is_locked(repo):
    import_names = {
        "yaml": "pyyaml",
        "skimage": "scikit-image",
        "sklearn": "scikit-learn",
        "PIL": "pillow",
        "cv2": "opencv-python-headless",
        "mpl_toolkits": "matplotlib",
    }  # mplot3d ships inside matplotlib
    lock = _lock(repo)
    stdlib = set(sys.stdlib_module_names)
    paths = [*(repo / "tessera").rglob("*.py"), *(repo / "tessera_demo").rglob("*.py")]
    for path in paths:
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom) and node.level == 0:
                names = [node.module]
            else:
                continue
            for name in names:
                top = name.split(".")[0]
                if top in stdlib or top in ("tessera", "tessera_demo"):
                    continue
                assert _canonical(import_names.get(top, top)) in lock, (
                    f"{path.name} imports {top}, not in requirements.lock"
                )


def test_package_version_is_stated_once(repo):
    import tessera

    pyproject = (repo / "pyproject.toml").read_text()
    assert 'version = { attr = "tessera.__version__" }' in pyproject
    assert re.fullmatch(r"\d+\.\d+\.\d+", tessera.__version__)
