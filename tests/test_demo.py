"""Tests of the synthetic demo study generator (tessera_demo)."""

import ast
import hashlib
import json
import math
import re
import zlib
from pathlib import Path

import numpy as np
import pytest
import tifffile
import yaml
from PIL import Image
from scipy import ndimage
from skimage.measure import regionprops

from tessera.errors import TesseraInputError
from tessera_demo import files
from tessera_demo.files import write_dataset
from tessera_demo.render import render_dataset
from tessera_demo.study import dataset_seed, subject_volume_scale

REPO = Path(__file__).resolve().parents[1]
# The study's settings have one owner, the shipped config; the generator has no copy of them.
DEMO = yaml.safe_load((REPO / "config" / "config.yaml").read_text(encoding="utf-8"))["demo"]

SMALL = (20, 320, 320)
SPACING = (40.0, 8.0, 8.0)
VOXEL_UM3 = 40.0 * 8.0 * 8.0 * 1e-9
SEEDS = (0, 1, 2, 3, 4, 5)


@pytest.fixture(scope="module")
def renders():
    """Small renders, scale 1.0 and 1.25, for a few seeds (rendered once per module)."""
    return {
        (seed, scale): render_dataset(
            seed=seed, shape=SMALL, spacing=SPACING, mito_volume_scale=scale
        )
        for seed in SEEDS
        for scale in (1.0, 1.25)
    }


def _volumes_um3(labels, spacing=SPACING):
    # Reference library: skimage.measure.regionprops, voxel count ("area") per label.
    return np.array([p.area for p in regionprops(labels)]) * float(np.prod(spacing)) * 1e-9


def _flat_fraction(section):
    """Fraction of pixels equal to the most frequent value."""
    return np.bincount(section.ravel(), minlength=256).max() / section.size


def _laplacian_variance(section):
    # Variance of the Laplacian of Gaussian (sigma 1.5 px), a common focus measure (common
    # practice), by scipy.ndimage.gaussian_laplace. The smoothing matters: the demo adds
    # detector noise after the defocus, as a microscope does, and the plain Laplacian of
    # that noise would hide the blur.
    return float(ndimage.gaussian_laplace(section.astype(np.float32), 1.5).var())


# --- package boundary -----------------------------------------------------------------------


def test_library_never_imports_the_demo_generator():
    # The generator is data generation built on the library; an import the other way would
    # make every analysis module depend on (and rerun with) the synthetic study.
    offenders = []
    for path in sorted((REPO / "tessera").rglob("*.py")):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom) and node.level == 0:
                names = [node.module]
            else:
                continue
            offenders += [path.name for n in names if n.split(".")[0] == "tessera_demo"]
    assert offenders == []


# --- seeds ----------------------------------------------------------------------------------


def test_dataset_seed_is_crc32_of_study_and_name():
    # Reference: zlib.crc32, a fixed published checksum (stable across platforms and runs).
    assert dataset_seed(20261202, "cd2") == zlib.crc32(b"20261202:cd2")
    assert dataset_seed(20261202, "cd2") != dataset_seed(20261202, "cd3")
    assert dataset_seed(1, "tn1") != dataset_seed(2, "tn1")


@pytest.mark.parametrize(
    "study_seed, name, message",
    [
        (-1, "tn1", "study_seed must be an integer >= 0, got -1"),
        (1.5, "tn1", "study_seed must be an integer >= 0, got 1.5"),
        (1, "", "dataset must be a non-empty string, got ''"),
        (1, None, "dataset must be a non-empty string, got None"),
    ],
)
def test_dataset_seed_rejects_bad_input(study_seed, name, message):
    with pytest.raises(TesseraInputError, match=re.escape(message)):
        dataset_seed(study_seed, name)


def test_subject_scale_is_condition_scale_times_lognormal_animal_factor():
    scales = DEMO["mito_volume_scale"]
    assert (
        subject_volume_scale("cd1", "cold", study_seed=5, condition_scales=scales, animal_sd=0.0)
        == 1.25
    )
    assert (
        subject_volume_scale(
            "tn1", "thermoneutral", study_seed=5, condition_scales=scales, animal_sd=0.0
        )
        == 1.0
    )
    sd = DEMO["animal_sd"]
    logs = np.log(
        [
            subject_volume_scale(
                f"a{i}", "thermoneutral", study_seed=5, condition_scales=scales, animal_sd=sd
            )
            for i in range(600)
        ]
    )
    # Log-normal by definition: log of the factor ~ Normal(0, sd); sd of 600 draws within 10 %.
    assert abs(logs.mean()) < 0.05 * 4 / math.sqrt(600)
    assert logs.std(ddof=1) == pytest.approx(sd, rel=0.1)
    with pytest.raises(
        TesseraInputError, match=re.escape("condition must be one of ['cold', 'thermoneutral']")
    ):
        subject_volume_scale("x1", "warm", study_seed=5, condition_scales=scales, animal_sd=sd)


