"""Midstream model files (``.tagger``): our own container around crfsuite's model bytes.

Layout (all integers little-endian)::

    offset  size  field
    0       8     magic b"\\x89MSM\\r\\n\\x1a\\n" (catches text-mode and truncating transfers)
    8       4     format version (uint32), currently 2
    12      4     metadata length M in bytes (uint32)
    16      8     payload length P in bytes (uint64)
    24      32    SHA-256 of metadata + payload
    56      M     metadata, UTF-8 JSON object
    56+M    P     payload: the crfsuite model bytes, zlib-compressed from version 2 on
                  (version 1 stored them raw; both are read)

The metadata names the model's ``kind`` (``"words"``, ``"utterance_functions"`` or
``"boundaries"``), its label
set, feature configuration, a training-data summary, hyper-parameters and the command that
made it. Readers check magic, version, lengths and checksum before anything reaches C code.
"""

from __future__ import annotations

import hashlib
import json
import os
import struct
import zlib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Final, Literal

from midstream import ModelError, NotFoundError

__all__ = [
    "FORMAT_VERSION",
    "MODEL_KINDS",
    "ModelArtifact",
    "ModelKind",
    "load_artifact",
    "save_artifact",
]

ModelKind = Literal["words", "utterance_functions", "boundaries"]
MODEL_KINDS: Final[frozenset[str]] = frozenset({"words", "utterance_functions", "boundaries"})

MAGIC: Final = b"\x89MSM\r\n\x1a\n"
FORMAT_VERSION: Final = 2
#: Versions this Midstream reads: 1 (raw payload) and 2 (zlib payload, which keeps the shipped
#: models well under their size budget: crfsuite's string tables compress about 2.3 times).
READABLE_VERSIONS: Final = frozenset({1, 2})
#: Largest decompressed payload accepted (explicit limit against a corrupt or hostile file).
MAX_PAYLOAD_BYTES: Final = 1024 * 1024 * 1024
_HEADER = struct.Struct("<8sIIQ32s")
#: Metadata is a small JSON object; anything larger is a corrupt length field (explicit limit).
MAX_METADATA_BYTES: Final = 16 * 1024 * 1024


