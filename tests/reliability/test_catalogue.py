"""Rows of the bad-input catalogue (``docs/bad-input.md``) that the server's own suite lacks.

Each test sends the bad input over real gRPC to a real server and checks the status code and
the words of the message the catalogue quotes. The other rows are checked by
``tests/server/test_limits.py``, ``test_follow.py`` and ``test_models_rpc.py`` (named in the
catalogue).
"""

from __future__ import annotations

import dataclasses
import shutil
from pathlib import Path

import grpc
import pytest
from midstream.models._artifact import load_artifact
from midstream.wire import midstream_pb2 as pb
from reliability_kit import (  # noqa: F401 - fixtures are found by name
    CLOSE,
    WAIT_S,
    Running,
    ServerFactory,
    bundle_fixture,
    models_dir_fixture,
    open_event,
    refusal,
    spoken,
    start_server_fixture,
    words_event,
)

pytestmark = pytest.mark.corpus  # the models are trained from SwDA when none are shipped

INVALID = grpc.StatusCode.INVALID_ARGUMENT
PRECONDITION = grpc.StatusCode.FAILED_PRECONDITION


@pytest.fixture(name="running")
async def running_fixture(start_server: ServerFactory) -> Running:
    return await start_server()


_FIRST = words_event(spoken("w1", "so", start=0.0), spoken("w2", "we", start=0.5),
                     spoken("w3", "went", start=1.0))
_TURN_END = pb.ClientEvent(hint=pb.SpeakerHint(speaker="A", kind=pb.HINT_KIND_TURN_END))

FEED_ROWS: list[tuple[str, list[pb.ClientEvent], grpc.StatusCode, str]] = [
    ("a 10 KB word", [words_event(spoken("w1", "a" * 10_240))], INVALID,
     "field 'text' of word 'w1' is 10240 characters long; limit max_word_chars is 100"),
    ("format and separator characters only",
     [words_event(spoken("w1", "\u200b\u2028\u00a0\x1f"))], INVALID,
     "field 'text' of word 'w1' holds only whitespace or control characters"),
    ("control character in a word id", [words_event(spoken("w\x07", "so"))], INVALID,
     "field 'word_id' contains a control character"),
    ("hint naming an empty speaker",
     [pb.ClientEvent(hint=pb.SpeakerHint(speaker=" ", kind=pb.HINT_KIND_UTTERANCE_END))],
     INVALID, "'hint.speaker' is empty"),
]


@pytest.mark.parametrize(("events", "code", "message"), [r[1:] for r in FEED_ROWS],
                         ids=[r[0] for r in FEED_ROWS])
async def test_feed_refusal(running: Running, events: list[pb.ClientEvent],
                                code: grpc.StatusCode, message: str) -> None:
    error = await refusal(running.stub, [open_event(), *events])
    assert error.code() == code
    assert message in (error.details() or "")


async def test_replacing_a_final_word_names_its_finality(running: Running) -> None:
    error = await refusal(running.stub, [open_event(), _FIRST, _TURN_END, pb.ClientEvent(
        replace=pb.ReplaceWord(word=spoken("w2", "he", start=0.5)))])
    assert error.code() == INVALID
    assert "already final" in (error.details() or "")


async def test_reusing_an_ended_conversation_id_is_already_exists(running: Running) -> None:
    # "Words after the end" on a new stream: the id stays taken while the ended conversation is
    # kept for late followers, so nothing can be appended to it.
    replies = [m async for m in running.stub.Feed(iter([open_event("call-7"), _FIRST, CLOSE]),
                                                     timeout=WAIT_S)]
    assert replies[-1].ended.reason == pb.END_REASON_CLOSED
    error = await refusal(running.stub, [open_event("call-7"), _FIRST])
    assert error.code() == grpc.StatusCode.ALREADY_EXISTS
    assert "conversation id 'call-7' is already in use" in (error.details() or "")


