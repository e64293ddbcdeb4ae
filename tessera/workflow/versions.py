"""Versions of tessera and the libraries its results depend on, for records and reports."""

from importlib import metadata

from tessera import __version__

#: The installed distributions whose versions every provenance record and report names.
PACKAGES = ("snakemake", "numpy", "scipy", "scikit-image", "scikit-learn", "zarr", "pandas")


def software_versions():
    """Versions of tessera and the main libraries (installed distributions).

    Examples
    --------
    >>> from tessera import __version__
    >>> software_versions()["tessera"] == __version__
    True
    """
    out = {"tessera": __version__}
    for name in PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    return out
