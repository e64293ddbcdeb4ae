"""tessera: organelle segmentation and 3D morphometry for volume electron microscopy.

The package holds every computation of the workflow; the Snakemake rules only move files
between its functions. Modules follow the pipeline stages (ingest, qc, pyramid, ...) and import
only the stages before them plus the small shared helpers (errors, spacing, omezarr, atomic).
"""

__version__ = "0.1.0"
