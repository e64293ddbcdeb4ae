"""The held-out tiles' probabilities, ``results/study/<target>/tiles_predicted/probabilities.npz``.

Rule predict_tiles writes them (one float32 array per tile id); rule evaluate reads them.
"""

import numpy as np

from tessera.errors import TesseraInputError
from tessera.io.atomic import atomic_path
from tessera.io.npz_archives import NPZ_READ_ERRORS


def write_tile_probabilities(path, probabilities):
    """Write tile id → probability map as float32 arrays of a compressed .npz (atomic)."""
    with atomic_path(path) as tmp:
        with open(tmp, "wb") as fh:
            np.savez_compressed(fh, **{k: v.astype(np.float32) for k, v in probabilities.items()})


def read_tile_probabilities(path):
    """Tile id → probability map, as written by :func:`write_tile_probabilities`."""
    try:
        with np.load(path, allow_pickle=False) as data:
            return {k: data[k] for k in data.files}
    except NPZ_READ_ERRORS as exc:
        raise TesseraInputError(f"cannot read the tile predictions: {exc}", source=path) from None
