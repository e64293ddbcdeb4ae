"""Writing one demo dataset: the stack, its truth and the painted annotation tiles.

The files are what a lab would hand over: a TIFF stack, the cell mask, true instance labels
per target, painted tile masks with their positions, and ``truth.json`` with the parameters,
defects and a summary, for checking every stage against the truth.
"""

import json
from pathlib import Path

import numpy as np
import tifffile
from PIL import Image

from tessera.errors import TesseraInputError
from tessera.io.atomic import atomic_path
from tessera.spacing import normalize_spacing
from tessera_demo.checks import check_int, check_shape
from tessera_demo.render import render_dataset
from tessera_demo.study import streams
from tessera_demo.tiles import TARGETS, choose_tiles

__all__ = ["write_dataset"]

# The generator's name recorded in truth.json. It names the module the generator lived in when
# the demo data were first rendered; it is kept so that every dataset stays byte for byte the
# same.
_GENERATOR = "tessera.demo"


def write_dataset(
    out_dir,
    *,
    dataset,
    condition,
    subject,
    seed,
    shape,
    spacing,
    mito_volume_scale=1.0,
    tile_size,
    tiles_per_target=6,
    heldout_per_target=3,
    defects=True,
):
    """Render one dataset and write it, with painted annotation tiles, into `out_dir`.

    Parameters
    ----------
    out_dir : str or Path
        Dataset directory; created, or replaced as a whole if it exists.
    dataset, condition, subject : str
        Names recorded in ``truth.json`` and ``tiles/points.tsv``.
    seed : int
        Seed of this dataset (see :func:`tessera_demo.study.dataset_seed`).
    shape, spacing, mito_volume_scale, defects
        As in :func:`tessera_demo.render.render_dataset`.
    tile_size : int
        Side of the square annotation tiles in pixels (the config's ``demo: tile_size``).
    tiles_per_target : int, optional
        Painted (training) tiles per target.
    heldout_per_target : int, optional
        Held-out tiles per target, every one at least 3 sections away from every painted tile
        of the same target.

    Notes
    -----
    Files written::

        raw.tif                      uint8, one page per section, zlib
        cells.tif                    uint16 cell labels (0 = membrane)
        truth/mitochondria.tif       uint16 instance labels (read as > 0 = target)
        truth/mitochondria_instances.tif  uint32 instance labels, 0 background, ids >= 1
        truth/nuclei.tif             uint16 instance labels
        truth.json                   parameters, defects, summary
        tiles/points.tsv             tile_id, dataset, target, z, y, x, size, set
        tiles/<target>/<tile_id>.png 0 background, 255 target

    A tile centred at (y, x) covers rows ``y - size//2`` to ``y - size//2 + size - 1`` (and
    likewise columns). Tiles avoid defect sections. Everything is written into a temporary
    sibling directory that is renamed to `out_dir` at the end, so a half-written dataset is
    never visible under `out_dir`.

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     write_dataset(Path(folder) / "tn1", dataset="tn1", condition="thermoneutral",
    ...                   subject="tn1", seed=1, shape=(8, 64, 64), spacing=(40.0, 8.0, 8.0),
    ...                   tile_size=32, tiles_per_target=1, heldout_per_target=0)
    ...     sorted(p.name for p in (Path(folder) / "tn1" / "tiles").iterdir())
    ['mitochondria', 'nuclei', 'points.tsv']
    """
    out_dir = Path(out_dir)
    _check_names(dataset=dataset, condition=condition, subject=subject)
    shape = check_shape(shape)
    spacing = normalize_spacing(spacing, 3)
    tile_size = check_int(tile_size, "tile_size", low=8)
    if tile_size > min(shape[1], shape[2]):
        raise TesseraInputError(
            f"tile_size must not exceed the section size {shape[1:]}, got {tile_size}"
        )
    n_painted = check_int(tiles_per_target, "tiles_per_target", low=1)
    n_heldout = check_int(heldout_per_target, "heldout_per_target", low=0)

    out = render_dataset(
        seed=seed,
        shape=shape,
        spacing=spacing,
        mito_volume_scale=mito_volume_scale,
        defects=defects,
    )
    bad = set(out["defects"]["blank"]) | set(out["defects"]["blurred"])
    tiles = choose_tiles(streams(seed)["tiles"], out, bad, dataset, tile_size, n_painted, n_heldout)

    with atomic_path(out_dir) as tmp:
        tmp.mkdir()
        _write_tiff(tmp / "raw.tif", out["raw"], spacing)
        _write_tiff(tmp / "cells.tif", out["cells"], spacing)
        (tmp / "truth").mkdir()
        for target in TARGETS:
            _write_tiff(tmp / "truth" / f"{target}.tif", out[target], spacing)
        # one id per mitochondrion, touching ones apart, in the dtype object labels have
        _write_tiff(
            tmp / "truth" / "mitochondria_instances.tif",
            out["mitochondria"].astype(np.uint32),
            spacing,
        )
        _write_tiles(tmp / "tiles", out, tiles, dataset, tile_size)
        truth = {
            "generator": _GENERATOR,
            "dataset": dataset,
            "condition": condition,
            "subject": subject,
            "seed": int(seed),
            "shape": [int(v) for v in shape],
            "spacing_nm": [float(v) for v in spacing],
            "axes": "zyx",
            "mito_volume_scale": float(mito_volume_scale),
            "tiles": {
                "size": tile_size,
                "painted_per_target": n_painted,
                "heldout_per_target": n_heldout,
                "min_heldout_distance_sections": 3,
            },
            "defects": out["defects"],
            "summary": out["summary"],
        }
        (tmp / "truth.json").write_text(
            json.dumps(truth, indent=2, sort_keys=True) + "\n", encoding="utf-8"
        )


def _check_names(**names):
    """Names become folder names and TSV fields: no slashes, tabs or newlines."""
    for key, value in names.items():
        if not isinstance(value, str) or not value or any(c in value for c in "/\\\t\n"):
            raise TesseraInputError(
                f"{key} must be a non-empty string without slashes, tabs or newlines, got {value!r}"
            )


def _write_tiles(folder, out, tiles, dataset, tile_size):
    """The painted masks (``<target>/<tile_id>.png``, 0 or 255) and ``points.tsv``."""
    for target in TARGETS:
        (folder / target).mkdir(parents=True)
    lines = ["\t".join(("tile_id", "dataset", "target", "z", "y", "x", "size", "set"))]
    half = tile_size // 2
    for t in tiles:
        z, y, x = t["z"], t["y"], t["x"]
        cut = out[t["target"]][z, y - half : y - half + tile_size, x - half : x - half + tile_size]
        mask = np.where(cut > 0, 255, 0).astype(np.uint8)
        Image.fromarray(mask).save(folder / t["target"] / f"{t['tile_id']}.png")
        lines.append(
            "\t".join(
                str(v) for v in (t["tile_id"], dataset, t["target"], z, y, x, tile_size, t["set"])
            )
        )
    (folder / "points.tsv").write_text("\n".join(lines) + "\n", encoding="utf-8")


def _write_tiff(path, array, spacing):
    tifffile.imwrite(
        path,
        array,
        photometric="minisblack",
        compression="zlib",
        metadata={"axes": "ZYX", "spacing_nm": [float(s) for s in spacing]},
    )