# --- render_dataset -------------------------------------------------------------------------


def test_same_seed_same_bytes_different_seed_different():
    a = render_dataset(seed=11, shape=(12, 160, 200), spacing=SPACING)
    b = render_dataset(seed=11, shape=(12, 160, 200), spacing=SPACING)
    c = render_dataset(seed=12, shape=(12, 160, 200), spacing=SPACING)
    for key in ("raw", "mitochondria", "nuclei", "cells"):
        assert a[key].tobytes() == b[key].tobytes()
    assert a["defects"] == b["defects"] and a["summary"] == b["summary"]
    assert a["raw"].tobytes() != c["raw"].tobytes()
    assert a["cells"].tobytes() != c["cells"].tobytes()


@pytest.mark.parametrize("shape", [(8, 64, 64), (12, 160, 200), (9, 96, 72)])
def test_dtypes_and_shapes(shape):
    out = render_dataset(seed=3, shape=shape, spacing=SPACING)
    assert out["raw"].dtype == np.uint8 and out["raw"].shape == shape
    for key in ("mitochondria", "nuclei", "cells"):
        assert out[key].dtype == np.uint16 and out[key].shape == shape
    # Plain JSON-able numbers only.
    json.dumps(out["summary"])
    json.dumps(out["defects"])
    assert all(type(v) in (int, float) for v in out["summary"].values())


@pytest.mark.parametrize(
    "kwargs, message",
    [
        ({"shape": (4, 64, 64)}, "shape must be at least (8, 64, 64), got (4, 64, 64)"),
        ({"shape": (8, 64)}, "shape must be 3 integers (z, y, x), got (8, 64)"),
        ({"spacing": (40.0, 8.0)}, "spacing must have one value per axis (3), got 2"),
        ({"spacing": (40.0, -8.0, 8.0)}, "spacing values must be positive and finite, got -8.0"),
        ({"seed": -3}, "seed must be an integer >= 0, got -3"),
        ({"mito_volume_scale": 0.0}, "mito_volume_scale must be between 0.1 and 10, got 0.0"),
        ({"mito_volume_scale": float("nan")}, "mito_volume_scale must be between 0.1 and 10"),
        ({"defects": "yes"}, "defects must be true or false, got 'yes'"),
    ],
)
def test_bad_input_is_rejected(kwargs, message):
    args = {"seed": 1, "shape": (8, 64, 64), "spacing": SPACING} | kwargs
    with pytest.raises(TesseraInputError, match=re.escape(message)):
        render_dataset(**args)


def test_mitochondria_confined_to_cytoplasm(renders):
    total = 0
    for out in renders.values():
        mito = out["mitochondria"] > 0
        total += int(mito.sum())
        assert not np.any(mito & (out["cells"] == 0))
        assert not np.any(mito & (out["nuclei"] > 0))
        # One cell per mitochondrion, one cell per nucleus (nucleus inside its cell).
        for key in ("mitochondria", "nuclei"):
            lab = out[key]
            for i in np.unique(lab[lab > 0]):
                cells_under = np.unique(out["cells"][lab == i])
                assert len(cells_under) == 1 and cells_under[0] > 0
    assert total > 0


def test_instance_ids_contiguous_and_each_one_connected_component(renders):
    n_seen = 0
    for out in renders.values():
        lab = out["mitochondria"]
        ids = np.unique(lab[lab > 0])
        n = out["summary"]["n_mitochondria"]
        np.testing.assert_array_equal(ids, np.arange(1, n + 1))
        n_seen += n
        for i in ids:
            # Reference: scipy.ndimage.label, face connectivity (6-neighbourhood in 3D).
            _, count = ndimage.label(lab == i)
            assert count == 1
        nuc = out["nuclei"]
        assert np.array_equal(np.unique(nuc[nuc > 0]), np.arange(1, out["summary"]["n_nuclei"] + 1))
    assert n_seen >= 10


