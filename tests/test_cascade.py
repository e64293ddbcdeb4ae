"""The cascaded hierarchical model: structure, out-of-fold context, exact blocks, safe storage."""

import io
import json
import os
import zipfile
from pathlib import Path

import numpy as np
import pytest
import yaml
from scipy import ndimage
from sklearn.metrics import f1_score, precision_recall_curve

from tessera.cascade.classifiers import CHUNK_ROWS, KINDS, linear_first_step
from tessera.cascade.features import (
    DEFAULT_SIGMAS,
    DEFAULT_SIGMAS_3D,
    filter_bank,
    neighbour_features,
)
from tessera.cascade.fit import fit_cascade, out_of_fold_maps, prepare_tile, train_node
from tessera.cascade.frame import (
    BAND_ROWS,
    _banded_map,
    _bands,
    ensure_maps,
    make_frame,
    mirror_beyond_volume,
    mirrored_stack,
    mirrored_window,
    node_map,
    node_matrix,
    volume_room,
)
from tessera.cascade.geometry import (
    MAX_OUTPUT_SIGMA,
    feature_halo,
    margins,
    receptive_radius,
    z_halo,
)
from tessera.cascade.orientations import ORIENTATION_COUNTS
from tessera.cascade.predict import predict_frame, predict_section
from tessera.cascade.spec import (
    LIMITS,
    MAX_SIGMA,
    POOLINGS,
    STENCIL_RADIUS_LIMITS,
    CascadeSpec,
    ancestors,
    node_inputs,
    node_settings,
    nodes,
    spec_from_settings,
)
from tessera.cascade.store import load_node, save_node
from tessera.errors import TesseraInputError
from tessera.ladder import LADDER_DEFAULTS
from tessera.workflow.files.node_model import read_node

SMALL = dict(
    sigmas=(1.0, 2.0),
    coarse_sigmas=(1.0,),
    stencil_radii=(1, 2, 4),
    classifier="mlp",
    samples_per_tile=600,
    folds=2,
    seed=3,
)


