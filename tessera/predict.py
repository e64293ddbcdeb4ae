"""Sharded prediction of whole volumes and exact stitching into one probability map.

A volume at a target's working level is cut into *blocks* (cores that tile the volume without
overlap). Each block is predicted from a window that adds a halo of the cascade's receptive
radius around its core, mirrored beyond the volume, so a core's probabilities depend on nothing
outside its window. Block origins in y and x are multiples of 2^L (L = the cascade's levels), so
every coarse level of a block lies on the same grid as for the whole volume: stitched cores then
equal the prediction of the volume in one piece, whatever the block size.

Work is shared among a fixed number of *shard jobs* per dataset and target (a contiguous run of
blocks each), so the workflow's job count does not grow with the volume. Each job writes its
blocks as separate ``.npy`` files with a manifest of shapes and SHA-256 checksums; the stitch
step checks every block against the plan and the manifest before it copies it into the
OME-Zarr probability map, which it alone writes (one writer per zarr chunk).
"""

import json
import logging
import math
import zipfile
from pathlib import Path

import numpy as np
import zarr

from tessera.cascade.api import (
    cascade_spec,
    frame_memory_bytes,
    mirrored_stack,
    node_feature_names,
    nodes,
    predict_frame,
    receptive_radius,
)
from tessera.errors import TesseraInputError, TesseraResourceError
from tessera.io.atomic import atomic_path, write_text
from tessera.io.digests import file_sha256
from tessera.io.omezarr import AXES, multiscale_attrs, open_image, working_level
from tessera.io.store_checksums import record_checksums
from tessera.pyramid import downsample_level
from tessera.workflow.files.node_model import read_node

PLAN_FORMAT = 1
DTYPES = ("uint8", "float16", "float32")
# A shard job's interpreter with numpy, scipy, scikit-learn and zarr imported: about 150 MB
# resident on Linux (tests/test_predict.py measures it), rounded up.
BASELINE_MB = 200
_log = logging.getLogger(__name__)