def test_clusters_of_touching_mitochondria_keep_one_id_each(renders):
    # Reference: scipy.ndimage.label of the binary mask (6-connected). Touching mitochondria
    # merge into one component of the mask, so a volume with clusters has fewer components than
    # instances; each instance is still one piece (test above) with its own id.
    n_instances, n_components, n_touching = 0, 0, 0
    for out in renders.values():
        lab = out["mitochondria"]
        n_instances += int(lab.max())
        n_components += ndimage.label(lab > 0)[1]
        n_touching += out["summary"]["n_mitochondria_touching_another"]
        # the summary's count, against instances sharing a face found by scipy's dilation
        touching = sum(
            bool(((lab > 0) & (lab != i) & ndimage.binary_dilation(lab == i)).any())
            for i in range(1, int(lab.max()) + 1)
        )
        assert touching == out["summary"]["n_mitochondria_touching_another"]
    assert n_components < n_instances
    # about a third of them are placed against another (_MITO_CLUSTERED = 0.35), some of
    # which find no room there
    assert 0.1 * n_instances <= n_touching <= 0.6 * n_instances


def test_summary_volumes_match_voxel_counts(renders):
    out = renders[(1, 1.0)]
    vols = _volumes_um3(out["mitochondria"])
    assert out["summary"]["mean_mito_volume_um3"] == pytest.approx(vols.mean(), rel=1e-9)
    assert out["summary"]["total_mito_volume_um3"] == pytest.approx(vols.sum(), rel=1e-9)


def test_mitochondria_darker_than_cytoplasm(renders):
    # Heavy-metal-stained EM shows mitochondria darker than the cytosol (common practice).
    out = renders[(0, 1.0)]
    cyto = (out["cells"] > 0) & (out["mitochondria"] == 0) & (out["nuclei"] == 0)
    assert out["raw"][out["mitochondria"] > 0].mean() < out["raw"][cyto].mean() - 30


def test_defect_sections_are_defective(renders):
    for out in renders.values():
        raw = out["raw"]
        nz = raw.shape[0]
        d = out["defects"]
        assert len(d["blank"]) == 1 and len(d["blurred"]) == 1
        assert set(d["torn"]) <= set(d["blank"])
        lost, blurred = d["blank"][0], d["blurred"][0]
        assert lost != blurred
        for z in (lost, blurred):
            assert 2 <= z <= nz - 3
        # Blank or torn: at least 30 % of the section one flat value; good sections far below.
        assert _flat_fraction(raw[lost]) >= 0.3
        good = [z for z in range(nz) if z not in (lost, blurred)]
        assert max(_flat_fraction(raw[z]) for z in good) < 0.1
        # Blurred: variance of the Laplacian of Gaussian far below its neighbours.
        neighbours = [_laplacian_variance(raw[z]) for z in (blurred - 1, blurred + 1)]
        assert _laplacian_variance(raw[blurred]) < 0.25 * min(neighbours)


def test_labels_are_true_geometry_and_defects_touch_only_their_sections():
    with_d = render_dataset(seed=21, shape=(12, 160, 160), spacing=SPACING, defects=True)
    without = render_dataset(seed=21, shape=(12, 160, 160), spacing=SPACING, defects=False)
    assert without["defects"] == {"blank": [], "torn": [], "blurred": []}
    for key in ("mitochondria", "nuclei", "cells"):
        np.testing.assert_array_equal(with_d[key], without[key])
    hit = set(with_d["defects"]["blank"]) | set(with_d["defects"]["blurred"])
    changed = {z for z in range(12) if not np.array_equal(with_d["raw"][z], without["raw"][z])}
    assert changed == hit


def test_volume_scale_multiplies_mean_mitochondrial_volume(renders):
    base = np.concatenate([_volumes_um3(renders[(s, 1.0)]["mitochondria"]) for s in SEEDS])
    big = np.concatenate([_volumes_um3(renders[(s, 1.25)]["mitochondria"]) for s in SEEDS])
    assert len(base) >= 10 and len(big) >= 10
    # Similar solids: volume scales with the cube of the linear factor (Euclid); the generator
    # scales each mitochondrion by 1.25 ** (1/3), so the mean volume ratio should be 1.25.
    assert big.mean() / base.mean() == pytest.approx(1.25, rel=0.10)
    # Paired: with every mitochondrion placed in both renders, id i is the same size draw in
    # both, so the per-object ratio is 1.25 up to path and voxelisation differences.
    paired = []
    for s in SEEDS:
        a, b = renders[(s, 1.0)], renders[(s, 1.25)]
        if a["summary"]["n_mitochondria_unplaced"] or b["summary"]["n_mitochondria_unplaced"]:
            continue
        paired.extend(_volumes_um3(b["mitochondria"]) / _volumes_um3(a["mitochondria"]))
    assert len(paired) >= 8
    assert np.median(paired) == pytest.approx(1.25, rel=0.05)