def blobs(seed, shape=(96, 96)):
    """Dark round 'organelles' on a textured background, with noise; labels = the blobs."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[: shape[0], : shape[1]]
    truth = np.zeros(shape, bool)
    for _ in range(6):
        cy, cx, r = rng.uniform(0, shape[0]), rng.uniform(0, shape[1]), rng.uniform(5, 10)
        truth |= (yy - cy) ** 2 + (xx - cx) ** 2 < r**2
    texture = ndimage.gaussian_filter(rng.normal(size=shape), 2) * 60
    image = 150 + texture - 70 * truth + rng.normal(0, 15, shape)
    return np.clip(image, 0, 255).astype(np.float32), truth.astype(np.uint8)


def make_tiles(spec, count=6, final=None):
    radius = receptive_radius(spec, final)
    tiles = []
    for i in range(count):
        image, truth = blobs(i)
        window = mirrored_window(image[np.newaxis], 0, -radius, 96 + radius, -radius, 96 + radius)
        tiles.append(prepare_tile(spec, f"t{i}", window, truth, fold=i % spec.folds, final=final))
    return tiles


@pytest.fixture(scope="module")
def trained():
    spec = CascadeSpec(stages=2, levels=1, **SMALL)
    tiles = make_tiles(spec)
    return spec, tiles, fit_cascade(spec, tiles, target="blobs")


def test_graph_of_stages_and_levels():
    # Each level sees the level below; the full-resolution node sees every level; stages chain.
    spec = CascadeSpec(stages=2, levels=2)
    assert nodes(spec) == [(1, 1), (1, 2), (1, 0), (2, 1), (2, 2), (2, 0)]
    assert node_inputs(spec, 1, 1) == []
    assert node_inputs(spec, 1, 2) == [(1, 1)]
    assert node_inputs(spec, 2, 1) == [(1, 0)]
    assert node_inputs(spec, 2, 2) == [(2, 1), (1, 0)]
    assert ancestors(spec, (1, 0)) == [(1, 1), (1, 2), (1, 0)]
    assert margins(spec)[(2, 0)] == 0
    assert receptive_radius(spec) % 4 == 0


def rings(seed, shape=(96, 96)):
    """Round objects known only by their dark wall: inside and outside share one grey level.

    Labels are the filled discs (radius 11-15 px). Away from the wall a pixel's own small-scale
    filter responses look the same inside an object and in the background; what tells them
    apart is whether the wall lies around the pixel, i.e. context.
    """
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[: shape[0], : shape[1]]
    truth = np.zeros(shape, bool)
    wall = np.zeros(shape, bool)
    for _ in range(4):
        cy, cx, r = rng.uniform(8, shape[0] - 8), rng.uniform(8, shape[1] - 8), rng.uniform(11, 15)
        distance = np.sqrt((yy - cy) ** 2 + (xx - cx) ** 2)
        truth |= distance < r
        wall |= np.abs(distance - r + 1) < 1.2
    image = 150 - 70 * wall + rng.normal(0, 15, shape)
    return np.clip(image, 0, 255).astype(np.float32), truth.astype(np.uint8)


def _best_f1(truth, score):
    """Best F1 over every threshold of `score` (sklearn.metrics.precision_recall_curve)."""
    precision, recall, _ = precision_recall_curve(truth, score)
    return float(np.max(2 * precision * recall / np.maximum(precision + recall, 1e-12)))


@pytest.fixture(scope="module")
def ring_cascade():
    # auto-context without levels, so "stage 1 alone" is plain pixel classification; stencil
    # radii up to 12 px let stage 2 read stage 1's map at the wall from inside an object
    spec = CascadeSpec(stages=2, levels=0, **{**SMALL, "stencil_radii": (3, 6, 12)})
    radius = receptive_radius(spec)
    tiles = []
    for i in range(6):
        image, truth = rings(i)
        window = mirrored_window(image[np.newaxis], 0, -radius, 96 + radius, -radius, 96 + radius)
        tiles.append(prepare_tile(spec, f"r{i}", window, truth, fold=i % 2))
    return fit_cascade(spec, tiles, target="rings")


def test_cascade_learns_and_beats_the_first_stage_alone(trained, ring_cascade):
    spec, _, models = trained
    image, truth = blobs(100)
    prob = predict_section(models, image)
    assert prob.dtype == np.float32 and prob.shape == image.shape
    # Reference metric: sklearn.metrics.f1_score.
    assert f1_score(truth.ravel(), prob.ravel() >= 0.5) > 0.85
    # Where context decides (rings): held-out sections the models never saw.
    stage_one = {node: m for node, m in ring_cascade.items() if node[0] == 1}
    held_out = [rings(seed) for seed in (100, 101)]
    truth = np.concatenate([t.ravel() for _, t in held_out])
    image = np.concatenate([i.ravel() for i, _ in held_out])
    both = np.concatenate([predict_section(ring_cascade, i).ravel() for i, _ in held_out])
    first = np.concatenate([predict_section(stage_one, i).ravel() for i, _ in held_out])
    f1_both = f1_score(truth, both >= 0.5)  # reference: sklearn.metrics.f1_score
    # Baselines get every advantage: thresholds chosen on the held-out pixels themselves.
    f1_first = _best_f1(truth, first)
    # the best plain grey-level cut, dark = object (the wall is the only dark thing)
    f1_cut = _best_f1(truth, -image)
    # the second stage reads the first stage's map around each pixel: it must add clearly
    assert f1_both > f1_first + 0.08, (f1_both, f1_first)
    # a pixel classifier must beat any single grey-level cut, which finds walls, not interiors
    assert f1_first > f1_cut + 0.15, (f1_first, f1_cut)
    assert f1_both > f1_cut + 0.3, (f1_both, f1_cut)


def test_block_prediction_equals_whole_image(trained):
    # The core of a block read with the receptive-radius halo equals the whole-image prediction
    # (block origins on multiples of 2^L), whatever the block size: with the room each block
    # has in the image (maps mirrored beyond the image's edges), and without (every halo
    # classified on the mirrored image, the whole image then read with a halo too).
    spec, _, models = trained
    image, _ = blobs(101, shape=(80, 72))
    whole = predict_section(models, image)
    halo = receptive_radius(spec)
    volume = image[np.newaxis]
    window = mirrored_window(volume, 0, -halo, 80 + halo, -halo, 72 + halo)
    whole_mirrored = predict_frame(models, window, (80, 72))
    for block in (16, 40):
        stitched, stitched_mirrored = np.zeros_like(whole), np.zeros_like(whole)
        for y0 in range(0, 80, block):
            for x0 in range(0, 72, block):
                h, w = min(block, 80 - y0), min(block, 72 - x0)
                window = mirrored_window(
                    volume, 0, y0 - halo, y0 + h + halo, x0 - halo, x0 + w + halo
                )
                room = volume_room(spec, (80, 72), (y0, y0 + h, x0, x0 + w))
                core = (slice(y0, y0 + h), slice(x0, x0 + w))
                stitched[core] = predict_frame(models, window, (h, w), room=room)
                stitched_mirrored[core] = predict_frame(models, window, (h, w))
        np.testing.assert_allclose(stitched, whole, atol=1e-6)
        np.testing.assert_allclose(stitched_mirrored, whole_mirrored, atol=1e-6)


def test_banded_node_maps_are_bit_identical_to_the_whole_feature_matrix(trained):
    # Reference: the classifier's own prediction of every node's whole feature matrix at once
    # (numpy/BLAS matrix products over all rows, in the classifier's chunks). A frame of more
    # than CHUNK_ROWS pixels makes the bands cross into a second chunk; the row-band path
    # (classifiers whose first step is not a product with a matrix: trees, boosting) must give
    # every node's map to the last bit, for the fold models too.
    spec, _, models = trained
    image, _ = blobs(102, shape=(532, 548))
    radius = receptive_radius(spec)
    window = mirrored_window(image[np.newaxis], 0, -radius, 532 + radius, -radius, 548 + radius)
    for fold in (-1, 1):
        frame = make_frame(spec, window, (532, 548))
        ensure_maps(frame, (spec.stages, 0), models, fold)
        for node in nodes(spec):
            margin = frame.margins[node]
            clf = models[node].for_tile(fold)
            x = node_matrix(frame, node, margin)
            whole = clf.predict(x.reshape(-1, x.shape[-1])).reshape(x.shape[:2])
            if node[1] == 0:
                assert whole.size > CHUNK_ROWS
            np.testing.assert_array_equal(_banded_map(frame, node, margin, clf, 0), whole)


@pytest.fixture(scope="module")
def trained_two_levels():
    spec = CascadeSpec(stages=2, levels=2, **SMALL)
    tiles = make_tiles(spec, count=4)
    return spec, fit_cascade(spec, tiles, target="blobs")


@pytest.mark.parametrize("room", [None, (3, 7, 5, 0)], ids=["halo classified", "volume edges"])
def test_node_maps_formed_in_parts_equal_the_whole_feature_matrix(trained_two_levels, room):
    # Reference: the network's own prediction of each node's whole feature matrix (numpy
    # matrix products over whole rows). node_map forms a network's first layer from parts of
    # that matrix instead (image features and same-level maps as planes, each coarser map's
    # part at its own level, repeated up), so its float32 sums are taken in another order:
    # equal within 1e-6. With volume edges 3, 7, 5 and 0 px from the core, regions are cut to
    # widths no coarse cell divides, and the coarse parts take the general repeat; with two
    # coarser levels, level 0 sums two coarse parts.
    spec, models = trained_two_levels
    assert linear_first_step(spec.classifier)
    image, _ = blobs(103, shape=(200, 180))
    radius = receptive_radius(spec)
    window = mirrored_window(image[np.newaxis], 0, -radius, 200 + radius, -radius, 180 + radius)
    frame = make_frame(spec, window, (200, 180), room=room)
    ensure_maps(frame, (spec.stages, 0), models, -1)
    for node in nodes(spec):
        margin = frame.margins[node]
        clf = models[node].classifier
        x = node_matrix(frame, node, margin)
        whole = clf.predict(x.reshape(-1, x.shape[-1])).reshape(x.shape[:2])
        pads = tuple((margin - c) // 2 ** node[1] for c in frame.section(0).clip(margin))
        got = node_map(frame, node, margin, clf)
        np.testing.assert_allclose(got, mirror_beyond_volume(whole, pads), rtol=0, atol=1e-6)
        assert not np.array_equal(whole, np.zeros_like(whole))


def test_bands_stay_inside_the_classifier_chunks():
    # Each band lies inside one CHUNK_ROWS chunk, starts a whole number of bands after the
    # chunk's start (so its rows keep their place in the BLAS kernel's row blocking) and
    # together they cover every row once.
    n = 2 * CHUNK_ROWS + 1000
    bands = list(_bands(n))
    assert bands[0][0] == 0 and bands[-1][1] == n
    assert all(a[1] == b[0] for a, b in zip(bands, bands[1:]))
    for start, stop in bands:
        chunk = start // CHUNK_ROWS
        assert (stop - 1) // CHUNK_ROWS == chunk
        assert (start - chunk * CHUNK_ROWS) % BAND_ROWS == 0
        assert BAND_ROWS // 2 <= stop - start < BAND_ROWS + BAND_ROWS // 2 or stop == n


def test_training_context_is_out_of_fold(trained):
    # A tile's out-of-fold map must not come from a model that saw the tile: it differs from
    # the full model's map, and the full model fits its own training tiles at least as well.
    spec, tiles, models = trained
    oof = out_of_fold_maps(models, tiles)
    full = {t.tile_id: predict_section(models, blobs(int(t.tile_id[1:]))[0]) for t in tiles}
    assert all(not np.allclose(oof[k], full[k]) for k in oof)
    truth = np.concatenate([t.labels.ravel() for t in tiles])
    f1_oof = f1_score(truth, np.concatenate([oof[t.tile_id].ravel() for t in tiles]) >= 0.5)
    f1_full = f1_score(truth, np.concatenate([full[t.tile_id].ravel() for t in tiles]) >= 0.5)
    assert f1_full >= f1_oof


def test_same_seed_same_model_bytes(trained, tmp_path):
    spec, _, models = trained
    again = fit_cascade(spec, make_tiles(spec), target="blobs")
    for node in nodes(spec):
        save_node(models[node], tmp_path / "a.npz")
        save_node(again[node], tmp_path / "b.npz")
        assert (tmp_path / "a.npz").read_bytes() == (tmp_path / "b.npz").read_bytes()


def test_nodes_do_not_depend_on_later_stages(trained):
    # Training stage 1 alone gives the same stage-1 models as inside a 2-stage cascade, so
    # adding a stage never retrains the earlier ones.
    spec, _, models = trained
    one = CascadeSpec(stages=1, levels=1, **SMALL)
    alone = fit_cascade(one, make_tiles(one), target="blobs")
    for node in nodes(one):
        a, b = alone[node].classifier.to_state()[0], models[node].classifier.to_state()[0]
        assert a.keys() == b.keys() and all(np.array_equal(a[k], b[k]) for k in a)


def test_whole_cascade_equals_one_job_per_node(trained, tmp_path):
    # A workflow trains each node in a job of its own: the spec ends at the node's stage, tiles
    # carry the node's own receptive radius and upstream models come from their files. The
    # models fit_cascade makes are the same, byte for byte.
    spec, _, models = trained
    for node in nodes(spec):
        alone = spec_from_settings(node_settings(spec), stages=node[0])
        upstream = {
            a: load_node(tmp_path / f"{a}.npz", spec=alone) for a in ancestors(alone, node)[:-1]
        }
        tiles = make_tiles(alone, final=node)
        model = train_node(alone, *node, tiles, upstream, target="blobs")
        save_node(model, tmp_path / f"{node}.npz")
        save_node(models[node], tmp_path / "whole.npz")
        assert (tmp_path / f"{node}.npz").read_bytes() == (tmp_path / "whole.npz").read_bytes()


def test_saved_nodes_load_without_pickle_and_predict_the_same(trained, tmp_path):
    spec, _, models = trained
    loaded = {}
    for node in nodes(spec):
        path = tmp_path / f"{node}.npz"
        save_node(models[node], path)
        with np.load(
            path, allow_pickle=False
        ) as data:  # would raise if an object array were inside
            assert all(data[k].dtype != object for k in data.files)
        loaded[node] = load_node(path, target="blobs", spec=spec, stage=node[0], level=node[1])
    image, _ = blobs(103)
    np.testing.assert_array_equal(predict_section(loaded, image), predict_section(models, image))


def test_model_made_for_something_else_is_refused(trained, tmp_path):
    spec, _, models = trained
    path = tmp_path / "m.npz"
    save_node(models[(1, 0)], path)
    with pytest.raises(TesseraInputError, match="model is for target 'blobs', expected 'nuclei'"):
        load_node(path, target="nuclei")
    other = CascadeSpec(stages=2, levels=1, **{**SMALL, "stencil_radii": (1, 2)})
    with pytest.raises(
        TesseraInputError, match=r"model was trained with other cascade settings \(stencil_radii\)"
    ):
        load_node(path, spec=other)
    truncated = tmp_path / "cut.npz"
    truncated.write_bytes(path.read_bytes()[:200])
    with pytest.raises(TesseraInputError, match="cut.npz: not a readable model file"):
        load_node(truncated)
    foreign = tmp_path / "foreign.npz"
    np.savez(foreign, weights=np.zeros(3))
    with pytest.raises(
        TesseraInputError, match=r"foreign\.npz: not a tessera model file \(no metadata\)"
    ):
        load_node(foreign)


def _flip(data, offset, bit=0x01):
    data = bytearray(data)
    data[offset] ^= bit
    return bytes(data)


@pytest.mark.parametrize("damage", ["truncated", "bit-flip", "bit-flip-early"])
def test_damaged_model_file_is_refused_naming_file_and_rule(trained, tmp_path, damage):
    spec, _, models = trained
    path = tmp_path / "stage1_level0.npz"
    save_node(models[(1, 0)], path)
    data = path.read_bytes()
    if damage == "truncated":
        data = data[: len(data) * 2 // 3]
    else:  # one bit inside the compressed members (zip keeps a CRC-32 per member; we a SHA-256)
        data = _flip(data, len(data) // 2 if damage == "bit-flip" else 200)
    path.write_bytes(data)
    with pytest.raises(
        TesseraInputError,
        match=r"rerun rule train_node to rebuild it \(delete the file, or snakemake --forcerun train_node\)",
    ) as error:
        read_node(path, target="blobs")
    assert str(error.value).startswith(f"{path}: ")
    if damage == "truncated":  # a cut zip archive cannot be opened at all
        assert "not a readable model file (truncated or damaged?)" in str(error.value)


def _zip_header_offsets(data):
    """Every byte offset of the archive's local headers, central directory and end record (zip
    format, PKWARE APPNOTE: 30-byte local headers followed by the name and extra field)."""
    with zipfile.ZipFile(io.BytesIO(data)) as archive:
        members = archive.infolist()
        start = archive.start_dir
    offsets = set(range(start, len(data)))
    for info in members:
        local = info.header_offset
        name_and_extra = int.from_bytes(data[local + 26 : local + 28], "little") + int.from_bytes(
            data[local + 28 : local + 30], "little"
        )
        offsets.update(range(local, local + 30 + name_and_extra))
    return sorted(offsets)


def test_a_flipped_bit_anywhere_in_a_model_file_is_refused_in_one_line(trained, tmp_path):
    # Wherever one bit flips (zip headers, a deflate stream, the stored checksum), loading gives
    # TesseraInputError, never zlib's or zipfile's own exception (zip format: per-member CRC-32
    # and deflate streams, PKWARE APPNOTE; a flip in a deflate stream can fail before the CRC).
    # Every header byte is tried, since a flipped method or flag field fails in its own ways
    # (an unsupported compression method, a member marked encrypted); the members' contents
    # are sampled.
    spec, _, models = trained
    path = tmp_path / "stage1_level0.npz"
    save_node(models[(1, 0)], path)
    data = path.read_bytes()
    sampled = range(0, len(data), max(1, len(data) // 97))
    offsets = sorted(set(sampled) | set(_zip_header_offsets(data)))
    for offset in offsets:
        for bit in (0x01, 0x08):
            path.write_bytes(_flip(data, offset, bit))
            try:
                read_node(path, target="blobs")
            except TesseraInputError as error:
                assert str(error).startswith(f"{path}: "), offset
            # a flip in bytes nothing reads (zip comment, padding) may leave the model intact


def test_the_library_names_no_rule_and_ends_with_the_callers_hint(trained, tmp_path):
    # The cascade knows nothing of the workflow: without a hint its message says what to do in
    # its own terms; a caller that knows how the file is made says so instead.
    path = tmp_path / "m.npz"
    save_node(trained[2][(1, 0)], path)
    path.write_bytes(path.read_bytes()[:300])
    with pytest.raises(TesseraInputError, match=r"m\.npz: not a readable model file") as plain:
        load_node(path, target="blobs")
    message = str(plain.value).removeprefix(f"{path}: ")
    assert "rule" not in message and "snakemake" not in message
    assert message.endswith("; train the node again to rebuild it")
    with pytest.raises(TesseraInputError, match="not a readable model file") as hinted:
        load_node(path, target="blobs", hint="ask the person who trained it")
    assert str(hinted.value).endswith("; ask the person who trained it")


def _saved_arrays(trained, path):
    """Save the first node to `path`; return the path and its arrays as numpy reads them back."""
    save_node(trained[2][(1, 0)], path)
    with np.load(path, allow_pickle=False) as data:
        return path, {k: data[k] for k in data.files}


def test_model_numbers_changed_after_training_are_refused(trained, tmp_path):
    # a well-formed .npz (numpy writes it afresh, so every zip CRC is right) whose weights differ
    # from the ones trained: only the SHA-256 recorded at write time can tell
    path, arrays = _saved_arrays(trained, tmp_path / "m.npz")
    name = next(
        k
        for k in sorted(arrays)
        if k != "meta_json" and arrays[k].dtype.kind == "f" and arrays[k].size
    )
    arrays[name] = arrays[name].copy()
    arrays[name].flat[0] += 1.0
    np.savez_compressed(path, **arrays)
    with pytest.raises(
        TesseraInputError,
        match=r"m\.npz: model content does not match the SHA-256 recorded when it "
        r"was written \(altered or damaged\); rerun rule train_node",
    ):
        read_node(path, target="blobs")


def test_model_of_another_format_version_is_refused(trained, tmp_path):
    # a file as the previous format wrote it: metadata without the recorded SHA-256
    path, arrays = _saved_arrays(trained, tmp_path / "old.npz")
    meta = json.loads(arrays["meta_json"].tobytes())
    meta.pop("payload_sha256")
    meta["format"] = 1
    arrays["meta_json"] = np.frombuffer(json.dumps(meta).encode(), dtype=np.uint8)
    np.savez_compressed(path, **arrays)
    with pytest.raises(
        TesseraInputError,
        match=r"old\.npz: model format 1 is not 2 \(made by tessera .*\); retrain it with this version",
    ):
        load_node(path, target="blobs")


class _RunsOnLoad:
    """Unpickling this creates a folder: a stand-in for code hidden in a model file."""

    def __init__(self, folder):
        self.folder = str(folder)

    def __reduce__(self):
        return (os.mkdir, (self.folder,))


def test_model_file_carrying_a_pickled_object_is_refused_without_running_it(trained, tmp_path):
    # numpy.load with allow_pickle=False refuses object arrays before unpickling them (numpy
    # documentation of numpy.load); with allow_pickle=True the same file runs the hidden code.
    good, arrays = _saved_arrays(trained, tmp_path / "good.npz")
    crafted = tmp_path / "crafted.npz"
    hidden = np.empty(1, dtype=object)
    hidden[0] = _RunsOnLoad(tmp_path / "ran")
    np.savez(crafted, **arrays, clf0__extra=hidden)
    control = tmp_path / "control.npz"
    hidden[0] = _RunsOnLoad(tmp_path / "control-ran")
    np.savez(control, clf0__extra=hidden)
    with np.load(control, allow_pickle=True) as data:
        data["clf0__extra"]
    assert (tmp_path / "control-ran").is_dir()  # the payload is live
    with pytest.raises(
        TesseraInputError,
        match=r"crafted\.npz: array 'clf0__extra' cannot be read as plain numbers"
        r" \(.*\); model files hold numeric arrays only and are never unpickled",
    ):
        load_node(crafted, target="blobs")
    assert not (tmp_path / "ran").exists()


def test_too_few_tiles_for_the_folds_is_refused():
    spec = CascadeSpec(stages=1, levels=0, **{**SMALL, "folds": 3})
    tiles = make_tiles(spec, count=2)
    with pytest.raises(
        TesseraInputError,
        match=r"2 training tile\(s\) fall into folds \[0, 1\]; out-of-fold context needs tiles in "
        r"each of the 3 folds",
    ):
        fit_cascade(spec, tiles)


def test_single_class_training_is_refused():
    spec = CascadeSpec(stages=1, levels=0, **SMALL)
    radius = receptive_radius(spec)
    tiles = [
        prepare_tile(
            spec,
            f"b{i}",
            np.zeros((32 + 2 * radius,) * 2, np.float32),
            np.zeros((32, 32), np.uint8),
            fold=i % 2,
        )
        for i in range(2)
    ]
    with pytest.raises(TesseraInputError, match="training tiles hold only class 0 at level 0"):
        fit_cascade(spec, tiles)


def test_a_fold_whose_complement_holds_one_class_is_named_with_its_tiles():
    # the target lies in fold 0's tile only, so the model fitted without fold 0 would see
    # background alone: refused, naming the tiles it would have seen and the settings to change
    spec = CascadeSpec(stages=1, levels=0, **SMALL)
    radius = receptive_radius(spec)
    labels = [np.zeros((32, 32), np.uint8) for _ in range(3)]
    labels[0][8:24, 8:24] = 1
    tiles = [
        prepare_tile(spec, f"t{i}", np.zeros((32 + 2 * radius,) * 2, np.float32), lab, fold=i % 2)
        for i, lab in enumerate(labels)
    ]
    with pytest.raises(
        TesseraInputError,
        match=r"without fold 0 the training pixels hold one class only \(class 0 in tiles t1\); "
        r"out-of-fold context needs both classes outside every fold: raise tiles.per_dataset",
    ):
        fit_cascade(spec, tiles)


def test_bad_settings_are_named():
    with pytest.raises(TesseraInputError, match="stages must be an integer >= 1"):
        CascadeSpec(stages=0)
    with pytest.raises(TesseraInputError, match="classifier must be one of"):
        CascadeSpec(classifier="svm")
    with pytest.raises(TesseraInputError, match="pooling must be 'mean' or 'max'"):
        CascadeSpec(pooling="median")


def test_neighbouring_sections_join_the_features_and_blocks_stay_exact():
    spec = CascadeSpec(stages=1, levels=1, neighbours=1, **SMALL)
    radius = receptive_radius(spec)
    volume = np.stack([blobs(7)[0], blobs(8)[0], blobs(9)[0]])
    truth = np.stack([blobs(7)[1], blobs(8)[1], blobs(9)[1]])
    tiles = [
        prepare_tile(
            spec,
            f"z{z}",
            mirrored_stack(volume, z, 1, -radius, 96 + radius, -radius, 96 + radius),
            truth[z],
            fold=z % 2,
        )
        for z in range(3)
    ]
    models = fit_cascade(spec, tiles)
    assert any(name.startswith("L0:z-1_") for name in models[(1, 0)].meta["features"])
    for z in (0, 1):  # z = 0 reads a mirrored neighbour beyond the stack
        whole = predict_section(models, volume, z)
        window = mirrored_stack(volume, z, 1, 32 - radius, 64 + radius, 16 - radius, 48 + radius)
        np.testing.assert_allclose(
            predict_frame(models, window, (32, 32)), whole[32:64, 16:48], atol=1e-6
        )


SCHEMA = Path(__file__).resolve().parents[1] / "config" / "schemas" / "config.schema.yaml"


def _target_schema():
    schema = yaml.safe_load(SCHEMA.read_text(encoding="utf-8"))
    return schema["properties"]["targets"]["additionalProperties"]["properties"]


def test_config_schema_states_the_limits_the_code_enforces():
    # The configuration is checked against the JSON Schema before any job runs; the library checks
    # the same settings when a spec is made. Both must accept exactly the same values, or a
    # config passes validation and fails in the middle of a run (or the reverse).
    target = _target_schema()
    cascade = target["cascade"]["properties"]
    for name, (low, high) in LIMITS.items():
        if name in ("dims", "neighbours"):  # the schema adds auto, decided when a node is trained
            assert cascade[name]["enum"] == [*range(low, high + 1), "auto"]
            continue
        assert cascade[name]["type"] == "integer", name
        assert cascade[name]["minimum"] == low, name
        assert cascade[name].get("maximum") == high, name
    radius = cascade["stencil_radii"]["items"]
    assert (radius["minimum"], radius["maximum"]) == STENCIL_RADIUS_LIMITS
    for name in ("sigmas", "coarse_sigmas"):
        items = cascade[name]["items"]
        assert items["exclusiveMinimum"] == 0 and items["maximum"] == MAX_SIGMA, name
    assert cascade["classifier"]["enum"] == list(KINDS)
    assert cascade["pooling"]["enum"] == list(POOLINGS)
    assert cascade["orientations"]["enum"] == list(ORIENTATION_COUNTS)
    smoothing = target["output_smoothing_px"]
    assert (smoothing["minimum"], smoothing["maximum"]) == (0, MAX_OUTPUT_SIGMA)
    # the schema's defaults are the spec's defaults (the ladder's keys are no node setting;
    # tests/test_ladder.py checks them against tessera.ladder); voxel_aspect is unset in the
    # config (read from the data, tests/test_train_3d_job.py), the spec's 1.0 is used in 2D only;
    # dims is auto in the config, decided from the data (same test file); sigmas is unset in
    # both, and the spec takes the default of its dims
    defaults = CascadeSpec().to_dict()
    assert cascade["dims"]["default"] == "auto"
    assert cascade["sigmas"]["default"] is None
    assert CascadeSpec(dims=2).sigmas == DEFAULT_SIGMAS
    assert CascadeSpec(dims=3).sigmas == DEFAULT_SIGMAS_3D
    assert CascadeSpec(dims=3, sigmas=(1.0, 2.0)).sigmas == (1.0, 2.0)
    # the config's unset value reaches the job training a node as None
    assert spec_from_settings({"sigmas": None, "dims": 3}, stages=1).sigmas == DEFAULT_SIGMAS_3D
    for name, prop in cascade.items():
        if name not in LADDER_DEFAULTS and name not in (
            "voxel_aspect",
            "dims",
            "sigmas",
            "neighbours",
        ):
            assert prop["default"] == defaults[name], name
    assert cascade["voxel_aspect"]["default"] is None


@pytest.mark.parametrize(
    ("setting", "message"),
    [
        ({"levels": 6}, "levels must be an integer >= 0 and <= 5, got 6"),
        ({"stages": 9}, "stages must be an integer >= 1 and <= 8, got 9"),
        ({"folds": 21}, "folds must be an integer >= 2 and <= 20, got 21"),
        ({"seed": -1}, "seed must be an integer >= 0, got -1"),
        ({"stencil_radii": (1, 257)}, r"stencil_radii must be integers >= 1 and <= 256"),
        ({"sigmas": (1.0, 65.0)}, r"sigmas must be at most 64 px"),
        ({"context_sections": 5}, "context_sections must be an integer >= 0 and <= 4, got 5"),
    ],
)
def test_settings_beyond_the_limits_are_named(setting, message):
    with pytest.raises(TesseraInputError, match=message):
        CascadeSpec(**setting)


def tubes_and_specks(seed, sections=6, shape=(96, 96)):
    """Dark discs of two kinds that look alike within a section: 'tubes' run through every
    section (drifting a little), 'specks' lie in one section only. Labels: the tubes."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[: shape[0], : shape[1]]

    def disc(cy, cx, r):
        return (yy - cy) ** 2 + (xx - cx) ** 2 < r**2

    starts = [(rng.uniform(8, shape[0] - 8), rng.uniform(8, shape[1] - 8)) for _ in range(5)]
    images, truth = [], []
    for z in range(sections):
        tube = np.zeros(shape, bool)
        for cy, cx in starts:
            tube |= disc(cy + 0.7 * z, cx - 0.5 * z, 6)
        speck = np.zeros(shape, bool)
        for _ in range(5):
            speck |= disc(rng.uniform(0, shape[0]), rng.uniform(0, shape[1]), 6)
        speck &= ~tube
        image = 150 - 70 * (tube | speck) + rng.normal(0, 12, shape)
        images.append(np.clip(image, 0, 255).astype(np.float32))
        truth.append(tube.astype(np.uint8))
    return np.stack(images), np.stack(truth)


