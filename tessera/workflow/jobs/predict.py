"""Jobs of rules shard_plan, predict_shard and stitch: plan the blocks of a whole volume, predict
a shard job's blocks, and stitch them into one OME-Zarr probability map.

The halo is derived once, in :func:`shard_plan_job` (:func:`tessera.predict.shard_halo`); the shard
jobs, their memory estimate and the stitched map's metadata read it from the plan.
"""

import logging
import math
from pathlib import Path

import numpy as np
import zarr

from tessera.cascade.api import (
    cascade_spec,
    frame_memory_bytes,
    node_feature_names,
    nodes,
    section_sigma,
)
from tessera.errors import TesseraInputError, TesseraResourceError
from tessera.io.atomic import atomic_path
from tessera.io.digests import file_sha256
from tessera.io.omezarr import AXES, level_origin, multiscale_attrs
from tessera.io.store_checksums import record_checksums
from tessera.predict import (
    block_read_bytes,
    halo_overhead,
    plan_fits_cascade,
    plan_shards,
    predict_block,
    shard_halo,
)
from tessera.probability_encoding import stored_dtype
from tessera.pyramid import downsample_level
from tessera.section_qc.stand_ins import through_stand_ins
from tessera.workflow.files.node_model import load_cascade, models_bytes
from tessera.workflow.files.probability_map import probability_metadata
from tessera.workflow.files.pyramid import aspects_agree, working_array, working_stand_ins
from tessera.workflow.files.shard_plan import read_plan, write_plan
from tessera.workflow.files.shards import verified_blocks, write_shard
from tessera.workflow.resources import keep_freed_memory, more_memory_hint

# A shard job's interpreter with numpy, scipy, scikit-learn and zarr imported: about 150 MB
# resident on Linux (tests/test_predict.py measures it), rounded up.
BASELINE_MB = 200
_log = logging.getLogger(__name__)


def shard_plan_job(
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
    output_smoothing_sections=0.0,
    qc_table=None,
):
    """Write the shard plan of one dataset and target (a recorded artifact).

    `output_smoothing_sections` (σ in sections, or ``auto``) is resolved for the cascade's dims
    (:func:`tessera.cascade.api.section_sigma`) and recorded as ``output_sigma_z``.

    With the dataset's section QC table, the plan records each excluded section with the kept
    section the shard jobs read in its place (``section_stand_ins``; training read the same).
    """
    models = load_cascade(model_paths, target=target)
    spec = cascade_spec(models)
    array, spacing, factors = working_array(pyramid, downsample)
    aspect = spacing[0] / spacing[1]
    if spec.dims == 3 and not aspects_agree(aspect, spec.voxel_aspect):
        raise TesseraInputError(
            f"{pyramid}: working-level voxel aspect (z / in-plane) {aspect:.3g}, but the 3D "
            f"model was trained at {spec.voxel_aspect:.3g}: its filters would have another "
            "shape along z; train on data of this voxel size"
        )
    plan = plan_shards(
        array.shape,
        block=block,
        halo=shard_halo(spec, output_sigma=output_sigma),
        align=spec.align,
        jobs=shard_jobs,
        max_halo=max_halo,
    )
    stored_dtype(dtype)  # refuses another dtype before any job runs
    plan.update(
        {
            "target": target,
            "downsample": downsample,
            "output_sigma": output_sigma,
            "output_sigma_z": section_sigma(output_smoothing_sections, dims=spec.dims),
            "spacing": list(spacing),
            "factors": list(factors),
            "dtype": dtype,
            "models": {Path(p).name: file_sha256(p) for p in sorted(model_paths)},
            "section_stand_ins": (
                [] if qc_table is None else working_stand_ins(qc_table, array, factors)
            ),
        }
    )
    write_plan(out_plan, plan)
    return {
        "blocks": len(plan["blocks"]),
        "halo": plan["halo"],
        "block": plan["block"],
        "window_px_per_voxel": round(halo_overhead(plan), 3),
    }