async def test_unknown_conversation_on_revisions_is_not_found(running: Running) -> None:
    with pytest.raises(grpc.aio.AioRpcError) as info:
        await running.stub.GetRevisions(pb.GetRevisionsRequest(conversation_id="nobody"),
                                        timeout=WAIT_S)
    assert info.value.code() == grpc.StatusCode.NOT_FOUND
    assert "no live or kept conversation with id 'nobody'" in (info.value.details() or "")


# --- model reloads --------------------------------------------------------------------------


def _model_folder(models_dir: Path, target: Path) -> tuple[Path, Path]:
    """Copy the serving models into ``target``; return (word model, function model) paths."""
    target.mkdir()
    by_kind = {load_artifact(p).kind: p for p in sorted(models_dir.glob("*.tagger"))}
    words = shutil.copy(by_kind["words"], target / "words.tagger")
    functions = shutil.copy(by_kind["utterance_functions"], target / "functions.tagger")
    return Path(words), Path(functions)


async def _reload_refused(running: Running, folder: Path) -> grpc.aio.AioRpcError:
    before = await running.stub.DescribeModels(pb.DescribeModelsRequest(), timeout=WAIT_S)
    with pytest.raises(grpc.aio.AioRpcError) as info:
        await running.stub.ReloadModels(pb.ReloadModelsRequest(directory=str(folder)),
                                        timeout=WAIT_S)
    # Whatever the failure, the models in service stay.
    assert await running.stub.DescribeModels(pb.DescribeModelsRequest()) == before
    return info.value


async def test_truncated_model_file_on_reload(running: Running, models_dir: Path,
                                              tmp_path: Path) -> None:
    words, _ = _model_folder(models_dir, tmp_path / "cut")
    data = words.read_bytes()
    words.write_bytes(data[: len(data) // 2])
    error = await _reload_refused(running, tmp_path / "cut")
    assert error.code() == PRECONDITION
    assert "models not reloaded, the ones in service stay" in (error.details() or "")
    assert f"model file truncated or padded: {len(data) // 2} bytes, header says {len(data)}" \
        in (error.details() or "")


async def test_model_file_cut_inside_its_header_on_reload(running: Running, models_dir: Path,
                                                          tmp_path: Path) -> None:
    words, _ = _model_folder(models_dir, tmp_path / "header")
    words.write_bytes(words.read_bytes()[:20])
    error = await _reload_refused(running, tmp_path / "header")
    assert error.code() == PRECONDITION
    assert "truncated model file (20 bytes, header is 56)" in (error.details() or "")


async def test_flipped_byte_in_model_file_on_reload(running: Running, models_dir: Path,
                                                    tmp_path: Path) -> None:
    words, _ = _model_folder(models_dir, tmp_path / "flip")
    data = bytearray(words.read_bytes())
    data[-10] ^= 0xFF  # inside the CRF payload, past every header check but the checksum
    words.write_bytes(bytes(data))
    error = await _reload_refused(running, tmp_path / "flip")
    assert error.code() == PRECONDITION
    assert "model file corrupt (checksum mismatch)" in (error.details() or "")


async def test_model_of_the_wrong_kind_on_reload(running: Running, models_dir: Path,
                                                 tmp_path: Path) -> None:
    # A function model saved under the word model's name: the folder has no word model.
    words, functions = _model_folder(models_dir, tmp_path / "kind")
    shutil.copy(functions, words)
    error = await _reload_refused(running, tmp_path / "kind")
    assert error.code() == PRECONDITION
    assert "expected exactly one word model (.tagger of kind 'words'), found 0" \
        in (error.details() or "")


async def test_model_of_an_unknown_kind_on_reload(running: Running, models_dir: Path,
                                                  tmp_path: Path) -> None:
    words, _ = _model_folder(models_dir, tmp_path / "unknown")
    artifact = load_artifact(words)
    # Written with a valid checksum, so only the kind check can refuse it.
    words.write_bytes(dataclasses.replace(artifact, kind="speaker_ids").to_bytes())  # type: ignore[arg-type]
    error = await _reload_refused(running, tmp_path / "unknown")
    assert error.code() == PRECONDITION
    assert "unknown model kind 'speaker_ids'" in (error.details() or "")