XSEC = dict(SMALL, stages=2, levels=0, samples_per_tile=800)


def _stack_tiles(spec, volume, truth, final=None):
    radius, sections = receptive_radius(spec, final), z_halo(spec, final)
    h, w = volume.shape[1:]
    return [
        prepare_tile(
            spec,
            f"z{z}",
            mirrored_stack(volume, z, sections, -radius, h + radius, -radius, w + radius),
            truth[z],
            fold=z % spec.folds,
            final=final,
        )
        for z in range(volume.shape[0])
    ]


@pytest.fixture(scope="module")
def xsec_cascades():
    volume, truth = tubes_and_specks(1)
    out = {}
    for k in (0, 1):
        spec = CascadeSpec(context_sections=k, **XSEC)
        out[k] = (spec, fit_cascade(spec, _stack_tiles(spec, volume, truth), target="tubes"))
    return out


def test_cross_section_context_tells_what_continues_from_what_does_not(xsec_cascades):
    # Within a section a tube and a speck look alike, so no in-section classifier can tell
    # them apart; the previous stage's maps of the sections above and below can (a tube is
    # there too, a speck is not). Scored by pixel F1 (scikit-learn) on a volume not trained on.
    volume, truth = tubes_and_specks(2)
    f1 = {}
    for k, (_, models) in xsec_cascades.items():
        prob = np.stack([predict_section(models, volume, z) for z in range(volume.shape[0])])
        f1[k] = _best_f1(truth.ravel(), prob.ravel())
    names = xsec_cascades[1][1][(2, 0)].meta["features"]
    assert any(n.startswith("ctx(s1,l0,z-1):") for n in names)
    assert any(n.startswith("ctx(s1,l0,z+1):") for n in names)
    assert f1[1] > f1[0] + 0.15, f1


