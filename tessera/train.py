"""Training stage of the workflow: tiles in, one cascade node (or tile predictions) out.

The workflow trains each (stage, level) node of a target's cascade as its own job
(:func:`train_node_job`), so the cascade is visible in the DAG and adding a stage trains only the
new nodes. Annotation tiles are read from the target's working pyramid level with a halo large
enough for the node's receptive field, mirrored beyond the volume.
"""

import numpy as np
import pandas as pd

from tessera.cascade.api import (
    ancestors,
    cascade_spec,
    mirrored_stack,
    predict_frame,
    prepare_tile,
    receptive_radius,
    spec_from_settings,
    train_node,
)
from tessera.errors import TesseraInputError
from tessera.io.atomic import atomic_path, write_table
from tessera.io.omezarr import open_image, working_level
from tessera.workflow.files.node_model import read_node, write_node
from tessera.workflow.files.tile_registry import read_annotation_set


def assign_folds(tiles, folds, seed):
    """Fold per training tile: contiguous runs of sections within each dataset.

    Neighbouring sections are highly correlated, so a tile's out-of-fold context must come from
    models that saw no nearby section either: each dataset's tiles are ordered by z and cut into
    `folds` contiguous runs. The seed only decides which run gets which fold number.

    Parameters
    ----------
    tiles : pandas.DataFrame
        Registry rows (``tile_id``, ``dataset``, ``z``).

    Returns
    -------
    dict
        tile_id → fold.

    Examples
    --------
    >>> t = pd.DataFrame({"tile_id": list("abcdef"), "dataset": ["d"] * 6, "z": [5, 0, 1, 4, 2, 3]})
    >>> f = assign_folds(t, 3, 0)
    >>> sorted("".join(sorted(k for k in f if f[k] == i)) for i in range(3))
    ['ad', 'bc', 'ef']
    """
    rng = np.random.default_rng(seed)
    out = {}
    for _, group in tiles.sort_values(["dataset", "z", "tile_id"]).groupby("dataset", sort=True):
        names = rng.permutation(folds)
        n = len(group)
        for rank, tile_id in enumerate(group["tile_id"]):
            out[tile_id] = int(names[rank * folds // n])
    return out


def tile_window(level_array, row, halo, neighbours):
    """A tile's image (sections z ± neighbours) with `halo` pixels around it, mirrored beyond the volume."""
    z, y0, x0 = int(row["z"]), int(row["y0"]), int(row["x0"])
    h, w = int(row["height"]), int(row["width"])
    return mirrored_stack(
        level_array, z, neighbours, y0 - halo, y0 + h + halo, x0 - halo, x0 + w + halo
    )


def level_arrays(pyramids, registry, *, downsample):
    """Dataset id → the working-level array of every dataset the registry names."""
    arrays = {}
    for dataset in sorted(set(registry["dataset"])):
        if dataset not in pyramids:
            raise TesseraInputError(
                f"tiles name dataset {dataset!r}, which has no image in this study"
            )
        _, info = open_image(pyramids[dataset])
        level = working_level(info["factors"], downsample, source=pyramids[dataset])
        arrays[dataset] = info["levels"][level]
    return arrays


def _training_tiles(spec, registry, labels, arrays, *, final, train_datasets=None):
    train = registry[registry["role"] == "train"]
    if train_datasets is not None:
        unknown = sorted(set(train_datasets) - set(registry["dataset"]))
        if unknown:
            raise TesseraInputError(
                f"train_datasets names dataset(s) {unknown} without annotated tiles"
            )
        train = train[train["dataset"].isin(list(train_datasets))]
    if train.empty:
        raise TesseraInputError(
            "the split has no training tiles; annotate more tiles or change split.fractions"
        )
    folds = assign_folds(train, spec.folds, spec.seed)
    halo = receptive_radius(spec, final)
    tiles = []
    for _, row in train.iterrows():
        image = tile_window(arrays[row["dataset"]], row, halo, spec.neighbours)
        tiles.append(
            prepare_tile(
                spec,
                row["tile_id"],
                image,
                labels[row["tile_id"]],
                fold=folds[row["tile_id"]],
                final=final,
            )
        )
    return tiles


def train_node_job(
    annotations,
    pyramids,
    upstream,
    out_path,
    *,
    target,
    downsample,
    cascade,
    stage,
    level,
    threads=1,
    train_datasets=None,
):
    """Train node (stage, level) of a target's cascade and save it.

    Parameters
    ----------
    annotations : path
        Split annotation set of the target (``role`` column).
    pyramids : dict
        Dataset id → multiscale OME-Zarr image.
    upstream : list of path
        Saved models of every ancestor node.
    out_path : path
        The model file to write (.npz, arrays and JSON only).
    target : str
    downsample : int
        The target's working level factor.
    cascade : dict
        Cascade settings (see :class:`CascadeSpec`); ``stages`` is replaced by `stage`.
    train_datasets : list of str, optional
        Train on the tiles of these datasets only (the others' test tiles then measure how the
        model transfers to other animals).
    """
    spec = spec_from_settings(cascade, stages=stage)
    node = (stage, level)
    registry, labels = read_annotation_set(annotations)
    arrays = level_arrays(pyramids, registry, downsample=downsample)
    models = {}
    for path in upstream:
        model = read_node(path, target=target, spec=spec)  # refuses models of other settings
        models[model.node] = model
    for a in ancestors(spec, node)[:-1]:
        if a not in models:
            raise TesseraInputError(
                f"node {node} needs the model of node {a}; it was not among the inputs"
            )
    tiles = _training_tiles(
        spec, registry, labels, arrays, final=node, train_datasets=train_datasets
    )
    model = train_node(spec, stage, level, tiles, models, target=target, threads=threads)
    write_node(model, out_path)  # atomic
    return {
        "node": list(node),
        "training_tiles": len(tiles),
        "training_pixels": model.meta["training_pixels"],
    }


def predict_tiles_job(
    annotations,
    pyramids,
    model_paths,
    out_probabilities,
    out_table,
    *,
    target,
    downsample,
    output_sigma=0.0,
):
    """Predict the validation and test tiles with the finished cascade; score them.

    The threshold is the one with the best F1 on the validation tiles; test scores use it.
    Writes every tile's probability map (``<tile_id>`` arrays in an .npz) and a TSV of pixel
    precision, recall, F1 and Jaccard per role.
    """
    registry, labels = read_annotation_set(annotations)
    models = {}
    for path in model_paths:
        model = read_node(path, target=target)
        models[model.node] = model
    spec = cascade_spec(models)
    arrays = level_arrays(pyramids, registry, downsample=downsample)
    halo = receptive_radius(spec, output_sigma=output_sigma)
    held = registry[registry["role"].isin(["validation", "test"])]
    probabilities = {}
    for _, row in held.iterrows():
        image = tile_window(arrays[row["dataset"]], row, halo, spec.neighbours)
        core = (int(row["height"]), int(row["width"]))
        probabilities[row["tile_id"]] = predict_frame(
            models, image, core, output_sigma=output_sigma
        )
    table = score_tiles(held, labels, probabilities)
    with atomic_path(out_probabilities) as tmp:
        with open(tmp, "wb") as fh:
            np.savez_compressed(fh, **{k: v.astype(np.float32) for k, v in probabilities.items()})
    write_table(out_table, table)
    return table.to_dict(orient="records")


def _pixel_scores(prob, truth, threshold):
    pred = prob >= threshold
    tp = float(np.sum(pred & (truth == 1)))
    fp = float(np.sum(pred & (truth == 0)))
    fn = float(np.sum(~pred & (truth == 1)))
    precision = tp / (tp + fp) if tp + fp else 0.0
    recall = tp / (tp + fn) if tp + fn else 0.0
    f1 = 2 * tp / (2 * tp + fp + fn) if tp + fp + fn else 0.0
    jaccard = tp / (tp + fp + fn) if tp + fp + fn else 0.0
    return {"precision": precision, "recall": recall, "f1": f1, "jaccard": jaccard}


def score_tiles(registry, labels, probabilities, *, thresholds=np.linspace(0.01, 0.99, 99)):
    """Pixel scores per role; the threshold is chosen by the best F1 on validation tiles.

    Pixels labelled 255 (ignore) are left out.
    """

    def pooled(role):
        ids = registry.loc[registry["role"] == role, "tile_id"]
        probs, truth = [], []
        for t in ids:
            keep = labels[t] != 255
            probs.append(probabilities[t][keep])
            truth.append(labels[t][keep])
        if not probs:
            return None, None
        return np.concatenate(probs), np.concatenate(truth)

    val_p, val_t = pooled("validation")
    if val_p is None:
        raise TesseraInputError("no validation tiles to choose the threshold on")
    best = max(thresholds, key=lambda t: _pixel_scores(val_p, val_t, t)["f1"])
    rows = []
    for role in ("validation", "test"):
        p, t = pooled(role)
        if p is not None:
            rows.append(
                {
                    "role": role,
                    "tiles": int((registry["role"] == role).sum()),
                    "threshold": float(best),
                    **_pixel_scores(p, t, best),
                }
            )
    return pd.DataFrame(rows)
