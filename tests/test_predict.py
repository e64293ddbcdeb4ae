"""Sharded prediction: the plan, exact stitching, and refusal of damaged or missing shard outputs."""

import json
import re
import shutil
import subprocess
import sys
import tracemalloc
from pathlib import Path

import numcodecs
import numpy as np
import pandas as pd
import pytest
import zarr
import zarr as zarr_module
from ome_zarr_models.v05 import Image
from scipy import ndimage

from tessera.cascade.across_sections import smooth_across_sections
from tessera.cascade.api import (
    CascadeSpec,
    fit_cascade,
    frame_memory_bytes,
    mirrored_window,
    predict_section,
    prepare_tile,
    receptive_radius,
    save_node,
    z_halo,
)
from tessera.errors import TesseraInputError, TesseraResourceError
from tessera.io.digests import file_sha256
from tessera.io.omezarr import AXES, multiscale_attrs, open_image
from tessera.io.store_checksums import record_checksums
from tessera.predict import block_read_bytes, halo_overhead, plan_shards
from tessera.probability_encoding import encode_probability
from tessera.workflow.files.shard_plan import read_plan
from tessera.workflow.jobs import predict
from tessera.workflow.jobs.predict import predict_shard_job, shard_plan_job, stitch_job
from tessera.workflow.jobs.train import tile_probabilities

SPEC = dict(
    stages=2,
    levels=1,
    sigmas=(1.0, 2.0),
    coarse_sigmas=(1.0,),
    stencil_radii=(1, 2),
    classifier="mlp",
    samples_per_tile=400,
    folds=2,
    seed=1,
    neighbours=1,
)


def blobs(seed, shape):
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[: shape[0], : shape[1]]
    truth = np.zeros(shape, bool)
    for _ in range(5):
        cy, cx, r = rng.uniform(0, shape[0]), rng.uniform(0, shape[1]), rng.uniform(4, 8)
        truth |= (yy - cy) ** 2 + (xx - cx) ** 2 < r**2
    image = (
        150
        + ndimage.gaussian_filter(rng.normal(size=shape), 2) * 40
        - 70 * truth
        + rng.normal(0, 12, shape)
    )
    return np.clip(image, 0, 255).astype(np.uint8), truth.astype(np.uint8)


def make_study(root, spec):
    """A trained cascade of `spec` saved as node files, and a 5-section image as OME-Zarr."""
    radius = receptive_radius(spec)
    sections = 2 * z_halo(spec) + 1
    tiles = []
    for i in range(4):
        image, truth = blobs(i, (64, 64))
        stack = np.stack([image] * sections)
        window = np.stack(
            [
                mirrored_window(stack, k, -radius, 64 + radius, -radius, 64 + radius)
                for k in range(sections)
            ]
        )
        tiles.append(prepare_tile(spec, f"t{i}", window, truth, fold=i % 2))
    models = fit_cascade(spec, tiles, target="blobs")
    paths = []
    for node, model in models.items():
        paths.append(root / f"stage{node[0]}_level{node[1]}.npz")
        save_node(model, paths[-1])
    volume = np.stack([blobs(10 + z, (70, 90))[0] for z in range(5)])
    image = root / "raw.ome.zarr"
    group = zarr.open_group(store=str(image), mode="w", zarr_format=3)
    factors = [(1, 1, 1), (1, 2, 2)]
    group.attrs["ome"] = multiscale_attrs(name="raw", spacing=(40, 8, 8), factors=factors)
    group.create_array(name="0", data=volume, chunks=(1, 32, 32), dimension_names=AXES)
    half = volume.reshape(5, 35, 2, 45, 2).mean(axis=(2, 4)).astype(np.uint8)
    group.create_array(name="1", data=half, chunks=(1, 32, 32), dimension_names=AXES)
    record_checksums(image)  # as ingest does: readers refuse stores without records
    return {
        "root": root,
        "models": models,
        "paths": paths,
        "image": image,
        "volume": volume,
        "spec": spec,
    }


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    """A trained 2 x 1 cascade saved as node files, and a 5-section image stored as OME-Zarr."""
    return make_study(tmp_path_factory.mktemp("predict"), CascadeSpec(**SPEC))


@pytest.fixture(scope="module")
def xsec_study(tmp_path_factory):
    """As `study`, with cross-section context: stage 2 reads stage 1's maps of z - 1 and z + 1,
    so a section's prediction reads z_halo = 2 sections of image on each side."""
    return make_study(tmp_path_factory.mktemp("xsec"), CascadeSpec(**SPEC, context_sections=1))


