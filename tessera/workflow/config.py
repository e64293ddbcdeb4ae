"""Validate the study config and the datasets sheet before anything runs.

Both are checked against the JSON Schemas in ``config/schemas/`` (strict: unknown keys are
errors, values have ranges), defaults from the schema are filled in, and every error is raised as
one line naming the file, the key or row and column, and what was expected.
"""

import csv
import json
import math
import string
from pathlib import Path

import jsonschema
import pandas as pd
import yaml

from tessera.errors import TesseraInputError
from tessera.io.text_tables import other_separator
from tessera.objects.depth_limit import AUTO_DEPTH_FLOOR_NM, split_depth_problem
from tessera.spacing import micrometre_hint

SHEET_NUMBER_COLUMNS = ("voxel_z_nm", "voxel_y_nm", "voxel_x_nm")


def read_yaml(path):
    """Load a YAML file safely (plain data only, never objects)."""
    path = Path(path)
    try:
        with open(path, encoding="utf-8") as fh:
            return yaml.safe_load(fh)
    except FileNotFoundError:
        raise TesseraInputError("file not found", source=path) from None
    except UnicodeDecodeError:
        raise TesseraInputError("not UTF-8 text; expected a YAML file", source=path) from None
    except yaml.YAMLError as exc:
        raise TesseraInputError(f"not valid YAML: {exc}".replace("\n", " "), source=path) from None


class _DuplicateKey(Exception):
    """A key given twice in one mapping of a YAML file."""


class _UniqueKeyLoader(yaml.SafeLoader):
    """The safe loader, refusing a key given twice in one mapping: YAML readers keep the last
    one silently, so a second ``predict:`` block would drop every key of the first."""

    def construct_mapping(self, node, deep=False):
        seen = {}
        for key_node, _ in node.value:
            key = self.construct_object(key_node, deep=deep)
            if not isinstance(key, (str, int, float, bool)) and key is not None:
                continue  # an unhashable key: the loader itself names it
            if key in seen:
                raise _DuplicateKey(
                    f"line {key_node.start_mark.line + 1}: key {key!r} is given twice in one "
                    f"mapping (first on line {seen[key] + 1}); YAML would keep only the last one"
                )
            seen[key] = key_node.start_mark.line
        return super().construct_mapping(node, deep=deep)


