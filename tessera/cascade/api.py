"""The cascade as the rest of tessera uses it: specify (and convert settings to and from a
spec), train a node, save and load models, the
receptive radius (halo), and predict a window, a section or a frame.

Stages and workflow jobs import from here, not from the cascade's inner modules, so the inside
can be rearranged without touching them.
"""

from tessera.cascade.across_sections import mix_sections, section_sigma, sections_reach
from tessera.cascade.fit import fit_cascade, lazy_tile, out_of_fold_maps, prepare_tile, train_node
from tessera.cascade.frame import node_feature_names
from tessera.cascade.geometry import receptive_radius, volume_room, z_halo
from tessera.cascade.mirror import mirrored_block, mirrored_stack, mirrored_window
from tessera.cascade.predict import (
    cascade_spec,
    frame_memory_bytes,
    predict_frame,
    predict_frames,
    predict_section,
)
from tessera.cascade.spec import (
    CascadeSpec,
    ancestors,
    automatic_dims,
    automatic_neighbours,
    node_inputs,
    node_settings,
    nodes,
    spec_from_settings,
)
from tessera.cascade.store import load_node, save_node

__all__ = [
    "CascadeSpec",
    "ancestors",
    "automatic_dims",
    "automatic_neighbours",
    "cascade_spec",
    "fit_cascade",
    "frame_memory_bytes",
    "lazy_tile",
    "load_node",
    "mirrored_block",
    "mirrored_stack",
    "mirrored_window",
    "mix_sections",
    "node_feature_names",
    "node_inputs",
    "node_settings",
    "nodes",
    "out_of_fold_maps",
    "predict_frame",
    "predict_frames",
    "predict_section",
    "prepare_tile",
    "receptive_radius",
    "save_node",
    "section_sigma",
    "sections_reach",
    "spec_from_settings",
    "train_node",
    "volume_room",
    "z_halo",
]