@pytest.fixture(scope="module")
def study_3d(tmp_path_factory):
    """As `xsec_study`, in 3D mode: each section's full-resolution features are the 3D filter
    bank of the sections around it, so a frame holds z_halo = 11 sections on each side."""
    spec = CascadeSpec(**{**SPEC, "neighbours": 0}, context_sections=1, dims=3)
    return make_study(tmp_path_factory.mktemp("dims3"), spec)


def whole_volume(study, output_sigma=0.0):
    return np.stack(
        [
            predict_section(study["models"], study["volume"], z, output_sigma=output_sigma)
            for z in range(5)
        ]
    )


def run(
    study,
    name,
    *,
    block,
    jobs=3,
    dtype="float32",
    max_halo=512,
    output_sigma=0.0,
    output_smoothing_sections=0.0,
    downsample=1,
    qc_table=None,
):
    out = study["root"] / name
    plan = out / "plan.json"
    shard_plan_job(
        study["image"],
        study["paths"],
        plan,
        target="blobs",
        downsample=downsample,
        block=block,
        shard_jobs=jobs,
        max_halo=max_halo,
        dtype=dtype,
        output_sigma=output_sigma,
        output_smoothing_sections=output_smoothing_sections,
        qc_table=qc_table,
    )
    shards = [out / f"job{j}" for j in range(jobs)]
    for j, folder in enumerate(shards):
        predict_shard_job(plan, study["image"], study["paths"], folder, job=j, target="blobs")
    stitch_job(plan, shards, out / "probability.ome.zarr", viewing_levels=1, chunks=(1, 32, 32))
    return out


def test_plan_tiles_the_volume_once_on_the_level_grid():
    plan = plan_shards((7, 300, 250), block=(3, 100, 90), halo=40, align=8, jobs=4)
    # at most the block rounded up to the 2^L grid (104, 96); 250 px in x need 3 such blocks,
    # made near-equal (88, 88, 74) rather than two full ones and a strip
    assert plan["block"] == [3, 104, 88]
    cover = np.zeros((7, 300, 250), int)
    for z0, z1, y0, y1, x0, x1 in plan["blocks"]:
        assert y0 % 8 == 0 and x0 % 8 == 0
        cover[z0:z1, y0:y1, x0:x1] += 1
    assert (cover == 1).all()
    shared = sorted(i for job in plan["jobs"] for i in job)
    assert shared == list(range(len(plan["blocks"]))) and len(plan["jobs"]) == 4


@pytest.mark.parametrize(
    "depth, jobs, blocks_per_job",
    [
        (82, 2, [2, 2]),  # 3 slabs of 28 would give one job 2 blocks, the other 1
        (64, 2, [1, 1]),  # already even: left as it is
        (200, 3, [3, 3, 3]),  # 7 slabs of 29 would give one job 3, the others 2: 9 of 23
    ],
)
def test_few_blocks_are_shared_evenly_among_the_jobs(depth, jobs, blocks_per_job):
    # A job that takes twice the blocks of another finishes last: with few blocks the slabs in
    # z are cut thinner (at most twice as many) where that evens the shares out.
    plan = plan_shards((depth, 384, 512), block=(32, 1536, 1536), halo=40, align=4, jobs=jobs)
    assert [len(job) for job in plan["jobs"]] == blocks_per_job
    cover = np.zeros(depth, int)
    for z0, z1, *_ in plan["blocks"]:
        cover[z0:z1] += 1
    assert (cover == 1).all()


