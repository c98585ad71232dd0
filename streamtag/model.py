"""The model file: one self-contained, atomically written file; loaded without pickle.

Layout: a NumPy ``.npz`` archive (a zip of ``.npy`` arrays) holding only plain numeric arrays and
one UTF-8 JSON header stored as a ``uint8`` array. Loading uses ``allow_pickle=False``, so a model
file can never execute code. The model id is a hash of the exact saved content; a file whose
content does not match its recorded hash is refused as corrupted.
"""

from __future__ import annotations

import hashlib
import io
import os
import zipfile
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import orjson

from streamtag.checkpoint import write_file_atomically
from streamtag.errors import ModelError

FORMAT_NAME = "streamtag-model"
FORMAT_VERSION = 1
_ARRAY_NAMES = ("emission", "transitions", "start", "end")
_DEFAULT_MODEL = Path(__file__).parent / "data" / "demo-model.stm"


@dataclass
class Model:
    """A trained linear-chain CRF with everything needed to tag text.

    Shapes: ``emission`` (F, L), ``transitions`` (L, L) as [previous, next], ``start`` (L,),
    ``end`` (L,), where F = len(vocabulary) and L = len(labels).
    """

    labels: list[str]
    feature_spec: dict
    vocabulary: list[str]
    emission: np.ndarray
    transitions: np.ndarray
    start: np.ndarray
    end: np.ndarray
    metadata: dict = field(default_factory=dict)
    run_info: dict = field(default_factory=dict)
    model_id: str = ""

    def __post_init__(self) -> None:
        self._check_shapes()

    def _check_shapes(self) -> None:
        n_labels, n_features = len(self.labels), len(self.vocabulary)
        expected = {
            "emission": (n_features, n_labels),
            "transitions": (n_labels, n_labels),
            "start": (n_labels,),
            "end": (n_labels,),
        }
        for name, shape in expected.items():
            actual = np.shape(getattr(self, name))
            if actual != shape:
                raise ModelError(f"model array {name!r} has shape {actual}, expected {shape}")

    def pruned(self) -> "Model":
        """Copy without features whose weights are all zero (L1 makes most of them zero)."""
        keep = np.flatnonzero(np.any(self.emission != 0.0, axis=1))
        return Model(
            labels=list(self.labels),
            feature_spec=self.feature_spec,
            vocabulary=[self.vocabulary[i] for i in keep],
            emission=self.emission[keep],
            transitions=self.transitions,
            start=self.start,
            end=self.end,
            metadata=dict(self.metadata),
            run_info=dict(self.run_info),
            model_id=self.model_id,
        )


def default_model_path() -> Path:
    """The model bundled with the package (trained on the demo scenario)."""
    return _DEFAULT_MODEL


def _header(model: Model) -> dict:
    """The hashed part of the header: what decides how the model tags.

    ``run_info`` (date, duration, machine) is stored beside it but not hashed, so training twice on
    the same data with the same options gives the same model id.
    """
    return {
        "format": FORMAT_NAME,
        "version": FORMAT_VERSION,
        "labels": model.labels,
        "feature_spec": model.feature_spec,
        "vocabulary": model.vocabulary,
        "metadata": model.metadata,
    }


def _content_hash(header_bytes: bytes, arrays: dict[str, np.ndarray]) -> str:
    """Hash of the header and every array's dtype, shape and bytes, in a fixed order."""
    digest = hashlib.sha256(header_bytes)
    for name in _ARRAY_NAMES:
        array = np.ascontiguousarray(arrays[name])
        digest.update(f"{name}|{array.dtype.str}|{array.shape}".encode())
        digest.update(array.tobytes())
    return "st1-" + digest.hexdigest()[:24]


def _arrays_for_saving(model: Model) -> dict[str, np.ndarray]:
    # float32 halves the file; the id is computed from exactly these stored values.
    return {name: np.asarray(getattr(model, name), dtype=np.float32) for name in _ARRAY_NAMES}


def model_to_bytes(model: Model) -> tuple[bytes, str]:
    """Serialise a (pruned) model; returns (file bytes, model id)."""
    model = model.pruned()
    header_bytes = orjson.dumps(_header(model), option=orjson.OPT_SORT_KEYS)
    arrays = _arrays_for_saving(model)
    model_id = _content_hash(header_bytes, arrays)
    run_bytes = orjson.dumps(model.run_info, option=orjson.OPT_SORT_KEYS)
    buffer = io.BytesIO()
    np.savez_compressed(
        buffer,
        header=np.frombuffer(header_bytes, dtype=np.uint8),
        run_info=np.frombuffer(run_bytes, dtype=np.uint8),
        content_id=np.frombuffer(model_id.encode(), dtype=np.uint8),
        **arrays,
    )
    return buffer.getvalue(), model_id