def test_default_shape_volume_matches_capsule_formula_and_drift():
    # The demo study's own shape (config) and voxel size (its sheet).
    out = render_dataset(seed=2026, shape=tuple(DEMO["shape"]), spacing=SPACING)
    s = out["summary"]
    assert s["n_mitochondria"] >= 10 and s["n_nuclei"] >= 1
    # Published formula: capsule volume = pi r^2 L + 4/3 pi r^3; with r ~ U(100, 200) nm and
    # L ~ U(400, 2000) nm its mean is pi E[r^2] E[L] + 4/3 pi E[r^3]. Branches add a little,
    # bends and voxelisation take a little: allow 15 %.
    er2 = (200.0**3 - 100.0**3) / (3 * 100.0)
    er3 = (200.0**4 - 100.0**4) / (4 * 100.0)
    capsule_um3 = (math.pi * er2 * 1200.0 + 4.0 / 3.0 * math.pi * er3) * 1e-9
    assert _volumes_um3(out["mitochondria"]).mean() == pytest.approx(capsule_um3, rel=0.15)
    # Drift along z: least-squares slope (numpy.polyfit) of the cytoplasm mean per section.
    cyto = (out["cells"] > 0) & (out["mitochondria"] == 0) & (out["nuclei"] == 0)
    bad = set(out["defects"]["blank"]) | set(out["defects"]["blurred"])
    zs = [z for z in range(out["raw"].shape[0]) if z not in bad]
    means = [out["raw"][z][cyto[z]].mean() for z in zs]
    slope_per_10 = 10 * np.polyfit(zs, means, 1)[0]
    assert slope_per_10 == pytest.approx(s["drift_grey_per_10_sections"], abs=1.0)
    assert 2.0 <= abs(s["drift_grey_per_10_sections"]) <= 4.0


# --- write_dataset --------------------------------------------------------------------------

WRITE = {
    "dataset": "cd2",
    "condition": "cold",
    "subject": "cd2",
    "seed": 77,
    "shape": (14, 224, 224),
    "spacing": SPACING,
    "mito_volume_scale": 1.25,
    "tile_size": 96,
    "tiles_per_target": 5,
    "heldout_per_target": 3,
}


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    root = tmp_path_factory.mktemp("study")
    write_dataset(root / "cd2", **WRITE)
    return root / "cd2"


def _read_points(path):
    lines = path.read_text(encoding="utf-8").splitlines()
    header = lines[0].split("\t")
    return header, [dict(zip(header, line.split("\t"), strict=True)) for line in lines[1:]]


def test_written_stacks_equal_render(written):
    out = render_dataset(seed=77, shape=(14, 224, 224), spacing=SPACING, mito_volume_scale=1.25)
    for name, key, dtype in (
        ("raw.tif", "raw", np.uint8),
        ("cells.tif", "cells", np.uint16),
        ("truth/mitochondria.tif", "mitochondria", np.uint16),
        ("truth/nuclei.tif", "nuclei", np.uint16),
    ):
        # Reference reader: tifffile; one page per section.
        with tifffile.TiffFile(written / name) as tif:
            assert len(tif.pages) == 14
            pages = np.stack([p.asarray() for p in tif.pages])
        assert pages.dtype == dtype
        np.testing.assert_array_equal(pages, out[key])
    # the instance truth: uint32, the stack's shape, 0 background, ids 1..n, the same
    # mitochondria as the training label file (read as > 0)
    with tifffile.TiffFile(written / "truth" / "mitochondria_instances.tif") as tif:
        instances = np.stack([p.asarray() for p in tif.pages])
    assert instances.dtype == np.uint32 and instances.shape == (14, 224, 224)
    np.testing.assert_array_equal(instances, out["mitochondria"])
    ids = np.unique(instances)
    np.testing.assert_array_equal(ids[1:], np.arange(1, out["summary"]["n_mitochondria"] + 1))
    truth = json.loads((written / "truth.json").read_text(encoding="utf-8"))
    assert truth["defects"] == out["defects"]
    assert truth["summary"] == pytest.approx(out["summary"])
    assert truth["condition"] == "cold" and truth["mito_volume_scale"] == 1.25
    assert truth["spacing_nm"] == [40.0, 8.0, 8.0] and truth["shape"] == [14, 224, 224]


