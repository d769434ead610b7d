"""The .tagger container: compressed payloads, the older raw format, and refused payloads."""

from __future__ import annotations

import hashlib
import json
import struct
import zlib
from pathlib import Path

import pytest
from midstream import ModelError, NotFoundError
from midstream.models._artifact import FORMAT_VERSION, ModelArtifact, load_artifact

_HEADER = struct.Struct("<8sIIQ32s")
_MAGIC = b"\x89MSM\r\n\x1a\n"


def _artifact() -> ModelArtifact:
    return ModelArtifact(kind="words", labels=("a", "b"), crf=b"lCRF" + bytes(range(256)) * 40,
                         metadata={"note": "test"})


def _container(version: int, meta: bytes, payload: bytes) -> bytes:
    digest = hashlib.sha256(meta + payload).digest()
    return _HEADER.pack(_MAGIC, version, len(meta), len(payload), digest) + meta + payload


def test_current_format_compresses_and_round_trips() -> None:
    artifact = _artifact()
    data = artifact.to_bytes()
    assert struct.unpack_from("<I", data, 8)[0] == FORMAT_VERSION
    assert len(data) < len(artifact.crf), "the payload should be stored compressed"
    assert ModelArtifact.from_bytes(data) == artifact


def test_version_one_files_with_a_raw_payload_still_load() -> None:
    artifact = _artifact()
    meta = json.dumps({"kind": "words", "labels": ["a", "b"], "features": {},
                       "hyper_parameters": {}, "metadata": {"note": "test"}}).encode()
    assert ModelArtifact.from_bytes(_container(1, meta, artifact.crf)) == artifact


def test_a_payload_that_does_not_decompress_is_a_model_error() -> None:
    meta = json.dumps({"kind": "words", "labels": ["a"]}).encode()
    with pytest.raises(ModelError, match="does not decompress"):
        ModelArtifact.from_bytes(_container(2, meta, b"not zlib at all"))


def test_a_cut_compressed_payload_is_a_model_error() -> None:
    meta = json.dumps({"kind": "words", "labels": ["a"]}).encode()
    payload = zlib.compress(b"lCRF" + bytes(5000))[:-6]
    with pytest.raises(ModelError, match="truncated"):
        ModelArtifact.from_bytes(_container(2, meta, payload))


def test_a_model_file_loads_from_a_string_path_as_from_a_path(tmp_path: Path) -> None:
    # Users type paths as strings; the loaders take either.
    path = tmp_path / "m.tagger"
    path.write_bytes(_artifact().to_bytes())
    assert load_artifact(str(path)) == load_artifact(path) == _artifact()
    with pytest.raises(NotFoundError, match="model file not found"):
        load_artifact(str(tmp_path / "missing.tagger"))