def check_config_file(path):
    r"""Refuse a config file that is not a YAML mapping, naming the line where it is not.

    Run before the workflow loads the file, whose own message names neither the file nor the
    line. A tab in the indentation (YAML indents with spaces only) is named as such.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "config.yaml"
    >>> _ = p.write_text("study:\n\tname: x\n")
    >>> check_config_file(p)  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    tessera.errors.TesseraInputError: .../config.yaml: line 2: a tab in the indentation; YAML indents with spaces only
    >>> _ = p.write_text("# nothing yet\n")
    >>> check_config_file(p)  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    tessera.errors.TesseraInputError: .../config.yaml: the file holds no settings; expected a mapping of keys such as datasets: and targets: (see the demo's config/config.yaml)
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise TesseraInputError("file not found", source=path) from None
    except UnicodeDecodeError:
        raise TesseraInputError("not UTF-8 text; expected a YAML file", source=path) from None
    try:
        data = yaml.load(text, Loader=_UniqueKeyLoader)  # noqa: S506 - a SafeLoader subclass
    except _DuplicateKey as exc:
        raise TesseraInputError(str(exc), source=path) from None
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f"line {mark.line + 1}: " if mark is not None else ""
        line = (
            text.splitlines()[mark.line]
            if mark is not None and mark.line < len(text.splitlines())
            else ""
        )
        if "\t" in line[: len(line) - len(line.lstrip())] or "found character '\\t'" in str(exc):
            why = "a tab in the indentation; YAML indents with spaces only"
        else:
            why = f"not valid YAML ({getattr(exc, 'problem', None) or exc})".replace("\n", " ")
        raise TesseraInputError(f"{where}{why}", source=path) from None
    if data is None:
        raise TesseraInputError(
            "the file holds no settings; expected a mapping of keys such as datasets: and "
            "targets: (see the demo's config/config.yaml)",
            source=path,
        )
    if not isinstance(data, dict):
        raise TesseraInputError(
            f"expected a mapping of settings at the top level, found a {type(data).__name__}",
            source=path,
        )


def _with_defaults(validator_class):
    # Fill "default" values of object properties while validating (jsonschema leaves this to
    # the caller). Defaults are filled before the object's own properties are checked.
    check_properties = validator_class.VALIDATORS["properties"]

    def properties(validator, props, instance, schema):
        if isinstance(instance, dict):
            for key, sub in props.items():
                if "default" in sub and key not in instance:
                    instance[key] = _copy(sub["default"])
        yield from check_properties(validator, props, instance, schema)

    return jsonschema.validators.extend(validator_class, {"properties": properties})


def _copy(value):
    return yaml.safe_load(yaml.safe_dump(value))


def _is_integer(checker, instance):
    # a whole number written as 1.0 passes JSON Schema's integer, but the jobs that use it
    # refuse it, after Snakemake has cleared their earlier outputs: refused here instead
    return isinstance(instance, int) and not isinstance(instance, bool)


def _is_number(checker, instance):
    # NaN passes every minimum and maximum (each comparison with it is false)
    if isinstance(instance, float) and math.isnan(instance):
        return False
    return isinstance(instance, (int, float)) and not isinstance(instance, bool)


_TYPES = jsonschema.Draft202012Validator.TYPE_CHECKER.redefine_many(
    {"integer": _is_integer, "number": _is_number}
)
_Validator = jsonschema.validators.extend(
    _with_defaults(jsonschema.Draft202012Validator), type_checker=_TYPES
)


def _expected_types(error):
    types = error.validator_value
    return [types] if isinstance(types, str) else list(types)


def _expected(error):
    return " or ".join(_TYPE_WORDS.get(t, t) for t in _expected_types(error))


_TYPE_WORDS = {"number": "a number", "integer": "a whole number", "null": "null", "string": "text"}


def _describe(error):
    if isinstance(error.schema, dict) and "x-message" in error.schema:
        return error.schema["x-message"]  # a schema's own wording for a rule between keys
    where = ".".join(str(p) for p in error.absolute_path) or "(top level)"
    if error.validator == "additionalProperties":
        return f"key {where}: {error.message} (check the spelling; allowed keys are in the schema)"
    if error.validator == "required":
        return f"key {where}: {error.message}"
    if error.validator == "type" and isinstance(error.instance, float):
        if math.isnan(error.instance):
            return f"key {where}: .nan is not a number; expected {_expected(error)}"
        if error.instance.is_integer() and "integer" in _expected_types(error):
            return (
                f"key {where}: {error.instance!r} is not of type 'integer'; write the whole "
                f"number without a decimal point ({int(error.instance)})"
            )
    if error.validator == "enum":
        # spelled as in YAML (true, not True), since that is what the user edits
        allowed = ", ".join(json.dumps(v) for v in error.validator_value)
        return f"key {where}: {json.dumps(error.instance)} is not one of {allowed}"
    return f"key {where}: {error.message}{_unit_hint(error)}"


def _unit_hint(error):
    """'; <hint>' for a sheet voxel size below the minimum that reads as µm, else ''."""
    path = list(error.absolute_path)
    if error.validator != "minimum" or not path or path[-1] not in SHEET_NUMBER_COLUMNS:
        return ""
    hint = micrometre_hint(error.instance)
    return f"; {hint}" if hint else ""


def validate(instance, schema, *, source):
    """Validate `instance` in place against `schema`, filling defaults; raise on the first error.

    Errors are sorted by their position so the message is stable between runs.
    """
    errors = sorted(
        _Validator(schema).iter_errors(instance), key=lambda e: [str(p) for p in e.absolute_path]
    )
    if errors:
        extra = f" (and {len(errors) - 1} more)" if len(errors) > 1 else ""
        raise TesseraInputError(_describe(errors[0]) + extra, source=source)
    return instance


def load_config(config, schema_path, *, source="config/config.yaml"):
    """Validate a study config dict against its schema; return it with defaults filled.

    Examples
    --------
    >>> schema = {"type": "object", "additionalProperties": False,
    ...           "properties": {"levels": {"type": "integer", "default": 3}}}
    >>> import tempfile, pathlib, yaml
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "s.yaml"; _ = p.write_text(yaml.safe_dump(schema))
    >>> load_config({}, p)
    {'levels': 3}
    >>> load_config({"levles": 2}, p)
    Traceback (most recent call last):
    ...
    tessera.errors.TesseraInputError: config/config.yaml: key (top level): Additional properties are not allowed ('levles' was unexpected) (check the spelling; allowed keys are in the schema)
    """
    if not isinstance(config, dict):
        raise TesseraInputError("expected a mapping of settings at the top level", source=source)
    validate(config, read_yaml(schema_path), source=source)
    _check_related_keys(config, source)
    return config


def _check_related_keys(config, source):
    """Checks between keys that a JSON Schema cannot express."""
    low, high = (config.get("ingest") or {}).get("percentiles", (0, 100))
    if not low < high:
        raise TesseraInputError(
            f"key ingest.percentiles: [{low}, {high}]: expected the lower percentile first "
            "and below the upper one",
            source=source,
        )
    for name, target in (config.get("targets") or {}).items():
        _check_templates(name, target.get("annotations") or {}, source)
        _check_split(name, target.get("split") or {}, source)
        objects = target.get("objects") or {}
        high, low = objects.get("high"), objects.get("low")
        if high is not None and low is not None and low > high:
            raise TesseraInputError(
                f"key targets.{name}.objects: low ({low}) must not exceed high ({high})",
                source=source,
            )
        smallest, largest = objects.get("min_volume_um3", 0), objects.get("max_volume_um3")
        if largest is not None and smallest > largest:
            raise TesseraInputError(
                f"key targets.{name}.objects: min_volume_um3 ({smallest}) is larger than max_volume_um3 ({largest})",
                source=source,
            )
        depth, shown = objects.get("split_min_depth_nm"), None
        # auto depends on the voxel size, so only its floor is known here; the objects job
        # checks the depth it gives
        if depth == "auto":
            depth, shown = AUTO_DEPTH_FLOOR_NM, f"auto, at least {AUTO_DEPTH_FLOOR_NM:g} nm"
        problem = (
            depth is not None
            and largest is not None
            and split_depth_problem(depth, largest, shown=shown)
        )
        if problem:
            raise TesseraInputError(f"key targets.{name}.objects: {problem}", source=source)


def _check_templates(name, annotations, source):
    """A label or instance path template may hold ``{dataset}`` and nothing else in braces."""
    for field in ("labels", "instances"):
        template = annotations.get(field)
        if not isinstance(template, str):
            continue
        try:
            parts = list(string.Formatter().parse(template))
        except ValueError as exc:
            problem = str(exc)
        else:
            others = [
                "{"
                + f
                + (f"!{conversion}" if conversion else "")
                + (f":{spec}" if spec else "")
                + "}"
                for _, f, spec, conversion in parts
                if f is not None and (f != "dataset" or spec or conversion)
            ]
            problem = f"it holds {', '.join(others)}" if others else None
        if problem:
            raise TesseraInputError(
                f"key targets.{name}.annotations.{field}: {template!r} is not a path template "
                f"({problem}); expected a path with {{dataset}} where each dataset's id goes "
                "and no other braces",
                source=source,
            )


def _check_split(name, split, source):
    """Training, validation and test fractions: each above 0 (the threshold is chosen on
    validation tiles, scores come from test tiles) and together 1."""
    fractions = split.get("fractions")
    if fractions is None:
        return
    if abs(sum(fractions) - 1.0) > 1e-6 or min(fractions) <= 0:
        raise TesseraInputError(
            f"key targets.{name}.split.fractions: {list(fractions)}: expected the training, "
            "validation and test fractions, each above 0, summing to 1",
            source=source,
        )


def check_reference_condition(reference, conditions, *, source="config/config.yaml"):
    """Refuse a ``statistics.reference_condition`` that is not a condition of the sheet.

    Parameters
    ----------
    reference : str or None
        The configured reference; None means the first condition of the sheet (always valid).
    conditions : sequence of str
        The sheet's ``condition`` column (any order, repeats allowed).

    Examples
    --------
    >>> check_reference_condition(None, ["warm", "cold"])
    >>> check_reference_condition("sham", ["warm", "cold", "warm"])
    Traceback (most recent call last):
    ...
    tessera.errors.TesseraInputError: config/config.yaml: key statistics.reference_condition: 'sham' is not a condition of the datasets sheet; its conditions are ['warm', 'cold']
    """
    known = list(dict.fromkeys(conditions))
    if reference is not None and reference not in known:
        raise TesseraInputError(
            f"key statistics.reference_condition: {reference!r} is not a condition of the "
            f"datasets sheet; its conditions are {known}",
            source=source,
        )


def check_annotated_datasets(targets, dataset_ids, *, source="config/config.yaml"):
    """Refuse a ``targets.<t>.annotated_datasets`` entry that is not a dataset of the sheet.

    Checked when the config loads, so the mistake is one line before any job is planned.

    Examples
    --------
    >>> check_annotated_datasets({"nuclei": {"annotated_datasets": ["a1"]}}, ["a1", "a2"])
    >>> check_annotated_datasets({"nuclei": {"annotated_datasets": ["a1", "x9"]}}, ["a1"])
    Traceback (most recent call last):
    ...
    tessera.errors.TesseraInputError: config/config.yaml: key targets.nuclei.annotated_datasets: ['x9'] are not datasets of the sheet; its datasets are ['a1']
    """
    known = list(dataset_ids)
    for target, settings in targets.items():
        unknown = sorted(set(settings.get("annotated_datasets") or ()) - set(known))
        if unknown:
            raise TesseraInputError(
                f"key targets.{target}.annotated_datasets: {unknown} are not datasets of the "
                f"sheet; its datasets are {known}",
                source=source,
            )


def check_test_datasets(targets, dataset_ids, *, source="config/config.yaml"):
    """Refuse ``targets.<t>.split.test_datasets`` that would leave the split without meaning.

    Each must be a dataset of the sheet whose annotations the target uses (its
    ``annotated_datasets``, when set) and not one of its ``train_datasets``, and at least one
    annotated dataset must remain to train on. Checked when the config loads.

    Examples
    --------
    >>> check_test_datasets({"m": {"split": {"test_datasets": ["a2"]}}}, ["a1", "a2"])
    >>> check_test_datasets({"m": {"split": {"test_datasets": ["a1", "a2"]}}}, ["a1", "a2"])
    Traceback (most recent call last):
    ...
    tessera.errors.TesseraInputError: config/config.yaml: key targets.m.split.test_datasets: ['a1', 'a2'] hold out every annotated dataset; expected at least one left to train on
    """
    known = list(dataset_ids)
    for target, settings in targets.items():
        held = list((settings.get("split") or {}).get("test_datasets") or ())
        if not held:
            continue
        key = f"key targets.{target}.split.test_datasets"
        annotated = settings.get("annotated_datasets") or known
        outside = sorted(set(held) - set(annotated))
        if outside:
            where = "annotated_datasets" if settings.get("annotated_datasets") else "the sheet"
            raise TesseraInputError(
                f"{key}: {outside} are not in {where}; expected datasets whose annotations "
                f"this target uses ({list(annotated)})",
                source=source,
            )
        if not set(annotated) - set(held):
            raise TesseraInputError(
                f"{key}: {held} hold out every annotated dataset; expected at least one left "
                "to train on",
                source=source,
            )
        both = sorted(set(held) & set(settings.get("train_datasets") or ()))
        if both:
            raise TesseraInputError(
                f"{key}: {both} are also in train_datasets; expected a dataset held out whole "
                "to be used for testing only",
                source=source,
            )


def _parse_number(text, *, where):
    if text.strip() == "":
        return None
    try:
        # Python reads "4_0" as 40 (digit grouping): a typo, not a number in a sheet
        if "_" in text:
            raise ValueError(text)
        value = float(text)
    except ValueError:
        raise TesseraInputError(f"expected a number in nm, got {text!r}", source=where) from None
    if not math.isfinite(value):
        raise TesseraInputError(f"expected a finite number in nm, got {text!r}", source=where)
    return value


def _sheet_records(sheet_path, *, required=()):
    """(line number, {column: text}) of every non-blank row of a tab-separated sheet.

    The header must name every column of `required`.

    Empty cells after the last column (trailing tabs, as spreadsheet exports leave them) are
    dropped; a row with a filled cell beyond the header is refused, because reading it would
    shift its cells into other columns. Missing cells at the end of a row read as blank. A
    UTF-8 byte-order mark and CRLF line ends are accepted.
    """
    try:
        with open(sheet_path, encoding="utf-8-sig", newline="") as handle:
            lines = list(csv.reader(handle, delimiter="\t"))
    except FileNotFoundError:
        raise TesseraInputError("datasets sheet not found", source=sheet_path) from None
    except IsADirectoryError:
        raise TesseraInputError(
            "is a folder; expected the datasets sheet, a tab-separated file (key datasets)",
            source=sheet_path,
        ) from None
    except UnicodeDecodeError:
        raise TesseraInputError(
            "not UTF-8 text; save the sheet as UTF-8 tab-separated text", source=sheet_path
        ) from None
    except csv.Error as exc:
        raise TesseraInputError(
            f"not a readable tab-separated sheet: {exc}", source=sheet_path
        ) from None
    numbered = [(i + 1, cells) for i, cells in enumerate(lines) if any(c.strip() for c in cells)]
    if not numbered:
        raise TesseraInputError(
            "not a readable tab-separated sheet: no header line", source=sheet_path
        )
    _, header = numbered[0]
    while header and not header[-1].strip():
        header = header[:-1]
    header = [c.strip() for c in header]
    _check_separator(header, sheet_path)
    missing = [c for c in required if c not in header]
    if missing:
        raise TesseraInputError(
            f"header: column(s) {', '.join(missing)} missing; expected a first line naming the "
            f"columns, among them {', '.join(required)}",
            source=sheet_path,
        )
    repeated = sorted({c for c in header if header.count(c) > 1})
    if repeated:
        raise TesseraInputError(
            f"header: column(s) {repeated} appear more than once", source=sheet_path
        )
    records = []
    for line, cells in numbered[1:]:
        _check_quotes(cells, header, line, sheet_path)
        filled = [c for c in cells if c.strip()]
        if len(header) > 1 and len(filled) == 1:
            separator = other_separator(filled[0])
            if separator is not None:
                shown = {" ": "spaces", ",": "commas", ";": "semicolons"}[separator]
                text = filled[0].strip()
                text = text if len(text) <= 40 else text[:40] + "…"
                raise TesseraInputError(
                    f"row {line} is one cell ({text!r}) where the header names "
                    f"{len(header)} columns; its values look separated by {shown}: separate "
                    "them by tabs, like the header",
                    source=sheet_path,
                )
        extra = [c for c in cells[len(header) :] if c.strip()]
        if extra:
            raise TesseraInputError(
                f"row {line} has a cell beyond the {len(header)} columns of the header "
                f"({extra[0]!r}); expected one cell per header column",
                source=sheet_path,
            )
        cells = cells[: len(header)] + [""] * (len(header) - len(cells))
        records.append((line, dict(zip(header, cells, strict=True))))
    return records


def _check_quotes(cells, header, line, sheet_path):
    """Refuse a cell holding a tab or a line end: only a quote left open puts them there, and
    the cell then swallows the cells, or the rows, after it (a dataset silently lost)."""
    for k, cell in enumerate(cells):
        if "\t" in cell or "\n" in cell or "\r" in cell:
            column = header[k] if k < len(header) else f"{k + 1}"
            shown = cell.split("\n")[0].split("\t")[0].strip()
            shown = shown if len(shown) <= 30 else shown[:30] + "…"
            raise TesseraInputError(
                f'row {line}, column {column}: a quote (") opened in this cell ({shown!r}…) is '
                "not closed, so the cells or rows after it would be read into it; remove the "
                "quote (cells need none) or close it",
                source=sheet_path,
            )


def _check_separator(header, sheet_path):
    """Refuse a header read as one column that another separator than tab splits into several.

    Examples
    --------
    >>> _check_separator(["dataset", "condition"], "d.tsv")
    >>> _check_separator(["dataset,condition,subject"], "d.tsv")  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    tessera.errors.TesseraInputError: d.tsv: header: one column 'dataset,condition,subject'; expected columns separated by tabs ...
    """
    separator = other_separator(header[0]) if len(header) == 1 else None
    if separator is not None:
        raise TesseraInputError(
            f"header: one column {header[0]!r}; expected columns separated by tabs "
            f"(dataset, condition, subject, path, format, ...), found them separated by "
            f"{separator!r}: save the sheet as tab-separated text",
            source=sheet_path,
        )


def load_datasets(
    sheet_path,
    schema_path,
    *,
    base_dir=".",
    generated_dir=None,
    data_roots=(),
    config_source="config/config.yaml",
):
    """Read and validate the datasets sheet.

    Parameters
    ----------
    sheet_path : str or Path
        Tab-separated sheet, one row per dataset, with a header line.
    schema_path : str or Path
        JSON Schema of one row.
    base_dir : str or Path, optional
        Relative ``path`` and ``roi_mask`` cells are resolved against this folder for the
        existence check.
    generated_dir : str or Path, optional
        Paths under this folder are made by the workflow itself (the demo study) and need not
        exist yet.
    data_roots : sequence of str or Path, optional
        Folders beyond `base_dir` and the sheet's own folder that ``path`` and ``roi_mask`` may
        point into (relative ones are taken from `base_dir`); see :func:`allowed_roots`. The sheet
        itself must lie under `base_dir` or one of these.
    config_source : str, optional
        The config file that named the sheet (key ``datasets``), named when the sheet is refused.

    Returns
    -------
    pandas.DataFrame
        One row per dataset, indexed by ``dataset``; voxel sizes as float or None.
    """
    sheet_path = Path(sheet_path)
    base = Path(base_dir).resolve()
    check_inside_roots(
        sheet_path,
        base_dir,
        [base, *((base / r).resolve() for r in data_roots)],
        source=f"{config_source}, key datasets",
    )
    schema = read_yaml(schema_path)
    records = _sheet_records(sheet_path, required=schema.get("required", ()))
    if not records:
        raise TesseraInputError("the sheet has no dataset rows", source=sheet_path)
    rows, lines = [], []
    for line, raw in records:
        row_name = f"{sheet_path}, row {line}"
        record = {k: v.strip() for k, v in raw.items()}
        for column in SHEET_NUMBER_COLUMNS:
            if column in record:
                record[column] = _parse_number(record[column], where=f"{row_name}, column {column}")
        if record.get("internal_path"):
            # one spelling per array ("/volumes/raw" and "volumes/raw/" are "volumes/raw"), so a
            # rewritten path to the same array reruns nothing
            record["internal_path"] = "/".join(p for p in record["internal_path"].split("/") if p)
        for column in ("roi_mask", "internal_path"):
            if record.get(column) == "":
                record[column] = None
        for column in ("condition", "subject"):
            if record.get(column) == "":
                raise TesseraInputError(
                    f"column {column} is empty; every dataset needs a {column}", source=row_name
                )
        validate(record, schema, source=row_name)
        _check_square_pixels(record, row_name)
        rows.append(record)
        lines.append(line)
    frame = pd.DataFrame(rows, dtype=object)  # keep None for blank cells (no NaN)
    duplicated = frame["dataset"][frame["dataset"].duplicated()].unique()
    if len(duplicated):
        raise TesseraInputError(
            f"dataset ids must be unique; repeated: {', '.join(duplicated)}", source=sheet_path
        )
    folded = frame["dataset"].str.casefold()
    if folded.duplicated().any():
        twins = sorted(frame["dataset"][folded.duplicated(keep=False)])
        raise TesseraInputError(
            f"dataset ids {', '.join(twins)} differ only in capitals; they would share result "
            "folders on file systems that ignore case: expected ids that differ otherwise",
            source=sheet_path,
        )
    _check_reserved_ids(frame, lines, sheet_path)
    _check_one_spelling_per_condition(frame, lines, sheet_path)
    _check_one_condition_per_subject(frame, lines, sheet_path)
    roots = allowed_roots(sheet_path, base_dir=base_dir, data_roots=data_roots)
    _check_paths(frame, lines, sheet_path, Path(base_dir), generated_dir, roots)
    _check_one_row_per_stack(frame, lines, sheet_path, Path(base_dir))
    return frame.set_index("dataset", drop=False)


#: Largest ratio of the in-plane voxel sides a sheet row may give. EM pixels are square or
#: nearly so (a FIB-SEM image corrected for its tilt: 1 / sin 52° = 1.27; common practice), so
#: sides 2x or more apart are far likelier the sizes typed in another order (x, y, z) than real.
MAX_PIXEL_ASPECT = 2.0


def _check_square_pixels(record, row_name):
    """Refuse in-plane voxel sides :data:`MAX_PIXEL_ASPECT` or more apart (blank cells pass).

    Examples
    --------
    >>> _check_square_pixels({"voxel_y_nm": 5.0, "voxel_x_nm": 6.35}, "s.tsv, row 2")
    >>> _check_square_pixels({"voxel_z_nm": 8.0, "voxel_y_nm": 8.0, "voxel_x_nm": 40.0},
    ...                      "s.tsv, row 2")
    Traceback (most recent call last):
    ...
    tessera.errors.TesseraInputError: s.tsv, row 2: voxel_y_nm 8 and voxel_x_nm 40 differ 5x; expected near-square pixels (sides within 2x), with the columns in the order z, y, x
    """
    y, x = record.get("voxel_y_nm"), record.get("voxel_x_nm")
    if y is None or x is None or min(y, x) <= 0:
        return  # blank, or refused by the schema
    if max(y, x) / min(y, x) >= MAX_PIXEL_ASPECT:
        raise TesseraInputError(
            f"voxel_y_nm {y:g} and voxel_x_nm {x:g} differ {max(y, x) / min(y, x):.3g}x; "
            f"expected near-square pixels (sides within {MAX_PIXEL_ASPECT:g}x), with the columns "
            "in the order z, y, x",
            source=row_name,
        )


#: A dataset whose in-plane voxel size differs from the study's median by this
#: factor or more is named in a warning: within one study such a gap is far likelier a unit or
#: typing slip (0.5 for 5 nm, or ångström for nm: exactly 10x) than a real difference, and it
#: silently moves every object size and the size filters. A warning, not a refusal, since a
#: study may mix instruments on purpose.
VOXEL_SIZE_WARNING_FACTOR = 10.0


def unusual_voxel_sizes(datasets, *, sheet_path, factor=VOXEL_SIZE_WARNING_FACTOR):
    """Warnings (one line each) for datasets whose in-plane voxel size in the sheet lies
    `factor` times or more away from the median of the study's in-plane voxel sizes.

    Blank cells (sizes taken from the file's header) are not compared.

    Examples
    --------
    >>> sheet = pd.DataFrame({"dataset": ["a", "b", "c"], "voxel_y_nm": [10.0, 0.5, 10.0],
    ...                       "voxel_x_nm": [10.0, 0.5, None]}).set_index("dataset", drop=False)
    >>> for line in unusual_voxel_sizes(sheet, sheet_path="datasets.tsv"):
    ...     print(line)
    datasets.tsv: dataset b: voxel_y_nm 0.5 nm is 20x finer than the study's median in-plane voxel size (10 nm); expected sizes within 10x of it (a unit slip?)
    datasets.tsv: dataset b: voxel_x_nm 0.5 nm is 20x finer than the study's median in-plane voxel size (10 nm); expected sizes within 10x of it (a unit slip?)
    """
    columns = [c for c in ("voxel_y_nm", "voxel_x_nm") if c in datasets.columns]
    given = [float(v) for c in columns for v in datasets[c] if v is not None and v == v]
    if len(given) < 2:
        return []
    median = float(pd.Series(given).median())
    lines = []
    for dataset, row in datasets.iterrows():
        for column in columns:
            value = row[column]
            if value is None or value != value:
                continue
            ratio = max(value / median, median / value)
            if ratio >= factor:
                how = "finer" if value < median else "coarser"
                lines.append(
                    f"{sheet_path}: dataset {dataset}: {column} {value:g} nm is {ratio:.0f}x "
                    f"{how} than the study's median in-plane voxel size ({median:g} nm); "
                    f"expected sizes within {factor:g}x of it (a unit slip?)"
                )
    return lines


def _check_one_row_per_stack(frame, lines, sheet_path, base_dir):
    """Refuse two rows that name the same stack (the same file, and array inside it).

    Each row is a dataset, and its subject an animal of the statistics: one image under two
    rows would be measured twice and counted as two animals. Usually a path copied into a new
    row and not changed.
    """
    seen = {}
    for line, row in zip(lines, frame.to_dict(orient="records"), strict=True):
        key = ((base_dir / row["path"]).resolve(), row.get("internal_path") or "")
        if key in seen:
            first_line, first_id = seen[key]
            inside = f", internal_path {key[1]!r}" if key[1] else ""
            raise TesseraInputError(
                f"column path: rows {first_line} ({first_id}) and {line} ({row['dataset']}) name "
                f"the same stack {row['path']!r}{inside}; expected one row per stack (one image "
                "under two rows would be measured twice, as two animals)",
                source=sheet_path,
            )
        seen[key] = (line, row["dataset"])


#: Folders of results/ that belong to the whole study (rules/*.smk write results/study/… and
#: results/provenance/…): a dataset of that id would write its own results among them.
RESERVED_DATASET_IDS = ("study", "provenance")


def _check_reserved_ids(frame, lines, sheet_path):
    """Refuse a dataset id that names one of the study's own result folders (any case, as
    some file systems ignore it)."""
    for i, dataset in enumerate(frame["dataset"]):
        if dataset.casefold() in RESERVED_DATASET_IDS:
            raise TesseraInputError(
                f"column dataset: {dataset!r} is the name of the study's own folder "
                f"results/{dataset.casefold()}; expected another id (not "
                f"{' or '.join(RESERVED_DATASET_IDS)})",
                source=f"{sheet_path}, row {lines[i]}",
            )


def _check_one_spelling_per_condition(frame, lines, sheet_path):
    """Refuse conditions that differ only in capitals or inner spaces ('Cold', 'cold').

    Each spelling would be a group of its own in the statistics, holding a part of the animals.
    """
    spellings = {}
    for i, condition in enumerate(frame["condition"]):
        spellings.setdefault(" ".join(condition.casefold().split()), {}).setdefault(
            condition, []
        ).append(str(lines[i]))
    for found in spellings.values():
        if len(found) > 1:
            listed = " and ".join(f"{c!r} (rows {', '.join(rows)})" for c, rows in found.items())
            raise TesseraInputError(
                f"column condition: {listed} differ only in capitals or spaces; expected one "
                "spelling per condition",
                source=sheet_path,
            )


def _check_one_condition_per_subject(frame, lines, sheet_path):
    """Refuse an animal (column subject) that appears under more than one condition.

    The animal is the unit of the statistics and belongs to one group; several datasets of one
    animal are fine. Usually a mistyped subject id.
    """
    for subject, rows in frame.groupby("subject", sort=False).groups.items():
        conditions = list(dict.fromkeys(frame.loc[rows, "condition"]))
        if len(conditions) > 1:
            where = ", ".join(str(lines[i]) for i in rows)
            raise TesseraInputError(
                f"column subject: animal {subject!r} appears under conditions {conditions} "
                f"(rows {where}); expected one condition per animal (a mistyped subject id?)",
                source=sheet_path,
            )


SHEET_PATH_COLUMNS = ("path", "roi_mask")
# Formats whose path is one file, and those whose path is a folder
FILE_FORMATS = ("tiff_stack", "mrc", "hdf5")
FOLDER_FORMATS = ("slice_folder", "n5")


def allowed_roots(sheet_path, *, base_dir=".", data_roots=()):
    """The folders a sheet's paths must resolve into: the project, the sheet's folder, `data_roots`.

    Every root is resolved (symbolic links followed, ``..`` removed), so a path is inside a root
    exactly when its own resolved form starts with the root's: ``../`` steps and links that lead
    elsewhere are caught, wherever they occur.

    Examples
    --------
    >>> [str(r) for r in allowed_roots("/study/sheets/d.tsv", base_dir="/study", data_roots=["/mnt/em", "raw"])]
    ['/study', '/study/sheets', '/mnt/em', '/study/raw']
    """
    base = Path(base_dir).resolve()
    roots = [base, Path(sheet_path).resolve().parent, *((base / r).resolve() for r in data_roots)]
    return list(dict.fromkeys(roots))  # unique, first mention first


def _check_paths(frame, lines, sheet_path, base_dir, generated_dir, roots):
    generated = None if generated_dir is None else (base_dir / generated_dir).resolve()
    for line, row in zip(lines, frame.to_dict(orient="records"), strict=True):
        for column in SHEET_PATH_COLUMNS:
            value = row.get(column)
            if value is None:
                continue
            full = check_inside_roots(
                value, base_dir, roots, source=f"{sheet_path}, row {line}, column {column}"
            )
            if generated is not None and full.is_relative_to(generated):
                continue
            if not full.exists():
                hint = (
                    ""
                    if Path(value).is_absolute()
                    else f" (relative paths are read from the project folder, {base_dir.resolve()})"
                )
                raise TesseraInputError(
                    f"column {column}: file or folder {value!r} not found{hint}",
                    source=f"{sheet_path}, row {line}",
                )
            problem = _kind_problem(full, row["format"] if column == "path" else None)
            if problem:
                raise TesseraInputError(
                    f"column {column}: {value!r} is {problem}", source=f"{sheet_path}, row {line}"
                )


def _kind_problem(path, fmt):
    """What is wrong with `path` being a file or a folder for format `fmt` (None: a mask file)."""
    if path.is_dir() and fmt in (*FILE_FORMATS, None):
        what = "format " + fmt if fmt else "a region mask (a label stack)"
        hint = "; a folder of section images is format slice_folder" if fmt else ""
        return f"a folder; {what} is one file{hint}"
    if not path.is_dir() and fmt in FOLDER_FORMATS:
        return f"a file; format {fmt} is a folder"
    return None


def check_inside_roots(value, base_dir, roots, *, source):
    """`value` resolved against `base_dir`; refused unless it lies in one of `roots`."""
    full = (Path(base_dir) / value).resolve()
    if not any(full.is_relative_to(root) for root in roots):
        raise TesseraInputError(
            f"{str(value)!r} resolves to '{full}', outside the allowed data roots "
            f"{[str(r) for r in roots]}; add its folder to data_roots in config/config.yaml",
            source=source,
        )
    return full


def sheet_spacing(row):
    """The sheet's voxel size (z, y, x) in nm for one dataset row; None where blank."""
    return tuple(None if pd.isna(row[c]) else float(row[c]) for c in SHEET_NUMBER_COLUMNS)