def test_points_table_and_heldout_separation(written):
    header, rows = _read_points(written / "tiles" / "points.tsv")
    assert header == ["tile_id", "dataset", "target", "z", "y", "x", "size", "set"]
    truth = json.loads((written / "truth.json").read_text(encoding="utf-8"))
    bad = set(truth["defects"]["blank"]) | set(truth["defects"]["blurred"])
    assert len({r["tile_id"] for r in rows}) == len(rows)
    for target in ("mitochondria", "nuclei"):
        mine = [r for r in rows if r["target"] == target]
        painted = [int(r["z"]) for r in mine if r["set"] == "painted"]
        held = [int(r["z"]) for r in mine if r["set"] == "heldout"]
        assert len(painted) == 5 and len(held) == 3
        # Neighbouring sections are highly correlated (common practice): >= 3 sections apart.
        assert min(abs(h - p) for h in held for p in painted) >= 3
        assert not (set(painted) | set(held)) & bad
    for r in rows:
        assert r["dataset"] == "cd2" and r["size"] == "96" and r["set"] in ("painted", "heldout")


def test_tile_masks_are_0_255_truth_cutouts(written):
    _, rows = _read_points(written / "tiles" / "points.tsv")
    truth = {t: tifffile.imread(written / "truth" / f"{t}.tif") for t in ("mitochondria", "nuclei")}
    mixed = {"mitochondria": 0, "nuclei": 0}
    for r in rows:
        z, y, x, size = (int(r[k]) for k in ("z", "y", "x", "size"))
        mask = np.asarray(Image.open(written / "tiles" / r["target"] / f"{r['tile_id']}.png"))
        assert mask.dtype == np.uint8 and mask.shape == (size, size)
        assert set(np.unique(mask)) <= {0, 255}
        y0, x0 = y - size // 2, x - size // 2
        assert y0 >= 0 and x0 >= 0
        cut = truth[r["target"]][z, y0 : y0 + size, x0 : x0 + size]
        np.testing.assert_array_equal(mask == 255, cut > 0)
        mixed[r["target"]] += bool(0 < (mask == 255).mean() < 1)
    # Tiles show the target and background where the volume allows it.
    assert mixed["mitochondria"] >= 1 and mixed["nuclei"] >= 1


def test_write_is_deterministic_and_replaces_atomically(tmp_path, written):
    out_dir = tmp_path / "cd2"
    out_dir.mkdir()
    (out_dir / "stale.txt").write_text("old", encoding="utf-8")
    write_dataset(out_dir, **WRITE)
    assert not (out_dir / "stale.txt").exists()
    assert [p.name for p in tmp_path.iterdir()] == ["cd2"]  # no temporary sibling left

    def digests(root):
        return {
            p.relative_to(root).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(root.rglob("*"))
            if p.is_file()
        }

    assert digests(out_dir) == digests(written)


def test_failed_write_leaves_previous_dataset_and_no_temp(tmp_path, monkeypatch):
    out_dir = tmp_path / "tn1"
    out_dir.mkdir()
    (out_dir / "previous.txt").write_text("keep", encoding="utf-8")

    def broken(*args, **kwargs):
        raise OSError("disk full")

    monkeypatch.setattr(files, "_write_tiff", broken)
    with pytest.raises(OSError):
        write_dataset(out_dir, **(WRITE | {"dataset": "tn1", "subject": "tn1"}))
    assert (out_dir / "previous.txt").read_text(encoding="utf-8") == "keep"
    assert [p.name for p in tmp_path.iterdir()] == ["tn1"]


@pytest.mark.parametrize(
    "kwargs, message",
    [
        ({"tile_size": 512}, "tile_size must not exceed the section size"),
        ({"tiles_per_target": 0}, "tiles_per_target must be an integer >= 1, got 0"),
        ({"dataset": "a/b"}, "dataset must be a non-empty string without slashes"),
        ({"condition": ""}, "condition must be a non-empty string without slashes"),
    ],
)
def test_write_rejects_bad_options(tmp_path, kwargs, message):
    with pytest.raises(TesseraInputError, match=re.escape(message)):
        write_dataset(tmp_path / "x", **(WRITE | kwargs))
    assert not (tmp_path / "x").exists()
