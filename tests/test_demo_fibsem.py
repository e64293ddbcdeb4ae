"""The FIB-SEM-like (isotropic) variant of the demo data and the data path of the benchmark that
compares 2D and 3D cascade features on it (benchmarks/accuracy_demo.py, part ``fibsem``).

References: the Cavalieri principle (a solid's volume is the section spacing times the sum of
its section areas; Gundersen & Jensen, J Microsc 1987), the exact Euclidean distance transform of
scipy.ndimage (inscribed radius), scikit-image's ``downscale_local_mean`` (block mean), and the
definitions of precision, recall, F1 and Jaccard.
"""

import importlib.util
from pathlib import Path

import numpy as np
import pytest
from scipy import ndimage
from skimage.measure import regionprops
from skimage.transform import downscale_local_mean

from tessera.cascade.api import CascadeSpec
from tessera.errors import TesseraInputError
from tessera_demo.fibsem import render_isotropic
from tessera_demo.render import render_dataset

REPO = Path(__file__).resolve().parents[1]
NM = 10.0


def _benchmark():
    """benchmarks/accuracy_demo.py as a module (benchmarks are scripts, not a package)."""
    spec = importlib.util.spec_from_file_location(
        "accuracy_demo", REPO / "benchmarks" / "accuracy_demo.py"
    )
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.mark.parametrize("seed", [0, 1])
def test_isotropic_render_has_the_intended_physical_sizes(seed):
    # The same field (extent 600 x 3190 x 3190 nm) at 10 nm isotropic voxels and with 40 nm
    # sections: the renderer lays the scene out in nm, so each mitochondrion is the same solid.
    iso = render_dataset(seed=seed, shape=(61, 320, 320), spacing=NM, defects=False)
    sbem = render_dataset(seed=seed, shape=(16, 320, 320), spacing=(4 * NM, NM, NM), defects=False)
    a, b = regionprops(iso["mitochondria"]), regionprops(sbem["mitochondria"])
    assert len(a) == len(b) >= 4
    for pa, pb in zip(a, b, strict=True):
        v_iso = pa.area * NM**3 * 1e-9  # µm³: voxel count x voxel volume
        v_sbem = pb.area * 4 * NM**3 * 1e-9
        # Cavalieri: 40 nm sections estimate the same volume; the smallest mitochondria here
        # are cut by about 6 sections, where its error is a few per cent (from memory): 10 %.
        assert v_iso == pytest.approx(v_sbem, rel=0.10), pa.label
        # Mitochondria span many sections at isotropic voxels (radius >= 100 nm: >= 20 voxels)
        assert pa.bbox[3] - pa.bbox[0] >= 2 * 100.0 / NM
        # Inscribed radius (largest distance to the outside, scipy's exact EDT with the voxel
        # size) is the drawn tube radius, 100-200 nm (tessera_demo.mitochondria), within one
        # voxel diagonal (sqrt(3) x 10 nm) of digitisation either way.
        inside = np.pad(iso["mitochondria"][pa.slice] == pa.label, 1)
        radius = ndimage.distance_transform_edt(inside, sampling=(NM, NM, NM)).max()
        assert 100.0 - np.sqrt(3) * NM <= radius <= 200.0 + np.sqrt(3) * NM, pa.label
    assert iso["summary"]["voxel_volume_um3"] == pytest.approx(NM**3 * 1e-9)