def expand_variants(config, *, source="config/config.yaml"):
    """Add every variant and downsampling-study factor of each target as a target of its own.

    A variant ``<target>.<name>`` is the target with the variant's settings merged over it (one
    level deep: ``cascade: {stages: 3}`` changes only the stages). A downsampling study adds
    ``<target>.x<f>`` per factor f other than the target's own, with tiles of the same physical
    size, as many as fit up to the target's count (a coarse level has fewer sections and
    pixels). Variants get their own result folders and are trained and scored on their own;
    only label-volume annotations can be re-sampled at another factor.

    Returns
    -------
    dict
        Variant target name → its base target name (base targets map to themselves).

    Examples
    --------
    >>> cfg = {"targets": {"mito": {"downsample": 2, "annotations": {"labels": "{dataset}.tif"},
    ...        "tiles": {"size": 96}, "cascade": {"stages": 2}, "variants": {"s3": {"cascade": {"stages": 3}}},
    ...        "downsampling_study": {"factors": [1, 2], "tolerance": 0.02}}}}
    >>> sorted(expand_variants(cfg).items())
    [('mito', 'mito'), ('mito.s3', 'mito'), ('mito.x1', 'mito')]
    >>> cfg["targets"]["mito.x1"]["tiles"]["size"], cfg["targets"]["mito.s3"]["cascade"]["stages"]
    (192, 3)
    """
    targets = config["targets"]
    base_of = {name: name for name in targets}
    added = {}
    for name, target in targets.items():
        own = {k: v for k, v in target.items() if k not in ("variants", "downsampling_study")}
        wanted = dict(target.get("variants") or {})
        study = target.get("downsampling_study")
        if study:
            for factor in study["factors"]:
                if factor != target["downsample"]:
                    size = max(
                        16, int(round(target["tiles"]["size"] * target["downsample"] / factor))
                    )
                    # a coarser level may not hold as many tiles of this physical size
                    tiles = {"size": size, "allow_fewer": True}
                    wanted[f"x{factor}"] = {"downsample": factor, "tiles": tiles}
        for variant, overrides in wanted.items():
            if "labels" not in target["annotations"] and "downsample" in overrides:
                raise TesseraInputError(
                    f"key targets.{name}: variant {variant} changes the downsampling factor, which needs label "
                    "volumes (annotations.labels) to re-sample tiles; painted tiles exist at one factor only",
                    source=source,
                )
            merged = _copy(own)
            for key, value in overrides.items():
                if isinstance(value, dict) and isinstance(merged.get(key), dict):
                    merged[key] = {**merged[key], **value}
                else:
                    merged[key] = value
            if f"{name}.{variant}" in targets:
                raise TesseraInputError(
                    f"key targets: {name}.{variant} is both a target and a variant of {name}",
                    source=source,
                )
            added[f"{name}.{variant}"] = merged
            base_of[f"{name}.{variant}"] = name
    targets.update(added)
    return base_of