def plan_shards(shape, *, block, halo, align, jobs, max_halo=None):
    """Cut a (Z, Y, X) volume into blocks and share them among `jobs` jobs.

    Parameters
    ----------
    shape : (int, int, int)
        Volume shape at the working level.
    block : (int, int, int)
        Core size per block, z y x. y and x are rounded up to multiples of `align`; blocks at
        the far edges are cut by the volume.
    halo : int
        In-plane halo (pixels of the working level) each block is read with: the model's
        receptive radius.
    align : int
        Block origins in y and x are multiples of this (2^L for an L-level cascade).
    jobs : int
        Number of shard jobs; each gets a contiguous run of blocks (possibly none).
    max_halo : int, optional
        Refuse a model whose halo is larger (it would make every block mostly halo).

    Returns
    -------
    dict
        ``shape``, ``block`` (as used), ``halo``, ``align``, ``blocks`` (list of
        ``[z0, z1, y0, y1, x0, x1]``) and ``jobs`` (list of lists of block indices).

    Examples
    --------
    >>> plan = plan_shards((3, 100, 60), block=(2, 64, 64), halo=16, align=4, jobs=2)
    >>> plan["blocks"]
    [[0, 2, 0, 64, 0, 60], [0, 2, 64, 100, 0, 60], [2, 3, 0, 64, 0, 60], [2, 3, 64, 100, 0, 60]]
    >>> plan["jobs"]
    [[0, 1], [2, 3]]
    """
    shape = tuple(int(s) for s in shape)
    if len(shape) != 3 or min(shape) < 1:
        raise TesseraInputError(f"volume shape must be 3 positive integers, got {shape}")
    block = [int(b) for b in block]
    if len(block) != 3 or min(block) < 1:
        raise TesseraInputError(f"predict.block must be 3 positive integers (z, y, x), got {block}")
    if not isinstance(jobs, int) or jobs < 1:
        raise TesseraInputError(f"predict.shard_jobs must be an integer >= 1, got {jobs!r}")
    if max_halo is not None and halo > max_halo:
        raise TesseraInputError(
            f"the model's receptive field needs a halo of {halo} px, more than predict.max_halo = {max_halo}; "
            "use fewer levels, smaller sigmas or stencil radii, or raise predict.max_halo"
        )
    if min(block[1:]) < halo:
        raise TesseraInputError(
            f"predict.block {block} is smaller in y or x than the model's halo of {halo} px: every block would "
            f"read more halo than core; use blocks of at least {halo} px (a few times more is efficient)"
        )
    block[1:] = [-(-b // align) * align for b in block[1:]]
    blocks = []
    for z0 in range(0, shape[0], block[0]):
        for y0 in range(0, shape[1], block[1]):
            for x0 in range(0, shape[2], block[2]):
                blocks.append(
                    [
                        z0,
                        min(z0 + block[0], shape[0]),
                        y0,
                        min(y0 + block[1], shape[1]),
                        x0,
                        min(x0 + block[2], shape[2]),
                    ]
                )
    n = len(blocks)
    shares = [list(range(j * n // jobs, (j + 1) * n // jobs)) for j in range(jobs)]
    return {
        "format": PLAN_FORMAT,
        "shape": list(shape),
        "block": block,
        "halo": int(halo),
        "align": int(align),
        "blocks": blocks,
        "jobs": shares,
    }


def predict_block(models, volume, box, *, halo=None, output_sigma=0.0):
    """Float32 probabilities of the core `box` = (z0, z1, y0, y1, x0, x1) of a (Z, Y, X) volume.

    Each section is read with a halo of the receptive radius (mirrored beyond the volume) and
    predicted with :func:`tessera.cascade.model.predict_frame`; `volume` may be a zarr array.
    """
    spec = cascade_spec(models)
    halo = receptive_radius(spec, output_sigma=output_sigma) if halo is None else halo
    z0, z1, y0, y1, x0, x1 = (int(v) for v in box)
    out = np.empty((z1 - z0, y1 - y0, x1 - x0), dtype=np.float32)
    for z in range(z0, z1):
        window = mirrored_stack(
            volume, z, spec.neighbours, y0 - halo, y1 + halo, x0 - halo, x1 + halo
        )
        out[z - z0] = predict_frame(models, window, (y1 - y0, x1 - x0), output_sigma=output_sigma)
    return out


def encode_probability(prob, dtype):
    """Store probabilities as uint8 (round(255 p)), float16 or float32.

    Examples
    --------
    >>> encode_probability(np.array([0.0, 0.5, 1.0], np.float32), "uint8")
    array([  0, 128, 255], dtype=uint8)
    """
    if dtype not in DTYPES:
        raise TesseraInputError(f"predict.dtype must be one of {', '.join(DTYPES)}, got {dtype!r}")
    prob = np.asarray(prob, dtype=np.float32)
    if dtype == "uint8":
        return np.rint(np.clip(prob, 0.0, 1.0) * 255.0).astype(np.uint8)
    return prob.astype(dtype)


def probability_scale(dtype):
    """Divide stored values by this to get probabilities (255 for uint8, else 1)."""
    return 255.0 if dtype == "uint8" else 1.0


def load_cascade(model_paths, *, target):
    """Load every node model of a cascade (each checked against `target`)."""
    models = {}
    for path in model_paths:
        model = read_node(path, target=target)
        models[model.node] = model
    return models


def read_plan(path):
    """Read a shard plan written by :func:`plan_job`, checking its format."""
    try:
        plan = json.loads(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise TesseraInputError(
            "shard plan not found (rule shard_plan writes it)", source=path
        ) from None
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise TesseraInputError(f"shard plan is damaged: {exc}", source=path) from None
    if not isinstance(plan, dict) or plan.get("format") != PLAN_FORMAT:
        raise TesseraInputError(f"not a shard plan of format {PLAN_FORMAT}", source=path)
    return plan


def _working_array(pyramid, downsample):
    _, info = open_image(pyramid)
    level = working_level(info["factors"], downsample, source=pyramid)
    spacing = tuple(s * f for s, f in zip(info["spacing"], info["factors"][level]))
    return info["levels"][level], spacing, info["factors"][level]


def plan_job(
    pyramid,
    model_paths,
    out_plan,
    *,
    target,
    downsample,
    block,
    shard_jobs,
    max_halo,
    dtype,
    output_sigma=0.0,
):
    """Write the shard plan of one dataset and target (a recorded artifact)."""
    models = load_cascade(model_paths, target=target)
    spec = cascade_spec(models)
    array, spacing, factors = _working_array(pyramid, downsample)
    plan = plan_shards(
        array.shape,
        block=block,
        halo=receptive_radius(spec, output_sigma=output_sigma),
        align=spec.align,
        jobs=shard_jobs,
        max_halo=max_halo,
    )
    encode_probability(np.zeros(1, np.float32), dtype)  # validates the dtype before any job runs
    plan.update(
        {
            "target": target,
            "downsample": downsample,
            "output_sigma": output_sigma,
            "spacing": list(spacing),
            "factors": list(factors),
            "dtype": dtype,
            "models": {Path(p).name: file_sha256(p) for p in sorted(model_paths)},
        }
    )
    write_text(out_plan, json.dumps(plan, indent=1) + "\n")
    return {"blocks": len(plan["blocks"]), "halo": plan["halo"], "block": plan["block"]}


def _block_name(index):
    return f"block_{index:07d}.npy"


def _models_bytes(model_paths):
    """Bytes the node models take once loaded: the uncompressed size of their arrays."""
    total = 0
    for path in model_paths:
        with zipfile.ZipFile(path) as archive:
            total += sum(info.file_size for info in archive.infolist())
    return total


def shard_memory_mb(plan, job, spec, model_paths):
    """Memory (MB) shard job `job` needs: interpreter, models, and its largest block in flight.

    A block is predicted section by section; one section's frame (core + halo) is estimated by
    :func:`tessera.cascade.model.frame_memory_bytes` from the block's shape, the halo and the
    feature count of each node. The block's float32 probabilities and their encoding, and the
    raw windows read from the image, come on top.

    Examples
    --------
    >>> from tessera.cascade.api import CascadeSpec
    >>> spec = CascadeSpec(stages=1, levels=0, sigmas=(1.0,))
    >>> plan = plan_shards((4, 500, 500), block=(2, 250, 250), halo=receptive_radius(spec), align=1, jobs=1)
    >>> plan["dtype"] = "uint8"
    >>> BASELINE_MB < shard_memory_mb(plan, 0, spec, []) < BASELINE_MB + 100
    True
    """
    output_sigma = plan.get("output_sigma", 0.0)
    halo = plan["halo"]
    sections = 2 * spec.neighbours + 1
    itemsize = np.dtype(plan["dtype"]).itemsize
    shapes = {
        (b[1] - b[0], b[3] - b[2], b[5] - b[4])
        for b in (plan["blocks"][i] for i in plan["jobs"][job])
    }
    worst = 0
    for z, y, x in shapes:
        window = 3 * sections * (y + 2 * halo) * (x + 2 * halo)  # uint8 read, mirrored copy, stack
        block = (
            z * y * x * (4 * 4 + itemsize)
        )  # probabilities, clip/scale/round temporaries, encoded
        worst = max(
            worst, frame_memory_bytes(spec, (y, x), output_sigma=output_sigma) + window + block
        )
    return BASELINE_MB + math.ceil((_models_bytes(model_paths) + worst) / 1e6)


def _check_memory(plan, job, spec, model_paths, mem_mb, *, source):
    """Refuse to start a shard job whose ``mem_mb`` is below what its largest block needs."""
    needed = shard_memory_mb(plan, job, spec, model_paths)
    if mem_mb >= needed:
        return needed
    from tessera.workflow.resources import more_memory_hint

    blocks = [plan["blocks"][i] for i in plan["jobs"][job]]
    largest = max(blocks, key=lambda b: (b[3] - b[2]) * (b[5] - b[4]) * (b[1] - b[0]))
    shape = [largest[1] - largest[0], largest[3] - largest[2], largest[5] - largest[4]]
    features = max(len(node_feature_names(spec, *n)) for n in nodes(spec))
    raise TesseraResourceError(
        f"shard job {job} needs about {needed} MB of memory (blocks of {shape} voxels read with a halo of "
        f"{plan['halo']} px, up to {features} features per pixel), but rule predict_shard was given "
        f"mem_mb={mem_mb}; {more_memory_hint('predict_shard', suggest_mb=needed)}, or make predict.block smaller",
        source=source,
    )


def predict_shard_job(plan_path, pyramid, model_paths, out_dir, *, job, target, mem_mb=None):
    """Predict the blocks of shard job `job` and write them with a checksummed manifest.

    The output folder holds one ``.npy`` per block and ``manifest.json``; it appears only when
    every block is written (atomic rename), so a killed job leaves no output. With `mem_mb` (the
    memory the job was given, MB), a job that would need clearly more stops before it starts
    (see :func:`shard_memory_mb`) instead of being killed by the scheduler part-way.
    """
    plan = read_plan(plan_path)
    if not 0 <= job < len(plan["jobs"]):
        raise TesseraInputError(
            f"job {job} is not in the plan (it has {len(plan['jobs'])} jobs)", source=plan_path
        )
    models = load_cascade(model_paths, target=target)
    spec = cascade_spec(models)
    output_sigma = plan.get("output_sigma", 0.0)
    halo = receptive_radius(spec, output_sigma=output_sigma)
    if halo != plan["halo"] or spec.align != plan["align"]:
        raise TesseraInputError(
            "the plan was made for another cascade (halo or alignment differ); rerun shard_plan",
            source=plan_path,
        )
    array, _, _ = _working_array(pyramid, plan["downsample"])
    if list(array.shape) != plan["shape"]:
        raise TesseraInputError(
            f"the plan is for a volume of shape {plan['shape']}, the image has {list(array.shape)}",
            source=plan_path,
        )
    if mem_mb is not None and plan["jobs"][job]:
        _log.info(
            "memory: about %d MB needed, mem_mb=%d given",
            _check_memory(plan, job, spec, model_paths, mem_mb, source=plan_path),
            mem_mb,
        )
    entries = []
    with atomic_path(out_dir) as tmp:
        tmp.mkdir()
        for index in plan["jobs"][job]:
            box = plan["blocks"][index]
            prob = predict_block(models, array, box, halo=halo, output_sigma=output_sigma)
            values = encode_probability(prob, plan["dtype"])
            path = tmp / _block_name(index)
            np.save(path, values, allow_pickle=False)
            entries.append(
                {
                    "block": index,
                    "file": path.name,
                    "shape": list(values.shape),
                    "dtype": str(values.dtype),
                    "sha256": file_sha256(path),
                }
            )
            _log.info("block %d %s done", index, box)
        manifest = {"format": PLAN_FORMAT, "job": job, "blocks": entries}
        (tmp / "manifest.json").write_text(json.dumps(manifest, indent=1) + "\n", encoding="utf-8")
    return {"job": job, "blocks": len(entries)}


def verified_blocks(plan, shard_dirs):
    """Yield (box, array) for every block of the plan, each checked against its manifest.

    Raises
    ------
    TesseraInputError
        A shard folder, manifest or block file that is missing, or a block whose checksum,
        shape or dtype is not what the plan and manifest say; the message names the file and
        the rule that rebuilds it.
    """
    if len(shard_dirs) != len(plan["jobs"]):
        raise TesseraInputError(
            f"expected {len(plan['jobs'])} shard outputs, got {len(shard_dirs)}"
        )
    manifests = []
    for job, folder in enumerate(shard_dirs):
        path = Path(folder) / "manifest.json"
        hint = f"rerun rule predict_shard for job {job}"
        try:
            manifest = json.loads(path.read_text(encoding="utf-8"))
            by_block = {e["block"]: e for e in manifest["blocks"]}
        except FileNotFoundError:
            raise TesseraInputError(f"shard manifest missing; {hint}", source=path) from None
        except (json.JSONDecodeError, UnicodeDecodeError, KeyError, TypeError) as exc:
            raise TesseraInputError(
                f"shard manifest damaged ({exc}); {hint}", source=path
            ) from None
        if manifest.get("job") != job or sorted(by_block) != sorted(plan["jobs"][job]):
            raise TesseraInputError(
                f"shard output is not job {job} of this plan; {hint}", source=path
            )
        manifests.append((Path(folder), by_block, hint))
    for folder, by_block, hint in manifests:
        for index in sorted(by_block):
            entry = by_block[index]
            box = plan["blocks"][index]
            path = folder / entry["file"]
            expected = [box[1] - box[0], box[3] - box[2], box[5] - box[4]]
            if not path.is_file():
                raise TesseraInputError(f"block file missing; {hint}", source=path)
            if file_sha256(path) != entry["sha256"]:
                raise TesseraInputError(
                    f"block file does not match its recorded checksum (truncated or altered); {hint}",
                    source=path,
                )
            try:
                values = np.load(path, allow_pickle=False)
            except (ValueError, OSError, EOFError) as exc:
                raise TesseraInputError(
                    f"block file unreadable ({exc}); {hint}", source=path
                ) from None
            if list(values.shape) != expected or str(values.dtype) != plan["dtype"]:
                raise TesseraInputError(
                    f"block holds {values.dtype} {list(values.shape)}, the plan expects {plan['dtype']} {expected}; {hint}",
                    source=path,
                )
            yield box, values


def stitch_job(plan_path, shard_dirs, out_path, *, viewing_levels=2, chunks=(1, 512, 512)):
    """Assemble the shard outputs into a multiscale OME-Zarr probability map.

    Level 0 has the working level's shape and spacing; `viewing_levels` 2x block-mean levels
    follow for viewers. The store is written under a temporary name and appears only when every
    block has been verified and copied.
    """
    plan = read_plan(plan_path)
    shape = tuple(plan["shape"])
    factors = [(1, 1, 1)] + [(1, 2**k, 2**k) for k in range(1, viewing_levels + 1)]
    with atomic_path(out_path) as tmp:
        root = zarr.open_group(store=str(tmp), mode="w", zarr_format=3)
        root.attrs.update(
            {
                "ome": multiscale_attrs(
                    name=f"{plan['target']} probability", spacing=plan["spacing"], factors=factors
                ),
                "tessera": {
                    "probability": {
                        "target": plan["target"],
                        "dtype": plan["dtype"],
                        "scale": probability_scale(plan["dtype"]),
                        "meaning": "probability of the target = stored value / scale",
                        "working_level_downsample": plan["downsample"],
                        "z_factor": plan["factors"][0],
                        "halo": plan["halo"],
                        "output_smoothing_px": plan.get("output_sigma", 0.0),
                        "block": plan["block"],
                        "models": plan["models"],
                    }
                },
            }
        )
        level0 = root.create_array(
            name="0",
            shape=shape,
            dtype=plan["dtype"],
            chunks=tuple(min(c, s) for c, s in zip(chunks, shape)),
            dimension_names=AXES,
        )
        written = 0
        for box, values in verified_blocks(plan, shard_dirs):
            level0[box[0] : box[1], box[2] : box[3], box[4] : box[5]] = values
            written += values.size
        if written != int(np.prod(shape)):
            raise TesseraInputError(
                f"the shards cover {written} of {int(np.prod(shape))} voxels", source=plan_path
            )
        previous = level0
        for k in range(1, viewing_levels + 1):
            level_shape = tuple(-(-s // f) for s, f in zip(shape, factors[k]))
            current = root.create_array(
                name=str(k),
                shape=level_shape,
                dtype=plan["dtype"],
                chunks=tuple(min(c, s) for c, s in zip(chunks, level_shape)),
                dimension_names=AXES,
            )
            downsample_level(previous, current, factors=(1, 2, 2))
            previous = current
        record_checksums(tmp)
    return {"shape": list(shape), "dtype": plan["dtype"], "blocks": len(plan["blocks"])}
