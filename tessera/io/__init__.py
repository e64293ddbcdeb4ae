"""File formats and safe writes (OME-Zarr, checksums, atomic replacement); no rules, paths or
config."""