def test_render_isotropic_is_the_block_mean_of_the_render():
    out = render_isotropic(seed=2, shape=(32, 128, 128), spacing_nm=8.0, factor=2)
    full = render_dataset(seed=2, shape=(32, 128, 128), spacing=8.0, defects=False)
    # Reference: scikit-image's downscale_local_mean (block mean where the shape divides)
    expected = downscale_local_mean(full["raw"].astype(np.float64), (2, 2, 2))
    np.testing.assert_allclose(out["image"], expected, rtol=0, atol=1e-4)
    share = downscale_local_mean((full["mitochondria"] > 0).astype(np.float64), (2, 2, 2))
    np.testing.assert_array_equal(out["truth"], (share > 0.5).astype(np.uint8))  # majority
    assert out["truth"].any()
    assert out["spacing"] == (16.0, 16.0, 16.0)
    with pytest.raises(
        TesseraInputError, match=r"shape must be a multiple of factor 2, got \(15, 64, 96\)"
    ):
        render_isotropic(seed=4, shape=(15, 64, 96), factor=2)
    with pytest.raises(TesseraInputError, match=r"factor must be an integer >= 1, got 0"):
        render_isotropic(seed=4, shape=(16, 64, 96), factor=0)


def test_benchmark_pixel_scores_follow_their_definitions():
    bench = _benchmark()
    # validation: every threshold in (0.2, 0.8] separates perfectly; the first of the grid wins
    val_truth = np.array([0, 0, 1, 1])
    val_prob = np.array([0.1, 0.2, 0.8, 0.9])
    # test at threshold 0.21: TP 2, FP 1, FN 2, TN 1
    test_truth = np.array([1, 1, 1, 1, 0, 0])
    test_prob = np.array([0.9, 0.5, 0.1, 0.15, 0.6, 0.0])
    s = bench.pixel_scores(val_prob, val_truth, test_prob, test_truth)
    assert s["threshold"] == pytest.approx(0.21)
    # precision TP/(TP+FP), recall TP/(TP+FN), F1 their harmonic mean, Jaccard TP/(TP+FP+FN)
    assert s["precision"] == pytest.approx(2 / 3)
    assert s["recall"] == pytest.approx(1 / 2)
    assert s["f1"] == pytest.approx(4 / 7)
    assert s["jaccard"] == pytest.approx(2 / 5)


def test_boundary_band_is_dilation_minus_erosion():
    bench = _benchmark()
    truth = np.zeros((1, 11, 11), np.uint8)
    truth[0, 3:8, 3:8] = 1
    band = bench.boundary_band(truth, width=1)
    # worked by hand: a 5 x 5 square dilated by the 4-connected cross covers 7 x 7 less its 4
    # corners (45 px), eroded leaves 3 x 3 (9 px): the band is 36 px, the square's centre out
    assert band.sum() == 36
    assert not band[0, 5, 5] and band[0, 2, 5] and band[0, 3, 3] and not band[0, 2, 2]


def test_benchmark_data_path_at_a_tiny_size():
    bench = _benchmark()
    seeds = {"train": 2, "validation": 20, "test": 21}  # small fields holding mitochondria
    volumes = bench.fibsem_volumes(seeds=seeds, shape=(32, 128, 128), spacing_nm=8.0, factor=2)
    assert {v["image"].shape for v in volumes.values()} == {(16, 64, 64)}
    assert all(v["truth"].any() for v in volumes.values())
    small = dict(
        stages=1,
        levels=0,
        sigmas=(1.0, 2.0),
        samples_per_tile=200,
        folds=2,
        classifier_options={"max_iter": 20},
    )
    specs = {"2d": CascadeSpec(**small), "3d": CascadeSpec(**small, dims=3, voxel_aspect=1.0)}
    out = bench.compare(volumes, specs, train_z=(3, 7, 11), score_z=(5, 9))
    assert set(out) == {"2d", "3d"}
    for r in out.values():
        assert 0.0 <= r["precision"] <= 1.0 and 0.0 <= r["jaccard"] <= r["f1"] <= 1.0
        assert 0.0 < r["boundary_f1"] < 1.0
        # Jaccard = F1 / (2 - F1) (both from TP, FP, FN; common practice)
        assert r["jaccard"] == pytest.approx(r["f1"] / (2 - r["f1"]))
        # dark mitochondria on a lighter cytoplasm: even this tiny model finds them
        assert r["f1"] > 0.3
    assert out["3d"]["z_halo"] > out["2d"]["z_halo"] == 0
