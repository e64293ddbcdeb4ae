"""A trained node and its file: arrays + JSON in one .npz, never pickle, with a SHA-256 of the
content checked before use."""

import hashlib
import io
import json
from dataclasses import dataclass

import numpy as np

from tessera.cascade.classifiers import classifier_from_state
from tessera.cascade.frame import node_feature_names
from tessera.cascade.spec import CascadeSpec, node_settings, spec_from_settings
from tessera.errors import TesseraInputError
from tessera.io.atomic import atomic_path
from tessera.io.npz_archives import NPZ_READ_ERRORS

MODEL_FORMAT = 2  # 2: the payload's SHA-256 is recorded in the metadata


@dataclass
class NodeModel:
    """A trained node: the classifier fitted on all training tiles, one per fold, and metadata.

    The fold classifiers give the out-of-fold context of training tiles to later nodes (each
    training tile is predicted by the fold model that did not see it); the full classifier is
    used for everything else.
    """

    spec: CascadeSpec
    stage: int
    level: int
    classifier: object
    fold_classifiers: list
    meta: dict

    @property
    def node(self):
        return (self.stage, self.level)

    def for_tile(self, fold):
        return self.fold_classifiers[fold] if fold >= 0 else self.classifier


# What a message about an unusable model file tells the user to do, unless the caller (who knows
# how the file is made) says better.
REBUILD_HINT = "train the node again to rebuild it"


def payload_sha256(arrays, meta):
    """SHA-256 of a model's content: every array (name, dtype, shape, bytes, in name order), then
    the metadata as sorted JSON without the digest itself.

    Recorded in the metadata when the file is written and compared before the model is used, so
    a model whose numbers changed after training is refused even where the zip container is intact.

    Examples
    --------
    >>> a = payload_sha256({"w": np.zeros(2)}, {"stage": 1})
    >>> a == payload_sha256({"w": np.zeros(2)}, {"stage": 1, "payload_sha256": "x"})
    True
    >>> a == payload_sha256({"w": np.array([0.0, 1e-300])}, {"stage": 1})
    False
    """
    digest = hashlib.sha256()
    for name in sorted(arrays):
        values = np.ascontiguousarray(arrays[name])
        digest.update(json.dumps([name, values.dtype.str, list(values.shape)]).encode() + b"\0")
        digest.update(values.tobytes())
    plain = {k: v for k, v in meta.items() if k != "payload_sha256"}
    digest.update(json.dumps(plain, sort_keys=True).encode())
    return digest.hexdigest()


def save_node(model, path_or_file):
    """Write a node to an .npz holding only numeric arrays (metadata as UTF-8 JSON bytes).

    A path is written atomically (:func:`tessera.io.atomic.atomic_path`): a failed write leaves the
    previous model file as it was.

    The metadata records :func:`payload_sha256` of the content; :func:`load_node` checks it.
    """
    payload, clf_metas = {}, []
    for i, clf in enumerate([model.classifier, *model.fold_classifiers]):
        arrays, clf_meta = clf.to_state()
        payload.update({f"clf{i}__{k}": v for k, v in arrays.items()})
        clf_metas.append(clf_meta)
    meta = dict(model.meta, classifiers=clf_metas)
    meta["payload_sha256"] = payload_sha256(payload, meta)
    payload["meta_json"] = np.frombuffer(json.dumps(meta, sort_keys=True).encode(), dtype=np.uint8)
    buffer = io.BytesIO()
    np.savez_compressed(buffer, **payload)
    data = buffer.getvalue()
    if hasattr(path_or_file, "write"):
        path_or_file.write(data)
    else:
        with atomic_path(path_or_file) as tmp, open(tmp, "wb") as fh:
            fh.write(data)


