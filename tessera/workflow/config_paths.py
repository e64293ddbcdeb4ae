"""The files and folders the config names: held to the data roots, and present.

Label volumes, instance volumes, points sheets and painted-mask folders are named in the config,
often as templates filled in per dataset. They are checked when the workflow loads, so a path
outside the allowed data roots or a missing volume is named with its config key before any job
runs; which datasets have an instance volume is decided here once (:func:`instance_volumes`).
"""

from pathlib import Path

from tessera.errors import TesseraInputError
from tessera.workflow.config import allowed_roots, check_inside_roots


def config_paths(config, dataset_ids):
    """Every file or folder path the config names besides the sheet, with its key.

    ``annotations.labels`` and ``instances`` templates are filled in for every dataset id, so a per-dataset link
    that leads elsewhere is seen.

    Examples
    --------
    >>> cfg = {"targets": {"mito": {"annotations": {"labels": "truth/{dataset}.tif"}},
    ...                    "er": {"annotations": {"painted": {"points": "p.tsv", "masks": "m"}}}}}
    >>> config_paths(cfg, ["a1"])
    [('targets.mito.annotations.labels', 'truth/a1.tif'), ('targets.er.annotations.painted.points', 'p.tsv'), ('targets.er.annotations.painted.masks', 'm')]
    """
    out = []
    for name, target in (config.get("targets") or {}).items():
        annotations = target.get("annotations") or {}
        key = f"targets.{name}.annotations"
        for field in ("labels", "instances"):
            if field in annotations:
                template = annotations[field]
                out += [(f"{key}.{field}", template.format(dataset=d)) for d in dataset_ids]
        for field in ("points", "masks"):
            if field in (annotations.get("painted") or {}):
                out.append((f"{key}.painted.{field}", annotations["painted"][field]))
    return out


def check_config_paths(config, dataset_ids, *, base_dir=".", source="config/config.yaml"):
    """Refuse a path key of the config that leads outside the allowed data roots.

    The roots are those of the sheet's cells (:func:`allowed_roots`); the sheet itself is held
    to them by :func:`load_datasets`. Paths need not exist yet (label volumes of the demo are
    rendered by the workflow).

    Parameters
    ----------
    config : dict
        The validated config (``datasets``, ``data_roots``, ``targets``).
    dataset_ids : sequence of str
        The sheet's datasets, filled into ``{dataset}`` templates.
    base_dir : str or Path, optional
        The project folder relative paths start from.
    source : str, optional
        The config file, named in the error.
    """
    roots = allowed_roots(
        Path(base_dir) / config["datasets"],
        base_dir=base_dir,
        data_roots=config.get("data_roots", ()),
    )
    for key, value in config_paths(config, dataset_ids):
        check_inside_roots(value, base_dir, roots, source=f"{source}, key {key}")


def _annotation_file(value, base, generated):
    """'file' (present, or made by the workflow), 'folder' or 'missing'."""
    full = (base / value).resolve()
    if generated is not None and full.is_relative_to(generated):
        return "file"
    if full.is_file():
        return "file"
    return "folder" if full.is_dir() else "missing"


def _generated(base_dir, generated_dir):
    return None if generated_dir is None else (Path(base_dir) / generated_dir).resolve()