def shard_memory_mb(plan, job, spec, model_paths):
    """Memory (MB) shard job `job` needs: interpreter, models, and its largest block in flight.

    A block is predicted section by section; one section's frame (core + halo) is estimated by
    :func:`tessera.cascade.api.frame_memory_bytes` from the block's shape, the halo and the
    feature count of each node. The block's image, read once with its halo and z halo
    (:func:`tessera.predict.block_read_bytes`), its probabilities as stored and one section's
    float32 map being encoded come on top.

    Examples
    --------
    >>> from tessera.cascade.api import CascadeSpec
    >>> spec = CascadeSpec(stages=1, levels=0, sigmas=(1.0,))
    >>> plan = plan_shards((4, 500, 500), block=(2, 250, 250), halo=shard_halo(spec), align=1, jobs=1)
    >>> plan["dtype"] = "uint8"
    >>> BASELINE_MB < shard_memory_mb(plan, 0, spec, []) < BASELINE_MB + 100
    True
    """
    output_sigma = plan.get("output_sigma", 0.0)
    halo = plan["halo"]
    itemsize = stored_dtype(plan["dtype"]).itemsize
    shapes = {
        (b[1] - b[0], b[3] - b[2], b[5] - b[4])
        for b in (plan["blocks"][i] for i in plan["jobs"][job])
    }
    worst = 0
    for z, y, x in shapes:
        # the image is read as stored (uint8 after ingest)
        window = block_read_bytes(
            spec, (z, y, x), halo=halo, itemsize=1, output_sigma_z=plan.get("output_sigma_z", 0.0)
        )
        # the block as stored, and one section's float32 map with its clip/scale/round
        # temporaries (each section is encoded as soon as it is made)
        block = z * y * x * itemsize + y * x * 4 * 4
        worst = max(
            worst,
            frame_memory_bytes(spec, (y, x), output_sigma=output_sigma, itemsize=1)
            + window
            + block,
        )
    return BASELINE_MB + math.ceil((models_bytes(model_paths) + worst) / 1e6)


def _check_memory(plan, job, spec, model_paths, mem_mb, *, source):
    """Refuse to start a shard job whose ``mem_mb`` is below what its largest block needs."""
    needed = shard_memory_mb(plan, job, spec, model_paths)
    if mem_mb >= needed:
        return needed
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
    keep_freed_memory()  # arrays of every section and node reuse the freed memory
    plan = read_plan(plan_path)
    if not 0 <= job < len(plan["jobs"]):
        raise TesseraInputError(
            f"job {job} is not in the plan (it has {len(plan['jobs'])} jobs)", source=plan_path
        )
    models = load_cascade(model_paths, target=target)
    spec = cascade_spec(models)
    output_sigma = plan.get("output_sigma", 0.0)
    if not plan_fits_cascade(plan, spec):
        raise TesseraInputError(
            "the plan was made for another cascade (halo or alignment differ); rerun shard_plan",
            source=plan_path,
        )
    array, _, _ = working_array(pyramid, plan["downsample"])
    if list(array.shape) != plan["shape"]:
        raise TesseraInputError(
            f"the plan is for a volume of shape {plan['shape']}, the image has {list(array.shape)}",
            source=plan_path,
        )
    array = through_stand_ins(array, plan.get("section_stand_ins", []))
    if mem_mb is not None and plan["jobs"][job]:
        _log.info(
            "memory: about %d MB needed, mem_mb=%d given",
            _check_memory(plan, job, spec, model_paths, mem_mb, source=plan_path),
            mem_mb,
        )
    halo = plan["halo"]
    with write_shard(out_dir, job=job) as shard:
        for index in plan["jobs"][job]:
            box = plan["blocks"][index]
            stored = predict_block(
                models,
                array,
                box,
                halo=halo,
                output_sigma=output_sigma,
                output_sigma_z=plan.get("output_sigma_z", 0.0),
                dtype=plan["dtype"],
            )
            shard.add(index, stored)
            _log.info("block %d %s done", index, box)
    return {"job": job, "blocks": len(shard.entries)}


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
                    name=f"{plan['target']} probability",
                    spacing=plan["spacing"],
                    factors=factors,
                    origin=level_origin(plan["spacing"], plan["factors"]),
                ),
                "tessera": probability_metadata(plan),
            }
        )
        level0 = root.create_array(
            name="0",
            shape=shape,
            dtype=plan["dtype"],
            chunks=tuple(min(c, s) for c, s in zip(chunks, shape, strict=False)),
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
            level_shape = tuple(-(-s // f) for s, f in zip(shape, factors[k], strict=False))
            current = root.create_array(
                name=str(k),
                shape=level_shape,
                dtype=plan["dtype"],
                chunks=tuple(min(c, s) for c, s in zip(chunks, level_shape, strict=False)),
                dimension_names=AXES,
            )
            downsample_level(previous, current, factors=(1, 2, 2))
            previous = current
        record_checksums(tmp)
    return {"shape": list(shape), "dtype": plan["dtype"], "blocks": len(plan["blocks"])}