@pytest.mark.parametrize(
    "shape, block, jobs",
    [
        ((64, 64, 64), (8, 1024, 1024), 2),  # a volume smaller than a block
        ((2, 1100, 300), (2, 1024, 1024), 1),  # just over one block in y
        ((3, 70, 90), (8, 512, 512), 3),  # fewer sections than jobs x blocks
        ((5, 1000, 1000), (2, 300, 300), 4),
    ],
)
def test_blocks_are_sized_to_the_volume(shape, block, jobs):
    # Geometry facts: a block of at most b px cannot cover n px in fewer than ceil(n / b)
    # blocks; each block classifies its core (extended to the align grid) and the halo on
    # both sides as far as it lies inside the volume (extended likewise), counted here block by
    # block by clipping the window's corners to the volume.
    halo, align = 40, 8
    plan = plan_shards(shape, block=block, halo=halo, align=align, jobs=jobs)
    most = [block[0]] + [-(-b // align) * align for b in block[1:]]
    cover = np.zeros(shape, int)
    window = 0
    ys, xs = set(), set()
    for z0, z1, y0, y1, x0, x1 in plan["blocks"]:
        cover[z0:z1, y0:y1, x0:x1] += 1
        assert z1 - z0 <= most[0] and y1 - y0 <= most[1] and x1 - x0 <= most[2]
        ys.add((y0, y1))
        xs.add((x0, x1))
        ends = [-(-n // align) * align for n in shape[1:]]
        y_end, x_end = y0 + -(-(y1 - y0) // align) * align, x0 + -(-(x1 - x0) // align) * align
        rows = np.clip([y0 - halo, y_end + halo], 0, ends[0])
        cols = np.clip([x0 - halo, x_end + halo], 0, ends[1])
        window += (z1 - z0) * np.diff(rows)[0] * np.diff(cols)[0]
    assert (cover == 1).all()
    assert plan["block"][1] <= shape[1] and plan["block"][2] <= shape[2]  # never above the volume
    assert len(ys) == -(-shape[1] // most[1]) and len(xs) == -(-shape[2] // most[2])
    for edges in (ys, xs):  # near-equal: no strip much thinner than the others
        sizes = [b - a for a, b in edges]
        assert max(sizes) - min(sizes) <= align * len(sizes)
    assert halo_overhead(plan) == pytest.approx(window / np.prod(shape))
    # every job has work while there are at least as many sections as jobs
    assert all(plan["jobs"][j] for j in range(min(jobs, shape[0] * len(ys) * len(xs))))


@pytest.mark.parametrize(
    "kwargs, message",
    [
        (
            dict(block=(1, 32, 32), halo=40),
            "predict.block [1, 32, 32] is smaller in y or x than the model's halo of 40 px",
        ),
        (
            dict(block=(1, 512, 512), halo=600, max_halo=512),
            "the model's receptive field needs a halo of 600 px, more than predict.max_halo = 512",
        ),
        (dict(block=(1, 64, 64), halo=8, jobs=0), "predict.shard_jobs must be an integer >= 1"),
        (dict(block=(0, 64, 64), halo=8), "predict.block must be 3 positive integers"),
    ],
)
def test_bad_plans_are_refused(kwargs, message):
    kwargs = {"align": 4, "jobs": 2, **kwargs}
    with pytest.raises(TesseraInputError, match=re.escape(message)):
        plan_shards((4, 128, 128), **kwargs)


@pytest.mark.parametrize("output_sigma", [0.0, 1.5])
def test_stitched_map_equals_the_whole_volume_in_one_piece(study, output_sigma):
    # The property that makes results independent of how the work was cut up: float output
    # within 1e-6 of predicting each section whole, for two block sizes and job counts, with
    # and without smoothing of the output.
    whole = whole_volume(study, output_sigma)
    halo = receptive_radius(study["spec"], output_sigma=output_sigma)
    maps = []
    for name, block, jobs in (("a", (2, halo, halo), 3), ("b", (5, 2 * halo, 2 * halo), 2)):
        out = run(
            study, f"float_{name}_{output_sigma}", block=block, jobs=jobs, output_sigma=output_sigma
        )
        _, info = open_image(out / "probability.ome.zarr")
        maps.append(info["levels"][0][:])
        assert info["spacing"] == (40.0, 8.0, 8.0)
    assert np.abs(maps[0] - whole).max() <= 1e-6
    assert np.abs(maps[1] - whole).max() <= 1e-6


def test_smoothing_across_sections_stitches_to_the_whole_volume_and_equals_scipy(study):
    # Each section's in-plane smoothed map, smoothed along z: the reference is
    # scipy.ndimage.gaussian_filter1d (mode "reflect", truncate 4) over the stack of whole
    # sections, the same as the maps mirrored beyond the first and last section. Blocks of one,
    # two and five sections (a block then predicts the sections within the smoothing's reach
    # around it) stitch to it within 1e-6, and `auto` resolves to 0.6 for this 2D cascade.
    sigma, sigma_z = 1.5, 0.6
    plane = whole_volume(study, sigma)
    reference = ndimage.gaussian_filter1d(plane, sigma_z, axis=0, mode="reflect", truncate=4.0)
    assert np.abs(smooth_across_sections(plane, sigma_z) - reference).max() <= 1e-6
    assert np.abs(plane - reference).max() > 1e-3  # the premise: it changes the maps
    one = predict_section(
        study["models"], study["volume"], 0, output_sigma=sigma, output_sigma_z=sigma_z
    )
    assert np.abs(one - reference[0]).max() <= 1e-6
    halo = receptive_radius(study["spec"], output_sigma=sigma)
    for name, depth, jobs in (("z1", 1, 3), ("z2", 2, 2), ("z5", 5, 1)):
        out = run(
            study,
            f"across_{name}",
            block=(depth, 2 * halo, 2 * halo),
            jobs=jobs,
            output_sigma=sigma,
            output_smoothing_sections="auto",
        )
        group, info = open_image(out / "probability.ome.zarr")
        assert np.abs(info["levels"][0][:] - reference).max() <= 1e-6, name
        assert read_plan(out / "plan.json")["output_sigma_z"] == sigma_z
        assert group.attrs["tessera"]["probability"]["output_smoothing_sections"] == sigma_z


def test_held_out_tiles_are_smoothed_across_sections_as_the_volume_is(study):
    # The threshold is chosen on tiles; it must see the maps the volume's objects are cut from.
    # A tile on the block grid, predicted on the sections the smoothing reads (mirrored beyond
    # the first and last), equals that region of the stitched volume's reference (scipy).
    sigma, sigma_z = 1.5, 0.6
    plane = whole_volume(study, sigma)
    reference = ndimage.gaussian_filter1d(plane, sigma_z, axis=0, mode="reflect", truncate=4.0)
    align = study["spec"].align
    rows = pd.DataFrame(
        [
            {"tile_id": f"t{z}", "dataset": "d", "z": z, "y0": align, "x0": 2 * align}
            | {"height": 32, "width": 40}
            for z in (0, 2, 4)
        ]
    )
    tiles = tile_probabilities(
        study["models"], {"d": study["volume"]}, rows, output_sigma=sigma, output_sigma_z=sigma_z
    )
    for row in rows.itertuples():
        region = reference[row.z, row.y0 : row.y0 + 32, row.x0 : row.x0 + 40]
        assert np.abs(tiles[row.tile_id] - region).max() <= 1e-6, row.tile_id


def test_a_section_qc_excluded_is_read_as_its_stand_in_by_the_sections_around(study, tmp_path):
    # With neighbours 1, sections 1 and 3 read section 2. QC excluded it (blank, say): every
    # shard job reads section 1 in its place, so the stitched map equals predicting each section
    # whole from the volume with section 2 replaced by a copy of section 1 (numpy.take of the
    # stand-in index), and the plan and the map's metadata record the stand-in.
    qc = tmp_path / "sections.tsv"
    qc.write_text("z\texcluded\n0\tFalse\n1\tFalse\n2\tTrue\n3\tFalse\n4\tFalse\n")
    replaced = np.take(study["volume"], [0, 1, 1, 3, 4], axis=0)
    expected = np.stack([predict_section(study["models"], replaced, z) for z in range(5)])
    halo = receptive_radius(study["spec"])
    out = run(study, "stand_in", block=(2, 2 * halo, 2 * halo), jobs=2, qc_table=qc)
    group, info = open_image(out / "probability.ome.zarr")
    assert np.abs(info["levels"][0][:] - expected).max() <= 1e-6
    assert read_plan(out / "plan.json")["section_stand_ins"] == [[2, 1]]
    assert group.attrs["tessera"]["probability"]["section_stand_ins"] == [[2, 1]]
    # the premise: without the stand-in, the sections beside it read section 2's own image
    plain = predict_section(study["models"], study["volume"], 3)
    assert np.abs(plain - expected[3]).max() > 1e-3


def test_stitched_map_with_cross_section_context_equals_the_whole_volume(xsec_study):
    # With context from the sections around, blocks of one section or of all five (each
    # section read with its own z halo from the stored image, mirrored beyond the first and
    # last section) stitch to the
    # same numbers as predicting each section in one piece: bit for bit when a block spans the
    # section in-plane, and within 1e-6 for small blocks (frames of another size put rows at
    # other places in the BLAS kernels' blocking), as without context.
    assert z_halo(xsec_study["spec"]) == 2
    whole = whole_volume(xsec_study)
    halo = receptive_radius(xsec_study["spec"])
    out = run(xsec_study, "xsec_plane", block=(1, 256, 256), jobs=3)
    np.testing.assert_array_equal(
        open_image(out / "probability.ome.zarr")[1]["levels"][0][:], whole
    )
    # one block of every section: consecutive sections share the maps of the ones around
    out = run(xsec_study, "xsec_block", block=(5, 256, 256), jobs=1)
    np.testing.assert_array_equal(
        open_image(out / "probability.ome.zarr")[1]["levels"][0][:], whole
    )
    out = run(xsec_study, "xsec_small", block=(2, halo, halo), jobs=2)
    small = open_image(out / "probability.ome.zarr")[1]["levels"][0][:]
    assert np.abs(small - whole).max() <= 1e-6


def test_uint8_map_is_byte_identical_and_valid_ngff(study):
    whole = encode_probability(whole_volume(study), "uint8")
    out = run(study, "uint8", block=(3, 64, 64), jobs=2, dtype="uint8")
    group, info = open_image(out / "probability.ome.zarr")
    assert info["levels"][0][:].tobytes() == whole.tobytes()
    assert info["extra"]["probability"]["scale"] == 255.0
    assert [a.shape for a in info["levels"]] == [(5, 70, 90), (5, 35, 45)]
    Image.from_zarr(group)  # NGFF 0.5 reference implementation (ome-zarr-models)


def test_a_map_of_a_reduced_level_overlays_the_raw_image(study):
    # NGFF places voxel i of a level at scale * i + translation (its centre). A voxel of the
    # 2x level averages raw voxels 2i and 2i + 1 in y and x, centred at (2i + 0.5) * 8 nm: the
    # map of that level must say so (translation 4 nm in y and x, none in z), as the raw
    # pyramid's own 2x level does, and its coarser viewing level shifts by half of its voxels
    # more. Reference: the NGFF 0.5 specification's coordinate transformations (from memory)
    # and its reference models (ome-zarr-models).
    out = run(study, "half", block=(5, 64, 64), jobs=1, downsample=2)
    group = zarr.open_group(store=str(out / "probability.ome.zarr"), mode="r")
    Image.from_zarr(group)
    datasets = group.attrs["ome"]["multiscales"][0]["datasets"]
    raw = zarr.open_group(store=str(study["image"]), mode="r").attrs["ome"]
    assert (
        datasets[0]["coordinateTransformations"]
        == (raw["multiscales"][0]["datasets"][1]["coordinateTransformations"])
    )
    level0, level1 = (d["coordinateTransformations"] for d in datasets)
    assert level0 == [
        {"type": "scale", "scale": [40.0, 16.0, 16.0]},
        {"type": "translation", "translation": [0.0, 4.0, 4.0]},
    ]
    # level 1 averages level-0 voxels 2i and 2i + 1 (16 nm apart): its first centre is 8 nm on
    assert level1[1]["translation"] == [0.0, 12.0, 12.0]
    assert open_image(out / "probability.ome.zarr")[1]["levels"][0].shape == (5, 35, 45)


def test_damaged_or_missing_shard_output_is_refused_and_nothing_published(study, tmp_path):
    out = run(study, "damage", block=(5, 64, 64), jobs=2, dtype="uint8")
    plan = out / "plan.json"
    shards = [out / "job0", out / "job1"]
    target = tmp_path / "probability.ome.zarr"
    block_file = sorted(shards[1].glob("block_*.zst"))[0]
    good = block_file.read_bytes()

    block_file.write_bytes(good[:-10])  # truncated
    with pytest.raises(
        TesseraInputError,
        match=rf"{block_file.name}: block file does not match its recorded checksum "
        r"\(truncated or altered\); rerun rule predict_shard for job 1",
    ):
        stitch_job(plan, shards, target)
    assert not target.exists() and not list(tmp_path.iterdir())

    # six values where the block has more, checksum updated to match (Zstandard frames from
    # numcodecs, the reference codec)
    block_file.write_bytes(numcodecs.Zstd(level=1).encode(np.zeros((1, 2, 3), np.uint8)))
    manifest = json.loads((shards[1] / "manifest.json").read_text())
    for entry in manifest["blocks"]:
        if entry["file"] == block_file.name:
            entry["sha256"] = file_sha256(block_file)
    (shards[1] / "manifest.json").write_text(json.dumps(manifest))
    with pytest.raises(TesseraInputError, match=rf"{block_file.name}: block file unreadable"):
        stitch_job(plan, shards, target)
    for entry in manifest["blocks"]:  # a manifest that records another shape
        if entry["file"] == block_file.name:
            entry["shape"] = [1, 2, 3]
    (shards[1] / "manifest.json").write_text(json.dumps(manifest))
    with pytest.raises(TesseraInputError, match=r"the plan expects uint8 \["):
        stitch_job(plan, shards, target)
    assert not target.exists()

    (shards[0] / "manifest.json").unlink()
    with pytest.raises(
        TesseraInputError,
        match="manifest.json: shard manifest missing; rerun rule predict_shard for job 0",
    ):
        stitch_job(plan, shards, target)
    assert not target.exists()


def test_killed_shard_job_leaves_no_output_and_reruns_identically(study, monkeypatch):
    out = run(study, "kill", block=(5, 64, 64), jobs=1, dtype="uint8")
    reference = {p.name: p.read_bytes() for p in (out / "job0").iterdir()}
    calls = []
    original = predict.predict_block

    def dies_after_first_block(*args, **kwargs):
        if calls:
            raise KeyboardInterrupt  # stands in for a kill between blocks
        calls.append(1)
        return original(*args, **kwargs)

    folder = out / "again"
    monkeypatch.setattr(predict, "predict_block", dies_after_first_block)
    with pytest.raises(KeyboardInterrupt):
        predict_shard_job(
            out / "plan.json", study["image"], study["paths"], folder, job=0, target="blobs"
        )
    assert not folder.exists() and not list(out.glob("again*"))
    monkeypatch.setattr(predict, "predict_block", original)
    predict_shard_job(
        out / "plan.json", study["image"], study["paths"], folder, job=0, target="blobs"
    )
    assert {p.name: p.read_bytes() for p in folder.iterdir()} == reference


def test_plan_refuses_a_model_for_another_target(study, tmp_path):
    with pytest.raises(TesseraInputError, match="model is for target 'blobs', expected 'nuclei'"):
        shard_plan_job(
            study["image"],
            study["paths"],
            tmp_path / "plan.json",
            target="nuclei",
            downsample=1,
            block=(1, 512, 512),
            shard_jobs=1,
            max_halo=512,
            dtype="uint8",
        )
    assert not (tmp_path / "plan.json").exists()


@pytest.mark.parametrize("side", [48, 160])
@pytest.mark.parametrize("fixture", ["study", "xsec_study", "study_3d"])
def test_memory_estimate_covers_the_measured_peak_of_a_frame(request, fixture, side):
    # tracemalloc (Python standard library) traces every buffer numpy allocates, so its peak is
    # what predicting one section of a block really takes; the estimate must cover it without
    # overstating it by more than half. With cross-section context a frame holds the maps and
    # features of three sections; in 3D mode it also holds 2 x 11 + 1 sections of image, and
    # the 3D filter bank's work (weighted sums along z, 3 x 3 eigenvalues) is larger. The block lies a whole halo inside the volume: the worst
    # case the estimate is for (a block at an edge classifies less of its halo). The volume is
    # a zarr array, as a shard job reads: a numpy volume would lend the frame a view of itself.
    study = request.getfixturevalue(fixture)
    rng = np.random.default_rng(side)
    halo = receptive_radius(study["spec"])
    volume = zarr.array(rng.integers(0, 256, (3, side + 2 * halo, side + 2 * halo), dtype=np.uint8))
    tracemalloc.start()
    try:
        predict.predict_block(study["models"], volume, (1, 2, halo, halo + side, halo, halo + side))
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    estimate = frame_memory_bytes(study["spec"], (side, side), itemsize=1)  # a uint8 volume
    assert peak <= estimate <= 1.5 * peak, (peak, estimate)


@pytest.mark.parametrize("fixture", ["study", "xsec_study", "study_3d"])
def test_an_8_bit_volume_is_predicted_as_its_float32_copy_bit_for_bit(request, fixture):
    # Frames keep 8-bit grey values as read and every filter converts what it reads; the
    # conversion is exact, so the maps equal those of the volume converted up front.
    study = request.getfixturevalue(fixture)
    halo = receptive_radius(study["spec"])
    rng = np.random.default_rng(11)
    volume = rng.integers(0, 256, (5, 40 + 2 * halo, 40 + 2 * halo), dtype=np.uint8)
    box = (1, 4, halo, halo + 40, halo, halo + 40)
    as_read = predict.predict_block(study["models"], volume, box)
    converted = predict.predict_block(study["models"], volume.astype(np.float32), box)
    assert np.array_equal(as_read, converted)


@pytest.mark.parametrize("fixture", ["xsec_study", "study_3d"])
def test_a_block_of_several_sections_takes_one_frame_and_its_read(request, fixture):
    # A block is read once (its sections and the z halo, uint8 as stored) and every section's
    # frame takes a view of it: the peak (tracemalloc, as above) is one frame's estimate plus
    # the rest of the read (block_read_bytes) and the block's output, not one frame per section.
    study = request.getfixturevalue(fixture)
    spec, side = study["spec"], 48
    halo = receptive_radius(spec)
    rng = np.random.default_rng(3)
    volume = zarr.array(rng.integers(0, 256, (6, side + 2 * halo, side + 2 * halo), dtype=np.uint8))
    peaks, estimates = {}, {}
    for count in (1, 4):
        box = (1, 1 + count, halo, halo + side, halo, halo + side)
        tracemalloc.start()
        try:
            predict.predict_block(study["models"], volume, box)
            peaks[count] = tracemalloc.get_traced_memory()[1]
        finally:
            tracemalloc.stop()
        estimates[count] = (
            frame_memory_bytes(spec, (side, side), itemsize=1)
            + block_read_bytes(spec, (count, side, side), halo=halo)
            + 4 * count * side * side
        )
        assert peaks[count] <= estimates[count] <= 1.5 * peaks[count], (count, peaks, estimates)
    # three more sections held as read (1 byte each) and their float32 output (4 bytes each,
    # numpy); the estimate grows at least as much
    grown = peaks[4] - peaks[1]
    assert 3 * ((side + 2 * halo) ** 2 + 4 * side * side) <= grown, grown
    assert grown <= estimates[4] - estimates[1], (grown, estimates)


_SHARD_RSS = """
import json, re, sys
from tessera.workflow.jobs.predict import predict_shard_job, read_plan, shard_memory_mb, load_cascade, cascade_spec


def peak_rss_mb():
    # proc(5): VmHWM is the process's peak resident set size, in kB (kB = 1024 bytes); unlike
    # getrusage's ru_maxrss it starts afresh at exec, so the parent's size does not leak in.
    with open("/proc/self/status") as fh:
        return int(re.search(r"VmHWM:\\s+(\\d+) kB", fh.read()).group(1)) * 1024 / 1e6


plan_path, image, out, *models = sys.argv[1:]
baseline = peak_rss_mb()
predict_shard_job(plan_path, image, models, out, job=0, target="blobs")
peak = peak_rss_mb()
spec = cascade_spec(load_cascade(models, target="blobs"))
print(json.dumps({"baseline": baseline, "peak": peak, "estimate": shard_memory_mb(read_plan(plan_path), 0, spec, models)}))
"""


@pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="needs Linux /proc")
def test_a_shard_job_stays_within_its_memory_estimate(study, tmp_path):
    # The kernel's own account of a real shard job (peak resident set size) in a fresh
    # interpreter: imports stay below BASELINE_MB and the whole job below the estimate.
    volume = np.random.default_rng(7).integers(0, 256, (2, 300, 300), dtype=np.uint8)
    image = tmp_path / "big.ome.zarr"
    group = zarr_module.open_group(store=str(image), mode="w", zarr_format=3)
    group.attrs["ome"] = multiscale_attrs(name="raw", spacing=(40, 8, 8), factors=[(1, 1, 1)])
    group.create_array(name="0", data=volume, chunks=(1, 128, 128), dimension_names=AXES)
    record_checksums(image)
    plan = tmp_path / "plan.json"
    shard_plan_job(
        image,
        study["paths"],
        plan,
        target="blobs",
        downsample=1,
        block=(2, 300, 300),
        shard_jobs=1,
        max_halo=512,
        dtype="uint8",
    )
    script = tmp_path / "job.py"
    script.write_text(_SHARD_RSS)
    result = subprocess.run(
        [
            sys.executable,
            str(script),
            str(plan),
            str(image),
            str(tmp_path / "job0"),
            *map(str, study["paths"]),
        ],
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert result.returncode == 0, result.stderr
    figures = json.loads(result.stdout)
    assert figures["baseline"] < predict.BASELINE_MB, figures
    assert figures["peak"] <= figures["estimate"], figures


def test_shard_job_with_too_little_memory_stops_before_it_starts(study, tmp_path):
    out = study["root"] / "memory"
    plan = out / "plan.json"
    shard_plan_job(
        study["image"],
        study["paths"],
        plan,
        target="blobs",
        downsample=1,
        block=(5, 64, 64),
        shard_jobs=1,
        max_halo=512,
        dtype="uint8",
    )
    needed = predict.shard_memory_mb(predict.read_plan(plan), 0, study["spec"], study["paths"])
    with pytest.raises(TesseraResourceError) as refused:
        predict_shard_job(
            plan,
            study["image"],
            study["paths"],
            out / "job0",
            job=0,
            target="blobs",
            mem_mb=needed - 1,
        )
    message = str(refused.value)
    # the 70 x 90 sections are cut into near-equal blocks of at most 64 px: the largest is named
    largest = max(
        ([b[1] - b[0], b[3] - b[2], b[5] - b[4]] for b in predict.read_plan(plan)["blocks"]),
        key=np.prod,
    )
    assert largest == [5, 36, 46]
    assert message.startswith(
        f"{plan}: shard job 0 needs about {needed} MB of memory (blocks of {largest} voxels"
    )
    assert f"), but rule predict_shard was given mem_mb={needed - 1}; " in message
    assert message.endswith(", or make predict.block smaller")
    assert f"set-resources: {{predict_shard: {{mem_mb: {needed}}}}}" in message
    assert not (out / "job0").exists() and not list(out.glob("job0*"))
    predict_shard_job(
        plan, study["image"], study["paths"], out / "job0", job=0, target="blobs", mem_mb=needed
    )
    assert (out / "job0" / "manifest.json").exists()


def test_a_shard_job_verifies_only_the_chunks_its_windows_read(study, tmp_path):
    # a copy of the image where the workflow keeps it, with one damaged chunk in the last section
    image = tmp_path / "results" / "d1" / "pyramid" / "raw.ome.zarr"
    shutil.copytree(study["image"], image)
    damaged = (
        image / "0" / "c" / "4" / "0" / "0"
    )  # zarr v3 chunk key: section 4, first chunk row and column
    data = bytearray(damaged.read_bytes())
    data[len(data) // 2] ^= 0x01
    damaged.write_bytes(bytes(data))
    plan = tmp_path / "plan.json"
    halo = receptive_radius(study["spec"])
    shard_plan_job(
        image,
        study["paths"],
        plan,
        target="blobs",
        downsample=1,
        block=(1, 2 * halo, 2 * halo),
        shard_jobs=5,
        max_halo=512,
        dtype="uint8",
    )
    blocks, jobs = json.loads(plan.read_text())["blocks"], json.loads(plan.read_text())["jobs"]
    reads = [
        {z for i in job for z in range(blocks[i][0] - 1, blocks[i][1] + 1)} for job in jobs
    ]  # neighbours=1
    clean = next(
        j for j, z in enumerate(reads) if 4 not in z and 3 not in z
    )  # 3 reads 4 as its neighbour
    predict_shard_job(plan, image, study["paths"], tmp_path / "clean", job=clean, target="blobs")
    assert (tmp_path / "clean" / "manifest.json").is_file()
    with pytest.raises(
        TesseraInputError,
        match=r"0/c/4/0/0: file does not match its recorded SHA-256.*rerun rule "
        r"pyramid",
    ) as error:
        predict_shard_job(
            plan, image, study["paths"], tmp_path / "last", job=len(jobs) - 1, target="blobs"
        )
    assert str(error.value).startswith(str(damaged))
    assert not (tmp_path / "last").exists()


@pytest.mark.parametrize("dtype", ["uint8", "float16"])
def test_a_block_stored_as_it_is_made_equals_its_float32_map_encoded(study, dtype):
    # Shard jobs encode each section as soon as it is made (a block is then held as uint8):
    # the result is the float32 block encoded whole, value for value.
    halo = receptive_radius(study["spec"])
    volume = np.random.default_rng(12).integers(0, 256, (4, 40 + 2 * halo, 40 + 2 * halo), np.uint8)
    box = (0, 4, halo, halo + 40, halo, halo + 40)
    as_float = predict.predict_block(study["models"], volume, box)
    stored = predict.predict_block(study["models"], volume, box, dtype=dtype)
    assert stored.dtype == np.dtype(dtype)
    assert np.array_equal(stored, encode_probability(as_float, dtype))
    with pytest.raises(TesseraInputError, match="predict.dtype must be one of"):
        predict.predict_block(study["models"], volume, box, dtype="int8")
