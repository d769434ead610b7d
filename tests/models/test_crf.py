"""The python-crfsuite adapter and the ``.tagger`` container: loading, checks, training."""

from __future__ import annotations

import struct

import pytest
from midstream import InputError, ModelError
from midstream.models._artifact import FORMAT_VERSION, ModelArtifact
from midstream.models._crf import CrfTagger, shift_state_weights, train_crf

_X = [[{"w=the": 1.0}, {"w=uh": 1.0}, {"w=cat": 1.0}]] * 4
_Y = [["O", "F", "O"]] * 4


@pytest.fixture(scope="module")
def model_bytes() -> bytes:
    return train_crf(_X, _Y, max_iterations=30)


def test_trained_model_tags_what_it_learned(model_bytes: bytes) -> None:
    tagger = CrfTagger.from_bytes(model_bytes)
    assert set(tagger.labels) == {"O", "F"}
    labels, confidences = tagger.tag_with_confidence(_X[0])
    assert labels == ["O", "F", "O"]
    assert all(0.5 < c <= 1.0 for c in confidences)
    marginals = tagger.marginals(_X[0])
    assert all(abs(sum(m.values()) - 1.0) < 1e-6 for m in marginals)
    assert [max(m, key=m.__getitem__) for m in marginals] == labels


def test_unseen_features_and_empty_sequence(model_bytes: bytes) -> None:
    tagger = CrfTagger.from_bytes(model_bytes)
    assert len(tagger.tag([{"w=zebra": 1.0}, {}])) == 2
    assert tagger.tag([]) == []


@pytest.mark.parametrize(
    "mutate",
    [
        lambda b: b[:-1],
        lambda b: b[:10],
        lambda b: b"XXXX" + b[4:],
        lambda b: b[:28] + struct.pack("<I", 10**8) + b[32:],
    ],
    ids=["truncated-tail", "truncated-header", "bad-magic", "offset-out-of-range"],
)
def test_corrupt_crf_bytes_raise_model_error(model_bytes: bytes, mutate: object) -> None:
    assert callable(mutate)
    with pytest.raises(ModelError):
        CrfTagger.from_bytes(mutate(model_bytes))


def test_training_rejects_mismatched_lengths() -> None:
    with pytest.raises(InputError, match="sequence 0"):
        train_crf([[{"a": 1.0}]], [["x", "y"]])


def test_artifact_round_trip(model_bytes: bytes) -> None:
    artifact = ModelArtifact(
        kind="words", labels=("O", "F"), crf=model_bytes,
        features={"window": 2}, hyper_parameters={"c1": 0.1}, metadata={"by": "test"},
    )
    again = ModelArtifact.from_bytes(artifact.to_bytes(), expected_kind="words")
    assert again == artifact
    assert CrfTagger.from_bytes(again.crf).tag(_X[0]) == ["O", "F", "O"]


def test_artifact_checks(model_bytes: bytes) -> None:
    data = ModelArtifact(kind="words", labels=("O",), crf=model_bytes).to_bytes()
    with pytest.raises(ModelError, match="truncated"):
        ModelArtifact.from_bytes(data[:-5])
    with pytest.raises(ModelError, match="magic"):
        ModelArtifact.from_bytes(b"\x00" * 8 + data[8:])
    newer = data[:8] + struct.pack("<I", FORMAT_VERSION + 1) + data[12:]
    with pytest.raises(ModelError, match=f"newer model format version {FORMAT_VERSION + 1}"):
        ModelArtifact.from_bytes(newer)
    with pytest.raises(ModelError, match="expected 'utterance_functions'"):
        ModelArtifact.from_bytes(data, expected_kind="utterance_functions")
    flipped = bytearray(data)
    flipped[-100] ^= 0xFF
    with pytest.raises(ModelError, match="checksum"):
        ModelArtifact.from_bytes(bytes(flipped))


def test_weights_read_from_bytes_match_crfsuites_own_dump(model_bytes: bytes) -> None:
    # crfsuite's dump (through python-crfsuite's info()) is the outside reference here.
    tagger = CrfTagger.from_bytes(model_bytes)
    weights = tagger.weights()
    info = tagger._tagger.info()
    column = {label: k for k, label in enumerate(weights.labels)}
    assert len(weights.attributes) == len({a for a, _ in info.state_features})
    for (attribute, label), value in info.state_features.items():
        row = weights.attributes[attribute]
        assert weights.state[row, column[label]] == pytest.approx(value, abs=1e-6)
    for (source, target), value in info.transitions.items():
        assert weights.transitions[column[source], column[target]] == pytest.approx(
            value, abs=1e-6)


def test_a_shifted_state_weight_is_what_crfsuite_decodes_with(model_bytes: bytes) -> None:
    # crfsuite's own dump of the shifted model is the outside reference: exactly one weight
    # moved, by the shift, and crfsuite's decoding follows it (a large enough shift away from
    # "O" on the only attribute of the first item makes that item "F").
    shifted = shift_state_weights(model_bytes, "w=the", {"O": -50.0})
    before = CrfTagger.from_bytes(model_bytes)._tagger.info().state_features
    after = CrfTagger.from_bytes(shifted)._tagger.info().state_features
    assert after.keys() == before.keys()
    moved = {k: after[k] - before[k] for k in after if after[k] != before[k]}
    assert list(moved) == [("w=the", "O")]
    assert moved["w=the", "O"] == pytest.approx(-50.0)
    assert CrfTagger.from_bytes(shifted).tag(_X[0])[0] == "F"
    assert shift_state_weights(model_bytes, "w=the", {}) == model_bytes


def test_a_shift_of_a_weight_the_model_lacks_is_refused(model_bytes: bytes) -> None:
    with pytest.raises(ModelError, match="no label 'X'"):
        shift_state_weights(model_bytes, "w=the", {"X": 1.0})
    with pytest.raises(ModelError, match="no attribute"):
        shift_state_weights(model_bytes, "w=dog", {"F": 1.0})
    with pytest.raises(ModelError, match="no weight"):
        # L1 regularisation left "the" no weight for "F": crfsuite's file has no place for it.
        shift_state_weights(model_bytes, "w=the", {"F": 1.0})
    with pytest.raises(ModelError, match="not a CRF model"):
        shift_state_weights(b"x" * 64, "w=the", {"F": 1.0})
