"""The cascade's node models, ``results/study/<target>/cascade/stage<s>_level<l>.npz``.

Rule train_node writes them (:func:`tessera.cascade.api.save_node`); train_node (the ancestors
of a node), predict_tiles, shard_plan and predict_shard read them through :func:`load_cascade`.
"""

import zipfile

from tessera.cascade.api import load_node


def load_cascade(model_paths, *, target, spec=None):
    """Node → model of every file in `model_paths`, each checked against `target` (and `spec`).

    With `spec`, models made with other cascade settings are refused.
    """
    models = {}
    for path in model_paths:
        model = load_node(path, target=target, spec=spec)
        models[model.node] = model
    return models


def models_bytes(model_paths):
    """Bytes the node models take once loaded: the uncompressed size of their arrays."""
    total = 0
    for path in model_paths:
        with zipfile.ZipFile(path) as archive:
            total += sum(info.file_size for info in archive.infolist())
    return total
