"""The cascade as the rest of tessera uses it: specify, train a node, save and load models, the
receptive radius (halo), and predict a window, a section or a frame.

Stages and workflow jobs import from here, not from the cascade's inner modules, so the inside
can be rearranged without touching them.
"""

from tessera.cascade.model import (
    CascadeSpec,
    ancestors,
    cascade_spec,
    fit_cascade,
    frame_memory_bytes,
    load_node,
    mirrored_stack,
    mirrored_window,
    node_feature_names,
    node_inputs,
    nodes,
    out_of_fold_maps,
    predict_frame,
    predict_section,
    prepare_tile,
    receptive_radius,
    save_node,
    train_node,
)

__all__ = [
    "CascadeSpec",
    "ancestors",
    "cascade_spec",
    "fit_cascade",
    "frame_memory_bytes",
    "load_node",
    "mirrored_stack",
    "mirrored_window",
    "node_feature_names",
    "node_inputs",
    "nodes",
    "out_of_fold_maps",
    "predict_frame",
    "predict_section",
    "prepare_tile",
    "receptive_radius",
    "save_node",
    "train_node",
]