@dataclass(frozen=True, slots=True, kw_only=True)
class ModelArtifact:
    """A trained model with its provenance, as stored in a ``.tagger`` file.

    ``metadata`` holds free-form JSON-compatible provenance (training-data summary, created-by
    command, ...); ``features`` the feature configuration the model was trained with, which a
    decoder must reproduce; ``hyper_parameters`` what the trainer used.
    """

    kind: ModelKind
    labels: tuple[str, ...]
    crf: bytes = field(repr=False)
    features: Mapping[str, Any] = field(default_factory=dict)
    hyper_parameters: Mapping[str, Any] = field(default_factory=dict)
    metadata: Mapping[str, Any] = field(default_factory=dict)

    def to_bytes(self) -> bytes:
        """Serialise to the ``.tagger`` layout."""
        meta = json.dumps(
            {
                "kind": self.kind,
                "labels": list(self.labels),
                "features": dict(self.features),
                "hyper_parameters": dict(self.hyper_parameters),
                "metadata": dict(self.metadata),
            },
            sort_keys=True,
            ensure_ascii=False,
        ).encode("utf-8")
        payload = zlib.compress(self.crf, 6)
        digest = hashlib.sha256(meta + payload).digest()
        header = _HEADER.pack(MAGIC, FORMAT_VERSION, len(meta), len(payload), digest)
        return header + meta + payload

    @classmethod
    def from_bytes(
        cls, data: bytes, *, expected_kind: ModelKind | None = None, source: str = "model"
    ) -> ModelArtifact:
        """Parse and check a ``.tagger`` file's bytes.

        Raises
        ------
        ModelError
            Wrong magic, truncated, newer or unknown format version, checksum mismatch,
            malformed metadata, or a kind other than ``expected_kind``.
        """
        if len(data) < _HEADER.size:
            raise ModelError(
                f"{source}: truncated model file ({len(data)} bytes, header is {_HEADER.size})"
            )
        magic, version, meta_len, payload_len, digest = _HEADER.unpack_from(data, 0)
        if magic != MAGIC:
            raise ModelError(f"{source}: not a Midstream model file (wrong magic bytes)")
        if version not in READABLE_VERSIONS:
            newer = "newer" if version > FORMAT_VERSION else "unknown"
            raise ModelError(
                f"{source}: {newer} model format version {version}; this Midstream reads "
                f"versions {', '.join(map(str, sorted(READABLE_VERSIONS)))} "
                f"(writes version {FORMAT_VERSION})"
            )
        if meta_len > MAX_METADATA_BYTES:
            raise ModelError(f"{source}: metadata length {meta_len} exceeds {MAX_METADATA_BYTES}")
        expected = _HEADER.size + meta_len + payload_len
        if len(data) != expected:
            raise ModelError(
                f"{source}: model file truncated or padded: {len(data)} bytes, "
                f"header says {expected}"
            )
        body = data[_HEADER.size :]
        if hashlib.sha256(body).digest() != digest:
            raise ModelError(f"{source}: model file corrupt (checksum mismatch)")
        try:
            meta = json.loads(body[:meta_len].decode("utf-8"))
        except (UnicodeDecodeError, json.JSONDecodeError) as exc:
            raise ModelError(f"{source}: model metadata is not JSON: {exc}") from exc
        if not isinstance(meta, dict):
            raise ModelError(f"{source}: model metadata is not a JSON object")
        kind = meta.get("kind")
        if kind not in MODEL_KINDS:
            raise ModelError(f"{source}: unknown model kind {kind!r}")
        if expected_kind is not None and kind != expected_kind:
            raise ModelError(f"{source}: model kind is {kind!r}, expected {expected_kind!r}")
        labels = meta.get("labels")
        if not isinstance(labels, list) or not all(isinstance(x, str) for x in labels):
            raise ModelError(f"{source}: metadata field 'labels' must be a list of strings")
        sections: dict[str, dict[str, Any]] = {}
        for name in ("features", "hyper_parameters", "metadata"):
            value = meta.get(name, {})
            if not isinstance(value, dict):
                raise ModelError(f"{source}: metadata field {name!r} must be an object")
            sections[name] = value
        return cls(
            kind=kind,
            labels=tuple(labels),
            crf=_payload(bytes(body[meta_len:]), version, source),
            features=sections["features"],
            hyper_parameters=sections["hyper_parameters"],
            metadata=sections["metadata"],
        )


def _payload(stored: bytes, version: int, source: str) -> bytes:
    if version == 1:
        return stored
    inflater = zlib.decompressobj()
    try:
        crf = inflater.decompress(stored, MAX_PAYLOAD_BYTES)
    except zlib.error as exc:
        raise ModelError(f"{source}: model payload does not decompress: {exc}") from exc
    if inflater.unconsumed_tail or not inflater.eof:
        raise ModelError(f"{source}: model payload is truncated or larger than "
                         f"{MAX_PAYLOAD_BYTES} bytes")
    return crf


def save_artifact(artifact: ModelArtifact, path: Path) -> None:
    """Write ``artifact`` to ``path`` (written to a sibling temp file, then renamed)."""
    tmp = path.with_name(path.name + ".tmp")
    tmp.write_bytes(artifact.to_bytes())
    tmp.replace(path)


def load_artifact(path: str | os.PathLike[str], *,
                  expected_kind: ModelKind | None = None) -> ModelArtifact:
    """Read and check a ``.tagger`` file (``path`` as a string or a path).

    Raises
    ------
    NotFoundError
        ``path`` does not exist.
    ModelError
        The file is not a valid model of the expected kind.
    """

    path = Path(path)
    try:
        data = path.read_bytes()
    except FileNotFoundError as exc:
        raise NotFoundError(f"model file not found: {path}") from exc
    except IsADirectoryError as exc:
        raise ModelError(f"model path is a folder, not a file: {path}") from exc
    return ModelArtifact.from_bytes(data, expected_kind=expected_kind, source=str(path))