def test_a_node_reads_the_maps_of_the_sections_around_its_own(xsec_cascades):
    # The stage-1 map a stage-2 node reads at offset d is the stage-1 prediction of section
    # z + d; beyond the first section the stack is mirrored (half-sample symmetric, as
    # numpy's 'symmetric' pad: section -1 is section 0), as the neighbours' intensity is.
    spec, models = xsec_cascades[1]
    stage1 = {n: m for n, m in models.items() if n[0] == 1}
    volume, _ = tubes_and_specks(3)
    radius = receptive_radius(spec)
    for z, expected in ((2, {-1: 1, 1: 3}), (0, {-1: 0, 1: 1})):
        window = mirrored_stack(volume, z, z_halo(spec), -radius, 96 + radius, -radius, 96 + radius)
        frame = make_frame(spec, window, (96, 96))
        ensure_maps(frame, (2, 0), models, -1)
        for d, section in expected.items():
            got = frame.section(d).maps[(1, 0)]
            prob, margin = got
            core = prob[margin : margin + 96, margin : margin + 96]
            np.testing.assert_allclose(core, predict_section(stage1, volume, section), atol=1e-6)


def test_first_stage_ignores_cross_section_context(xsec_cascades):
    # Stage 1 reads no earlier map, so its nodes are the same with context_sections on or off
    # (turning it on retrains only stages >= 2), though its tiles carry more sections.
    (_, off), (_, on) = xsec_cascades[0], xsec_cascades[1]
    a, b = off[(1, 0)].classifier.to_state()[0], on[(1, 0)].classifier.to_state()[0]
    assert a.keys() == b.keys() and all(np.array_equal(a[k], b[k]) for k in a)
    assert "context_sections" not in off[(2, 0)].meta["spec"]  # models of before stay the same
    assert on[(2, 0)].meta["spec"]["context_sections"] == 1


