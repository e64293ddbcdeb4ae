"""Rules check_masks and import_tiles: every painted mask of a target checked first, then each
dataset's masks registered as an annotation set."""

import logging
from pathlib import Path

from tessera.errors import TesseraInputError
from tessera.io.digests import file_sha256
from tessera.io.omezarr import open_image
from tessera.workflow.files.masks_check import read_masks_check, write_masks_check
from tessera.workflow.files.painted_on import read_painted_on, write_painted_on
from tessera.workflow.files.qc_table import read_qc_table
from tessera.workflow.files.tile_registry import REGISTRY_FILE, read_registry, write_annotation_set
from tessera.workflow.files.to_paint import (
    exported_tile_sha256,
    import_painted,
    mask_files,
    unmatched_masks,
)

_log = logging.getLogger(__name__)

#: Tile ids a refusal lists before it says how many more there are.
_LISTED = 6


def _listed(names):
    shown = ", ".join(names[:_LISTED])
    return shown + (f" and {len(names) - _LISTED} more" if len(names) > _LISTED else "")


def _no_masks_yet(folders, masks_dir):
    return TesseraInputError(
        f"no painted masks yet: paint the tiles in {folders} (previews *.preview.png) and save "
        "one mask per tile as <tile_id>.png (0 = background, 1 or 255 = target) in the folder "
        "named by annotations.painted.masks",
        source=masks_dir,
    )


def _tiles_on_kept_sections(registry, pyramid, qc_table, *, dataset):
    """Refuse a tile on a section QC excluded: the model reads the nearest kept section in an
    excluded one's place (:mod:`tessera.section_qc.stand_ins`), in training and scoring alike,
    so the mask would be learnt against another section's image."""
    _, info = open_image(pyramid)
    depth = info["levels"][0].shape[0]
    qc = read_qc_table(qc_table)
    reasons = qc["reason"] if "reason" in qc.columns else [""] * len(qc)
    excluded = {int(z): r for z, r, e in zip(qc["z"], reasons, qc["excluded"], strict=True) if e}
    for row in registry.itertuples(index=False):
        fz = info["factors"][row.level][0]
        on = [z for z in range(row.z * fz, min((row.z + 1) * fz, depth)) if z in excluded]
        if not on:
            continue
        reasons = ", ".join(f"{z} ({excluded[z] or 'excluded'})" for z in on)
        remedy = "move the tile's point to a kept section (see the dataset's sections.png)"
        if any(excluded[z] != "missing" for z in on):
            remedy += ", or set qc.exclude_flagged: false in config/config.yaml"
        raise TesseraInputError(
            f"tile {row.tile_id!r} (dataset {dataset}) lies on section {reasons}, which section "
            "QC excluded: the model reads the nearest kept section in its place, so the mask "
            f"would be learnt against another section's image; {remedy}",
            source=qc_table,
        )


def _painted_on_other_pixels(found, exported, painted_on):
    """Refuse masks imported before whose tile's pixels have changed since, the mask unchanged:
    the stack was replaced or re-aligned after painting, and the mask no longer matches.
    `painted_on` maps each dataset to the path of its earlier import's record."""
    earlier = {d: read_painted_on(path) for d, path in painted_on.items()}
    moved = []
    for tile_id, entry in found.items():
        before = earlier.get(entry["dataset"], {}).get(tile_id)
        if before is None or before["mask_sha256"] != entry["sha256"]:
            continue  # a new tile, or a mask painted again
        if before["tile_sha256"] != exported_tile_sha256(exported[entry["dataset"]], tile_id):
            moved.append(tile_id)
    if moved:
        datasets = sorted({found[t]["dataset"] for t in moved})
        records = ", ".join(str(painted_on[d]) for d in datasets)
        raise TesseraInputError(
            f"the pixels of {len(moved)} painted tile(s) ({_listed(moved)}) changed since their "
            "masks were imported, the masks did not: the stack was replaced or re-aligned after "
            "painting, and the masks would label other pixels; expected masks painted on the "
            f"new tiles: paint them again, or delete {records} to accept them as they are",
            source=found[moved[0]]["file"],
        )


