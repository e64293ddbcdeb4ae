"""A node's model file, ``results/study/<target>/cascade/stage<s>_level<l>.npz`` (a ladder rung
with more levels than configured: ``cascade/levels<L>/stage<s>_level<l>.npz``): its one writer
(rule train_node) and its one reader (train_node for the upstream nodes, predict_tiles,
shard_plan, predict_shard, score_rung and methods)."""

import zipfile

from tessera.cascade.api import load_node, save_node

# The rule that writes model files, named in every message about one that cannot be used.
REBUILD_HINT = (
    "rerun rule train_node to rebuild it (delete the file, or snakemake --forcerun train_node)"
)


def write_node(model, path):
    """Write a trained node (atomically; see :func:`tessera.cascade.api.save_node`)."""
    save_node(model, path)


def read_node(path, *, target=None, spec=None, stage=None, level=None):
    """Read a node written by :func:`write_node`, refusing one made for something else.

    Messages about a damaged, altered or outdated file say which rule rebuilds it (see
    :func:`tessera.cascade.api.load_node` for the checks).
    """
    return load_node(path, target=target, spec=spec, stage=stage, level=level, hint=REBUILD_HINT)


def load_cascade(model_paths, *, target, spec=None):
    """Node → model of every file in `model_paths`, each read with :func:`read_node`.

    With `spec`, models made with other cascade settings are refused.
    """
    models = {}
    for path in model_paths:
        model = read_node(path, target=target, spec=spec)
        models[model.node] = model
    return models


def models_bytes(model_paths):
    """Bytes the node models take once loaded: the uncompressed size of their arrays."""
    total = 0
    for path in model_paths:
        with zipfile.ZipFile(path) as archive:
            total += sum(info.file_size for info in archive.infolist())
    return total
