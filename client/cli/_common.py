"""Pieces the client commands share: server options, input loading, corpus conversations.

Environment variables are read here only when a command runs (this is an entry point):
``MIDSTREAM_SERVER`` (default server), ``MIDSTREAM_TOKEN`` (bearer token) and
``MIDSTREAM_CORPORA`` (where ``--corpus`` names are looked up when relative and missing).
"""

from __future__ import annotations

import argparse
import os
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import TextIO

from midstream import AddWord, Conversation, CorpusNotFoundError, InputError
from midstream.client._client import Client
from midstream.client._inputs import (
    MAX_LINE_CHARS,
    CtmParser,
    JsonlEventParser,
    TimedEvent,
    read_events,
)
from midstream.client.cli._records import GoldWord
from midstream.corpora import CorpusKind, detect_kind, read_corpus

#: Where the commands look for a server unless told (``midstream serve`` listens here by default).
DEFAULT_TARGET = "127.0.0.1:50051"


def add_server_options(parser: argparse.ArgumentParser) -> None:
    """``--server``, ``--token``, ``--tls`` and ``--ca`` for commands that talk to a server."""
    parser.add_argument("--server", metavar="HOST:PORT", default=None,
                        help=f"the server (default $MIDSTREAM_SERVER or {DEFAULT_TARGET})")
    parser.add_argument("--token", default=None,
                        help="bearer token the server requires (default $MIDSTREAM_TOKEN)")
    parser.add_argument("--tls", action="store_true",
                        help="connect with TLS, trusting the system's CA certificates")
    parser.add_argument("--ca", type=Path, default=None, metavar="FILE",
                        help="connect with TLS, trusting the CA certificates in this PEM file "
                             "(e.g. the server's own self-signed --tls-cert)")


def add_setting_option(parser: argparse.ArgumentParser) -> None:
    """``--setting NAME`` for commands that label utterance functions with local models."""
    parser.add_argument("--setting", metavar="NAME", default=None,
                        help="label utterance functions as conversations of this setting: one "
                             "of the corpora the coarse function model was trained on as "
                             "settings (an unknown name is refused with the model's list); "
                             "default: none, the shared weights alone")


def read_ca(path: Path | None) -> bytes | None:
    """The PEM bytes of a ``--ca`` file (``None`` without one).

    Raises
    ------
    InputError
        When the file cannot be read or holds no PEM certificate.
    """
    if path is None:
        return None
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise InputError(f"--ca {path}: cannot read the CA file ({exc.strerror})") from exc
    if b"-----BEGIN CERTIFICATE-----" not in data:
        raise InputError(f"--ca {path}: not a PEM certificate file (no 'BEGIN CERTIFICATE')")
    return data


def client_from_args(args: argparse.Namespace) -> Client:
    target = args.server or os.environ.get("MIDSTREAM_SERVER") or DEFAULT_TARGET
    token = args.token or os.environ.get("MIDSTREAM_TOKEN") or None
    roots = read_ca(args.ca)
    return Client(target, token=token, tls=bool(args.tls) or roots is not None,
                  root_certificates=roots)


def add_input_options(parser: argparse.ArgumentParser, *, stdin: bool) -> None:
    """The input argument and ``--format`` (and corpus selection) of tag and replay."""
    parser.add_argument(
        "input", nargs="?" if stdin else None, default="-" if stdin else None,
        help="word events: a .jsonl or .ctm file" + (", or - for standard input (default)"
                                                      if stdin else ", or a corpus folder"))
    parser.add_argument("--format", choices=("auto", "jsonl", "ctm", "vtt", "stm", "corpus"),
                        default="auto",
                        help="input format (auto: from the file name; a folder is a corpus)")
    parser.add_argument("--recording", metavar="NAME", default=None,
                        help="the recording (first field) to send from a CTM or STM file "
                             "holding several")
    parser.add_argument("--split", default=None,
                        help="corpus split to read the conversation from (e.g. val)")
    parser.add_argument("--conversation", metavar="ID", default=None,
                        help="which corpus conversation to send (default: the first)")


@dataclass(slots=True, kw_only=True)
class LoadedInput:
    """Events to send, in order, and the gold annotation of their words when known."""

    source: str
    events: list[TimedEvent]
    gold: dict[str, GoldWord] = field(default_factory=dict)