def check_masks_job(
    exported,
    masks_dir,
    pyramids,
    qc_tables,
    out_path,
    *,
    ignore_value=None,
    allow_single_class=False,
    painted_on=None,
):
    """Check every painted mask of one target, over all its datasets, before any is imported.

    Each exported tile must lie on sections QC kept and have one mask in `masks_dir`, and every
    mask is read and checked as :func:`tessera.workflow.files.to_paint.import_painted` reads it
    (its shape, values, colours). Tiles without a mask are listed together, over all datasets,
    with files that are no tile's mask (a mistyped name); such files are logged when every tile
    has its mask. The record (:mod:`tessera.workflow.files.masks_check`) lets rule import_tiles
    register exactly the masks checked. Because this is a job of its own, a mask painted wrongly
    after a run stops here and the earlier imported tiles of every dataset stay.

    Parameters
    ----------
    exported, pyramids, qc_tables : dict
        Dataset → its exported tiles (``to_paint/<target>``), pyramid and section QC table.
    masks_dir : path or None
        The folder of painted masks (``annotations.painted.masks``).
    ignore_value, allow_single_class
        As in :func:`tessera.workflow.files.to_paint.read_painted_mask`.
    painted_on : dict, optional
        Dataset → the painted-on record of its earlier import (rule import_tiles; absent before
        the first). A mask imported before whose tile's pixels have changed since is refused.
    """
    folders = ", ".join(str(exported[d]) for d in sorted(exported))
    if masks_dir is None or not Path(masks_dir).is_dir():
        raise _no_masks_yet(folders, masks_dir)
    masks_dir = Path(masks_dir)
    registries = {d: read_registry(Path(exported[d]) / REGISTRY_FILE) for d in sorted(exported)}
    for dataset, registry in registries.items():
        _tiles_on_kept_sections(registry, pyramids[dataset], qc_tables[dataset], dataset=dataset)
    tile_ids = [t for registry in registries.values() for t in registry["tile_id"]]
    missing = [t for t in tile_ids if not mask_files(masks_dir, t)]
    strays = unmatched_masks(masks_dir, tile_ids)
    if missing:
        hint = f"; files here that are no tile's mask: {_listed(strays)}" if strays else ""
        raise TesseraInputError(
            f"no mask yet for {len(missing)} of {len(tile_ids)} tiles ({_listed(missing)}): "
            f"paint the tiles in {folders} (previews *.preview.png) and save each mask here as "
            f"<tile_id>.png (0 = background, 1 or 255 = target){hint}",
            source=masks_dir,
        )
    if strays:
        _log.warning("files that are no tile's mask, not used: %s", ", ".join(strays))
    found = {}
    for dataset in registries:
        registry, _ = import_painted(
            exported[dataset],
            masks_dir,
            ignore_value=ignore_value,
            allow_single_class=allow_single_class,
        )
        for tile_id in registry["tile_id"]:
            (path,) = mask_files(masks_dir, tile_id)
            found[tile_id] = {"dataset": dataset, "file": path.name, "sha256": file_sha256(path)}
    _painted_on_other_pixels(
        {t: {**e, "file": str(masks_dir / e["file"])} for t, e in found.items()},
        exported,
        painted_on or {},
    )
    write_masks_check(out_path, found)
    return {"masks": len(found), "datasets": len(registries), "unmatched_files": strays}


def import_tiles_job(
    exported_dir,
    masks_dir,
    out_dir,
    *,
    check=None,
    ignore_value=None,
    allow_single_class=False,
    out_painted_on=None,
):
    """Read the painted masks of exported tiles and register them as an annotation set.

    With `check` (rule check_masks' record) every mask must still be the one checked. With
    `out_painted_on`, what each mask was paired with is recorded there
    (:mod:`tessera.workflow.files.painted_on`) for the next run's check.
    """
    if masks_dir is None or not Path(masks_dir).is_dir():
        raise _no_masks_yet(exported_dir, masks_dir)
    registry, labels = import_painted(
        exported_dir, masks_dir, ignore_value=ignore_value, allow_single_class=allow_single_class
    )
    # each mask's file and digest, read once for the check and the painted-on record
    masks = {t: mask_files(masks_dir, t)[0] for t in registry["tile_id"]}
    digests = {t: file_sha256(path) for t, path in masks.items()}
    if check is not None:
        checked = read_masks_check(check)
        for tile_id, path in masks.items():
            entry = checked.get(tile_id)
            if entry is None or entry["file"] != path.name or entry["sha256"] != digests[tile_id]:
                raise TesseraInputError(
                    f"mask {path.name} changed since it was checked; run the workflow again so "
                    "that rule check_masks checks it",
                    source=masks_dir,
                )
    write_annotation_set(out_dir, registry, labels)
    if out_painted_on is not None:
        pairs = {
            t: {"mask_sha256": digests[t], "tile_sha256": exported_tile_sha256(exported_dir, t)}
            for t in masks
        }
        write_painted_on(out_painted_on, pairs)
    return {"tiles": len(registry)}