def instance_volumes(template, dataset_ids, *, base_dir=".", generated_dir=None):
    """The instance volume of each dataset that has one: the template filled in, where a file.

    Datasets without one are scored against the connected components of their labels, so an
    ``annotations.instances`` template need not name a file for every dataset.

    Parameters
    ----------
    template : str or None
        The ``annotations.instances`` path template (``{dataset}`` for the id); None = none given.
    dataset_ids : sequence of str
        The datasets the target is annotated on.
    base_dir : str or Path, optional
        The project folder relative paths start from.
    generated_dir : str or Path, optional
        Paths under this folder are made by the workflow (the demo study) and count as present.

    Returns
    -------
    dict
        Dataset id → the instance volume's path as the template gives it, in ``dataset_ids``
        order; datasets without a file are left out.

    Examples
    --------
    >>> import tempfile
    >>> folder = Path(tempfile.mkdtemp())
    >>> _ = (folder / "b2_ids.tif").write_bytes(b"")
    >>> instance_volumes("{dataset}_ids.tif", ["a1", "b2"], base_dir=folder)
    {'b2': 'b2_ids.tif'}
    >>> instance_volumes(None, ["a1", "b2"], base_dir=folder)
    {}
    """
    if template is None:
        return {}
    base, generated = Path(base_dir), _generated(base_dir, generated_dir)
    paths = {d: template.format(dataset=d) for d in dataset_ids}
    return {d: p for d, p in paths.items() if _annotation_file(p, base, generated) == "file"}


def check_annotation_files(
    config, dataset_ids, *, base_dir=".", generated_dir=None, source="config/config.yaml"
):
    """Refuse a label volume missing for a dataset that a target is annotated on, and an
    instance template that names no file for any of them.

    Checked when the config loads, so a missing volume is named with its config key before any
    job runs, instead of Snakemake's missing-input report once the plan is made. Instance
    volumes are optional per dataset (:func:`instance_volumes`); one found for no dataset at
    all is taken for a wrong path. A path that is a folder is refused for either.

    Parameters
    ----------
    config : dict
        The validated config (``targets`` with ``annotations`` and ``annotated_datasets``).
    dataset_ids : sequence of str
        The sheet's datasets; a target's ``annotated_datasets`` (None = all) picks among them.
    base_dir : str or Path, optional
        The project folder relative paths start from.
    generated_dir : str or Path, optional
        Paths under this folder are made by the workflow (the demo study) and need not exist.
    source : str, optional
        The config file, named in the error.
    """
    base, generated = Path(base_dir), _generated(base_dir, generated_dir)
    for name, target in (config.get("targets") or {}).items():
        annotations = target.get("annotations") or {}
        chosen = target.get("annotated_datasets")
        datasets = [d for d in dataset_ids if chosen is None or d in chosen]
        for field in ("labels", "instances"):
            if field not in annotations or not datasets:
                continue
            where = f"{source}, key targets.{name}.annotations.{field}"
            template = annotations[field]
            kinds = {
                d: _annotation_file(template.format(dataset=d), base, generated) for d in datasets
            }
            if field == "labels":
                _check_label_files(name, template, kinds, where)
            else:
                _check_instance_files(template, kinds, where)


def _check_label_files(name, template, kinds, where):
    """Every dataset the target is annotated on needs its label volume."""
    missing = [d for d, kind in kinds.items() if kind != "file"]
    if missing:
        found = "is a folder" if kinds[missing[0]] == "folder" else "not found"
        raise TesseraInputError(
            f"{template.format(dataset=missing[0])!r} (dataset {missing[0]}) {found}; expected "
            "a multi-page TIFF for every dataset the target is annotated on (or name the others "
            f"in targets.{name}.annotated_datasets)",
            source=where,
        )


def _check_instance_files(template, kinds, where):
    """An instance template may miss some datasets, not all; it may never name a folder."""
    folders = [d for d, kind in kinds.items() if kind == "folder"]
    if folders:
        raise TesseraInputError(
            f"{template.format(dataset=folders[0])!r} (dataset {folders[0]}) is a folder; "
            "expected a multi-page TIFF of instances, or nothing at that path for a dataset "
            "scored against the connected components of its labels",
            source=where,
        )
    if "file" not in kinds.values():
        first = next(iter(kinds))
        raise TesseraInputError(
            f"{template!r} names no file for any dataset the target is annotated on "
            f"({template.format(dataset=first)!r}, dataset {first}, not found); expected a "
            "multi-page TIFF for one dataset at least (those without one are scored against "
            "the 26-connected components of their labels)",
            source=where,
        )