def conversation_events(conversation: Conversation) -> LoadedInput:
    """The words of an annotated conversation as events, with their gold annotation.

    Word ids are ``w<index>`` (the index into the conversation's words, from 0); an utterance
    function or label the corpus does not annotate stays ``None`` in the gold.
    """
    utterance_of: dict[int, int] = {}
    for position, unit in enumerate(conversation.utterances):
        for index in unit.words:
            utterance_of[index] = position
    events: list[TimedEvent] = []
    gold: dict[str, GoldWord] = {}
    for index, word in enumerate(conversation.words):
        word_id = f"w{index}"
        number = utterance_of.get(index)
        utterance = conversation.utterances[number] if number is not None else None
        gold[word_id] = GoldWord(
            label=conversation.labels[index] if conversation.labels is not None else None,
            utterance=number,
            function=utterance.function if utterance is not None else None,
            fine_class=utterance.fine_class if utterance is not None else None)
        arrival = word.end if word.end is not None else word.start
        events.append(TimedEvent(event=AddWord(word_id=word_id, word=word), time=arrival,
                                 line=index + 1))
    return LoadedInput(source=f"{conversation.corpus}:{conversation.id}", events=events,
                       gold=gold)


def read_conversation(folder: Path, *, split: str | None, conversation_id: str | None
                      ) -> Conversation:
    """One conversation of a corpus folder (the first of the split unless ``conversation_id``).

    Raises
    ------
    CorpusNotFoundError
        When the folder is no corpus.
    InputError
        When the split holds no conversation with that id.
    """
    if not folder.exists():
        raise CorpusNotFoundError(f"{folder}: no such corpus folder or transcript file")
    wanted = conversation_id
    for conversation in read_corpus(folder, split=split):
        if wanted is None or conversation.id == wanted or _short_id(conversation.id) == wanted:
            return conversation
    where = f"split {split!r} of {folder}" if split else str(folder)
    if wanted is None:
        raise InputError(f"{where}: holds no conversation")
    raise InputError(f"{where}: no conversation {wanted!r}")


def _is_transcript_file(path: Path) -> bool:
    """Whether a file is an annotated transcript: inline markup (``.inline``) or a ``.jsonl``
    file in Midstream's transcript format (its header line)."""
    if path.is_file() and path.suffix != ".jsonl":
        try:
            return detect_kind(path) is CorpusKind.INLINE
        except CorpusNotFoundError:
            return False
    if path.suffix.lower() != ".jsonl" or not path.is_file():
        return False
    try:
        with path.open(encoding="utf-8") as handle:
            first = handle.readline(MAX_LINE_CHARS)
    except (OSError, UnicodeDecodeError):
        return False
    return '"midstream-transcript"' in first and '"format"' in first


def _short_id(conversation_id: str) -> str:
    # Let users type a SwDA conversation's number ("4802") for its id ("sw4802").
    return conversation_id.lstrip("abcdefghijklmnopqrstuvwxyz_")


def load_input(args: argparse.Namespace) -> LoadedInput:
    """The events named by the input options of a command (a file or a corpus conversation)."""
    path = Path(args.input)
    if args.format == "corpus" or (args.format == "auto" and (
            path.is_dir() or _is_transcript_file(path))):
        conversation = read_conversation(path, split=args.split,
                                         conversation_id=args.conversation)
        return conversation_events(conversation)
    return LoadedInput(source=str(path), events=read_events(
        path, args.format, recording=getattr(args, "recording", None)))


def stream_lines(handle: TextIO, source: str, fmt: str, *,
                 recording: str | None = None) -> Iterator[TimedEvent]:
    """Parse events from an open text stream line by line, as they arrive (for pipes).

    WebVTT and STM give segment times, not word times, so their input is read whole first.
    """
    if fmt == "auto":
        fmt = "jsonl"
    if fmt in ("vtt", "stm"):
        from midstream.client._captions import parse_stm, parse_webvtt  # noqa: PLC0415

        text = handle.read()
        yield from (parse_webvtt(text, source) if fmt == "vtt"
                    else parse_stm(text.splitlines(), source, recording=recording))
        return
    if fmt not in ("jsonl", "ctm"):
        raise InputError(f"{source}: standard input must be jsonl, ctm, vtt or stm, not {fmt!r}")
    parser = CtmParser(source, recording=recording) if fmt == "ctm" \
        else JsonlEventParser(source)
    for number, raw in enumerate(handle, start=1):
        event = parser.parse_line(raw, number)
        if event is not None:
            yield event