def save_model(model: Model, path: str | os.PathLike, mode: int = 0o600) -> str:
    """Write the model atomically (temp file, fsync, rename, fsync dir). Returns the model id.

    Private by default: the vocabulary holds words of the training lines (names, accounts).
    """
    data, model_id = model_to_bytes(model)
    write_file_atomically(path, data, mode)
    model.model_id = model_id
    return model_id


def load_model(path: str | os.PathLike | None = None) -> Model:
    """Load and verify a model file; ``None`` loads the bundled model.

    Every failure (missing, truncated, corrupted, wrong format or version) raises ``ModelError``
    with a one-line message naming the file and the problem.
    """
    path = Path(path) if path is not None else default_model_path()
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise ModelError(f"{path}: model file not found") from None
    except IsADirectoryError:
        raise ModelError(f"{path}: is a directory, not a model file") from None
    except OSError as exc:
        raise ModelError(f"{path}: cannot read model file ({exc.strerror})") from None
    return model_from_bytes(data, str(path))


def model_from_bytes(data: bytes, name: str = "<model>") -> Model:
    arrays = _read_archive(data, name)
    header_bytes = arrays.pop("header").tobytes()
    stored_id = arrays.pop("content_id").tobytes().decode("ascii", "replace")
    header = _parse_header(header_bytes, name)
    _check_feature_spec(header.get("feature_spec"), name)
    run_info = _parse_run_info(arrays.pop("run_info", None))
    if _content_hash(header_bytes, arrays) != stored_id:
        raise ModelError(f"{name}: model content does not match its id (file corrupted)")
    try:
        return Model(
            labels=list(header["labels"]),
            feature_spec=header["feature_spec"],
            vocabulary=list(header["vocabulary"]),
            emission=arrays["emission"].astype(np.float64),
            transitions=arrays["transitions"].astype(np.float64),
            start=arrays["start"].astype(np.float64),
            end=arrays["end"].astype(np.float64),
            metadata=dict(header.get("metadata") or {}),
            run_info=run_info,
            model_id=stored_id,
        )
    except ModelError as exc:
        raise ModelError(f"{name}: {exc}") from None
    except (KeyError, TypeError, ValueError) as exc:
        raise ModelError(f"{name}: model header is incomplete ({exc})") from None


def _read_archive(data: bytes, name: str) -> dict[str, np.ndarray]:
    if not data:
        raise ModelError(f"{name}: model file is empty")
    if not data.startswith(b"PK"):
        raise ModelError(f"{name}: not a streamtag model file")
    try:
        with np.load(io.BytesIO(data), allow_pickle=False) as archive:
            arrays = {key: archive[key] for key in archive.files}
    except (zipfile.BadZipFile, EOFError):
        raise ModelError(f"{name}: model file is truncated or not a valid archive") from None
    except (ValueError, OSError, zipfile.LargeZipFile) as exc:
        raise ModelError(f"{name}: model file is corrupted ({exc})") from None
    except Exception as exc:  # zlib.error and other decoder faults: still a corrupted file
        raise ModelError(f"{name}: model file is corrupted ({type(exc).__name__})") from None
    missing = {"header", "content_id", *_ARRAY_NAMES} - arrays.keys()
    if missing:
        raise ModelError(f"{name}: model file lacks {', '.join(sorted(missing))}")
    return arrays


def _parse_header(header_bytes: bytes, name: str) -> dict:
    try:
        header = orjson.loads(header_bytes)
    except orjson.JSONDecodeError:
        raise ModelError(f"{name}: model header is not valid JSON (file corrupted)") from None
    if not isinstance(header, dict) or header.get("format") != FORMAT_NAME:
        raise ModelError(f"{name}: not a streamtag model file")
    version = header.get("version")
    if version != FORMAT_VERSION:
        raise ModelError(
            f"{name}: model format version {version} is not supported (this streamtag reads {FORMAT_VERSION})"
        )
    return header


def _check_feature_spec(spec: object, name: str) -> None:
    """A model whose stored feature spec cannot be read is a bad model file, not a bad config."""
    from streamtag.errors import ConfigError
    from streamtag.features import FeatureSpec

    try:
        FeatureSpec.from_dict(spec)
    except ConfigError as exc:
        raise ModelError(f"{name}: stored feature spec is unusable ({exc})") from None


def _parse_run_info(array: np.ndarray | None) -> dict:
    """Run information is informative only: unreadable run info is dropped, not fatal."""
    if array is None:
        return {}
    try:
        info = orjson.loads(array.tobytes())
    except orjson.JSONDecodeError:
        return {}
    return info if isinstance(info, dict) else {}