def test_a_window_without_the_sections_context_needs_is_refused(xsec_cascades):
    # Stage 2 with context_sections=1 needs the section and one on each side; a window of the
    # section alone (what the cascade without context reads) is refused, naming what it needs.
    spec, models = xsec_cascades[1]
    volume, _ = tubes_and_specks(3)
    radius = receptive_radius(spec)
    window = mirrored_stack(volume, 2, 0, -radius, 96 + radius, -radius, 96 + radius)
    with pytest.raises(TesseraInputError, match=r"image must have shape \(3, ") as error:
        predict_frame(models, window, (96, 96))
    assert "(sections z-1..z+1, core (96, 96)" in str(error.value)
    assert f"got (1, {96 + 2 * radius}, {96 + 2 * radius})" in str(error.value)


def test_neighbour_channels_are_planes_beside_the_sections_own_bank():
    # The frame's level-0 features with neighbours 1 hold, in order, the centre's filter bank
    # and each neighbour's lighter bank, the same values as concatenating the two banks along
    # the channel axis; each channel is one contiguous plane, so a node multiplies the planes
    # where they lie (numpy strides: channel stride = one plane, row stride = one row).
    spec = CascadeSpec(levels=0, neighbours=1, sigmas=(1.0, 2.0))
    rng = np.random.default_rng(0)
    radius = receptive_radius(spec)
    image = rng.normal(128, 20, (3, 20 + 2 * radius, 24 + 2 * radius)).astype(np.float32)
    frame = make_frame(spec, image, (20, 24))
    feats = frame.features(0, frame.margins[(1, 0)])
    h, w, channels = feats.shape
    extra = feature_halo(spec, 0)
    top = radius - frame.margins[(1, 0)] - extra
    window = image[:, top : top + h + 2 * extra, top : top + w + 2 * extra]
    crop = (slice(extra, -extra), slice(extra, -extra))
    expected = np.concatenate(
        [
            filter_bank(window[1], sigmas=spec.sigmas, mirror_edges=False, halo=extra),
            neighbour_features(window[0], sigmas=spec.sigmas)[crop],
            neighbour_features(window[2], sigmas=spec.sigmas)[crop],
        ],
        axis=-1,
    )
    assert np.array_equal(feats, expected)
    planes = np.moveaxis(feats, -1, 0)
    assert planes.strides == (4 * h * w, 4 * w, 4) and channels == expected.shape[-1]
