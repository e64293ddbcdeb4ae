"""The probability map's own facts, ``results/<dataset>/predicted/<target>/probability.ome.zarr``.

Rule stitch writes them under the image's ``tessera`` attribute key (``probability``: target,
stored dtype, ``scale``, working-level factors, halo, smoothing, block, models); objects,
next_tiles and morphometry (through the objects image, which keeps the probability image's
metadata) read them. Stored values divided by ``scale`` are probabilities.
"""

import numpy as np

from tessera.io.omezarr import open_image
from tessera.probability_encoding import probability_scale


def probability_metadata(plan):
    """The ``tessera`` attributes of the probability map stitched from shard plan `plan`."""
    return {
        "probability": {
            "target": plan["target"],
            "dtype": plan["dtype"],
            "scale": probability_scale(plan["dtype"]),
            "meaning": "probability of the target = stored value / scale",
            "working_level_downsample": plan["downsample"],
            "z_factor": plan["factors"][0],
            "halo": plan["halo"],
            "output_smoothing_px": plan.get("output_sigma", 0.0),
            "output_smoothing_sections": plan.get("output_sigma_z", 0.0),
            "block": plan["block"],
            "models": plan["models"],
            # sections QC excluded, each predicted (and read by its neighbours) as the kept one
            "section_stand_ins": plan.get("section_stand_ins", []),
        }
    }


def probability_fields(info):
    """``scale``, ``z_factor`` and ``downsample`` (in-plane) from an opened image's `info`.

    Images without the record (written by hand) count as probabilities at full resolution.

    Examples
    --------
    >>> probability_fields({"extra": {"probability": {"scale": 255.0, "z_factor": 2}}})
    {'scale': 255.0, 'z_factor': 2, 'downsample': 1}
    """
    extra = info["extra"].get("probability", {})
    return {
        "scale": float(extra.get("scale", 1.0)),
        "z_factor": int(extra.get("z_factor", 1)),
        "downsample": int(extra.get("working_level_downsample", 1)),
    }


def open_probability_map(path):
    """(group, info, fields) of a stitched probability map (see :func:`probability_fields`)."""
    group, info = open_image(path)
    return group, info, probability_fields(info)


class StoredProbability:
    """A stored probability volume read section by section as float32 probabilities."""

    def __init__(self, array, scale):
        self.array, self.scale, self.shape = array, scale, array.shape

    def __getitem__(self, z):
        return np.asarray(self.array[z], dtype=np.float32) / np.float32(self.scale)