def load_node(path, *, target=None, spec=None, stage=None, level=None, hint=REBUILD_HINT):
    """Read a node saved by :func:`save_node`, refusing one made for something else.

    Parameters
    ----------
    path : str or Path
    target, spec, stage, level : optional
        When given, must match the model's metadata exactly.
    hint : str
        How to rebuild a file that cannot be used, ending the messages about it (a workflow
        names the step that writes the file).

    Raises
    ------
    TesseraInputError
        Truncated, damaged or foreign file, an array holding Python objects (never unpickled),
        content that does not match the SHA-256 recorded when the file was written, other model
        format, or a mismatch with what was asked for.
    """
    arrays, meta = _read_checked(path, hint)
    try:
        model_spec = spec_from_settings(meta["spec"], stages=meta["stage"])
    except (KeyError, TypeError):
        raise TesseraInputError("model metadata lacks its cascade settings", source=path) from None
    checks = [
        ("target", target, meta.get("target")),
        ("stage", stage, meta.get("stage")),
        ("level", level, meta.get("level")),
    ]
    for name, wanted, found in checks:
        if wanted is not None and wanted != found:
            raise TesseraInputError(
                f"model is for {name} {found!r}, expected {wanted!r}", source=path
            )
    if spec is not None and node_settings(spec) != meta["spec"]:
        diff = sorted(k for k, v in node_settings(spec).items() if meta["spec"].get(k) != v)
        raise TesseraInputError(
            f"model was trained with other cascade settings ({', '.join(diff)})", source=path
        )
    if meta.get("features") != node_feature_names(model_spec, meta["stage"], meta["level"]):
        raise TesseraInputError(
            "model's feature list does not match this version's features", source=path
        )
    classifiers = []
    for i, clf_meta in enumerate(meta.get("classifiers", [])):
        prefix = f"clf{i}__"
        clf_arrays = {k[len(prefix) :]: v for k, v in arrays.items() if k.startswith(prefix)}
        try:
            classifiers.append(classifier_from_state(clf_arrays, clf_meta))
        except TesseraInputError as exc:
            raise TesseraInputError(str(exc), source=path) from None
    if len(classifiers) != model_spec.folds + 1:
        raise TesseraInputError(
            f"model holds {len(classifiers)} classifiers, expected {model_spec.folds + 1}",
            source=path,
        )
    return NodeModel(
        model_spec, meta["stage"], meta["level"], classifiers[0], classifiers[1:], meta
    )


def _read_checked(path, hint):
    """The arrays and metadata of a model file whose format and recorded SHA-256 are right."""
    arrays = _read_plain_arrays(path, hint)
    if "meta_json" not in arrays:
        raise TesseraInputError("not a tessera model file (no metadata)", source=path)
    try:
        meta = json.loads(arrays.pop("meta_json").tobytes().decode())
        if not isinstance(meta, dict):
            raise ValueError("not a JSON object")
    except (UnicodeDecodeError, ValueError):  # json.JSONDecodeError is a ValueError
        raise TesseraInputError(f"model metadata is damaged; {hint}", source=path) from None
    if meta.get("format") != MODEL_FORMAT:
        raise TesseraInputError(
            f"model format {meta.get('format')!r} is not {MODEL_FORMAT} (made by tessera "
            f"{meta.get('tessera_version')}); retrain it with this version ({hint})",
            source=path,
        )
    if meta.get("payload_sha256") != payload_sha256(arrays, meta):
        raise TesseraInputError(
            f"model content does not match the SHA-256 recorded when it was written (altered or damaged); "
            f"{hint}",
            source=path,
        )
    return arrays, meta


def _read_plain_arrays(path, hint):
    """Every array of an .npz, refusing object arrays (``allow_pickle=False``: nothing is unpickled)."""
    try:
        with open(path, "rb") as fh, np.load(fh, allow_pickle=False) as data:
            arrays = {}
            for name in data.files:
                try:
                    arrays[name] = data[name]
                except ValueError as exc:
                    # numpy refuses object (pickled) arrays here, before unpickling anything
                    raise TesseraInputError(
                        f"array {name!r} cannot be read as plain numbers ({exc}); model files hold numeric arrays "
                        f"only and are never unpickled; {hint}",
                        source=path,
                    ) from None
    except TesseraInputError:
        raise
    except FileNotFoundError:
        raise TesseraInputError(f"model file not found; {hint}", source=path) from None
    except NPZ_READ_ERRORS as exc:
        raise TesseraInputError(
            f"not a readable model file (truncated or damaged?): {exc}; {hint}", source=path
        ) from None
    return arrays
