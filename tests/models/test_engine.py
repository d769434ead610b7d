"""The conversation engine: recogniser events in, hypothesis diffs out.

Tiny models trained on invented conversations (tests/function_kit.py) keep these tests
fast; what they check is the engine's bookkeeping, which does not depend on model quality.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest
from function_kit import invented_corpus, tiny_model
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from midstream import (
    REMOVED_FROM_CLEAN_TEXT,
    DisfluencyLabel,
    EventError,
    HypothesisDiff,
    Word,
    WordHypothesis,
)
from midstream.models import ConversationEngine, EngineConfig, ModelBundle, ModelInfo
from midstream.models._artifact import save_artifact
from midstream.models.functions._tagger import FunctionTagger
from midstream.models.words._model import WordModel
from midstream.models.words._train import WordTrainingConfig, train_word_artifact


@pytest.fixture(scope="module")
def bundle() -> ModelBundle:
    words = train_word_artifact(invented_corpus(20),
                                WordTrainingConfig(max_iterations=40, min_freq=1))
    functions = tiny_model("swbd42")
    info = ModelInfo(kind="words", name="tiny", format_version=1, labels=words.labels,
                     sha256="", training_summary={})
    return ModelBundle(word_model=WordModel.from_artifact(words),
                       function_tagger=FunctionTagger.from_artifact(functions),
                       infos=(info,))


def _stream(engine: ConversationEngine, words: list[tuple[str, str]]) -> list[HypothesisDiff]:
    diffs = [engine.add_word(f"w{i}", Word(text=text, speaker=speaker))
             for i, (speaker, text) in enumerate(words)]
    diffs.append(engine.finish())
    return diffs


_SAMPLE = [("A", "do"), ("A", "you"), ("A", "uh"), ("A", "you"), ("A", "have"), ("A", "kids"),
           ("B", "yes"), ("B", "we"), ("B", "have"), ("B", "two"), ("B", "kids"),
           ("A", "uh-huh")]


def _latest(diffs: list[HypothesisDiff]) -> dict[str, WordHypothesis]:
    latest: dict[str, WordHypothesis] = {}
    for diff in diffs:
        for word in diff.words:
            latest[word.word_id] = word
    return latest


def test_every_word_is_final_after_finish_and_final_labels_never_change(
        bundle: ModelBundle) -> None:
    diffs = _stream(bundle.new_engine(), _SAMPLE)
    final_seen: dict[str, WordHypothesis] = {}
    revisions: dict[str, int] = {}
    for diff in diffs:
        for word in diff.words:
            assert word.word_id not in final_seen, "a final word was published again"
            assert word.revision == revisions.get(word.word_id, -1) + 1
            revisions[word.word_id] = word.revision
            if word.final:
                final_seen[word.word_id] = word
    assert set(final_seen) == {f"w{i}" for i in range(len(_SAMPLE))}


def test_utterances_cover_the_words_and_clean_text_drops_disfluent_words(
        bundle: ModelBundle) -> None:
    diffs = _stream(bundle.new_engine(), _SAMPLE)
    latest = _latest(diffs)
    texts = {f"w{i}": text for i, (_, text) in enumerate(_SAMPLE)}
    utterances = {}
    for diff in diffs:
        for utterance in diff.utterances:
            utterances[utterance.utterance_id] = utterance
    live = [u for u in utterances.values() if u.word_ids]
    assert all(u.final for u in utterances.values())
    covered = [w for u in live for w in u.word_ids]
    assert sorted(covered) == sorted(texts), "each word in exactly one utterance"
    for u in live:
        assert {latest[w].speaker for w in u.word_ids} == {u.speaker}
        expected = [texts[w] for w in u.word_ids
                    if latest[w].label not in REMOVED_FROM_CLEAN_TEXT]
        assert u.clean_text == " ".join(expected)


def test_protocol_errors_name_the_word(bundle: ModelBundle) -> None:
    engine = bundle.new_engine()
    engine.add_word("w1", Word(text="hello", speaker="A"))
    with pytest.raises(EventError, match="'w1' was already used"):
        engine.add_word("w1", Word(text="again", speaker="A"))
    with pytest.raises(EventError, match="no such word"):
        engine.replace_word("nope", Word(text="x", speaker="A"))
    with pytest.raises(EventError, match="no speech content"):
        engine.add_word("w2", Word(text="<laughter>", speaker="A"))
    with pytest.raises(EventError, match="from speaker 'A' to 'B'"):
        engine.replace_word("w1", Word(text="hi", speaker="B"))
    engine.finish()
    with pytest.raises(EventError, match="has ended"):
        engine.add_word("w3", Word(text="late", speaker="A"))


def test_correcting_a_final_word_is_refused(bundle: ModelBundle) -> None:
    engine = bundle.new_engine()
    engine.add_word("w0", Word(text="okay", speaker="A"))
    engine.hint("A", turn_end=True)
    with pytest.raises(EventError, match="already final"):
        engine.withdraw_word("w0")


def test_withdrawn_word_disappears(bundle: ModelBundle) -> None:
    engine = bundle.new_engine()
    engine.add_word("w0", Word(text="we", speaker="A"))
    engine.add_word("w1", Word(text="have", speaker="A"))
    diff = engine.withdraw_word("w1")
    assert diff.withdrawn_word_ids == ("w1",)
    rest = [engine.add_word("w2", Word(text="bought", speaker="A")), engine.finish()]
    assert "w1" not in _latest(rest)
    utterance_words = {w for d in rest for u in d.utterances for w in u.word_ids}
    assert "w1" not in utterance_words


def test_a_replaced_word_reaches_its_utterance_even_when_no_tag_moves(
        bundle: ModelBundle) -> None:
    # The recogniser corrects the last word of a fluent utterance: its tags may well stay as
    # they were, but the utterance's clean text must follow the new text at once.
    engine = bundle.new_engine()
    for i, text in enumerate(["we", "have", "two", "dogs"]):
        engine.add_word(f"w{i}", Word(text=text, speaker="A"))
    diff = engine.replace_word("w3", Word(text="cats", speaker="A"))
    assert [u.clean_text for u in diff.utterances if "w3" in u.word_ids] == ["we have two cats"]


def test_a_word_is_republished_only_when_what_it_carries_changed(bundle: ModelBundle) -> None:
    # The decoder reports a word again when only its utterance-end decision moved; subscribers
    # must not get a revision that changes nothing but a confidence by less than the step
    # (EngineConfig.confidence_step).
    engine = bundle.new_engine()
    step = EngineConfig().confidence_step
    words = [(s, t) for s, t in _SAMPLE] * 6
    latest: dict[str, WordHypothesis] = {}
    revisions = 0
    for diff in _stream(engine, words):
        for word in diff.words:
            before = latest.get(word.word_id)
            if before is not None:
                revisions += 1
                assert (before.label != word.label or before.final != word.final
                        or before.reparandum_of != word.reparandum_of
                        or before.interruption_point != word.interruption_point
                        or abs(before.confidence - word.confidence) >= step), (before, word)
            latest[word.word_id] = word
    assert revisions >= len(words)  # every word was at least made final once


def test_hint_finalises_the_speakers_open_words(bundle: ModelBundle) -> None:
    engine = bundle.new_engine()
    diffs = [engine.add_word(f"w{i}", Word(text=t, speaker="A"))
             for i, t in enumerate(["we", "have", "two", "dogs"])]
    diffs.append(engine.hint("A", turn_end=False))
    latest = _latest(diffs)
    assert all(w.final for w in latest.values())
    assert any(u.final and u.word_ids == ("w0", "w1", "w2", "w3")
               for u in diffs[-1].utterances) or all(
        u.final for u in diffs[-1].utterances)


def test_memory_stays_bounded_however_long_the_speaker_talks(bundle: ModelBundle) -> None:
    engine = bundle.new_engine()
    words = ["we", "have", "two", "dogs", "and", "uh", "they", "are", "old"]
    for i in range(3000):
        engine.add_word(f"w{i}", Word(text=words[i % len(words)], speaker="A"))
    # Open words: at most the decoder's lag plus one unfinished utterance of the documented
    # maximum length.
    assert engine.open_word_count <= 6 + 80 + 1


_events = st.lists(
    st.one_of(
        st.tuples(st.just("add"), st.sampled_from("AB"),
                  st.sampled_from(["i", "uh", "we", "the", "have", "yes", "um", "dogs", "no"])),
        st.tuples(st.just("replace"), st.integers(0, 30), st.sampled_from(["he", "uh"])),
        st.tuples(st.just("withdraw"), st.integers(0, 30), st.just("")),
        st.tuples(st.just("hint"), st.sampled_from("AB"), st.booleans()),
    ),
    max_size=40,
)


@settings(max_examples=60, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(events=_events)
def test_random_event_streams_keep_the_invariants(
        bundle: ModelBundle, events: list[tuple[str, Any, Any]]) -> None:
    engine = bundle.new_engine()
    diffs: list[HypothesisDiff] = []
    added: dict[str, str] = {}
    texts: dict[str, str] = {}
    withdrawn: set[str] = set()
    for n, (kind, a, b) in enumerate(events):
        try:
            if kind == "add":
                diffs.append(engine.add_word(f"w{n}", Word(text=b, speaker=a)))
                added[f"w{n}"] = a
                texts[f"w{n}"] = b
            elif kind == "replace":
                target = f"w{a}"
                diffs.append(engine.replace_word(target, Word(text=b,
                                                              speaker=added.get(target, "A"))))
                texts[target] = b
            elif kind == "withdraw":
                diffs.append(engine.withdraw_word(f"w{a}"))
                withdrawn.add(f"w{a}")
            else:
                diffs.append(engine.hint(a, turn_end=b))
        except EventError:
            continue
    diffs.append(engine.finish())
    final: dict[str, DisfluencyLabel] = {}
    for diff in diffs:
        for word in diff.words:
            assert word.word_id not in final, "a final word changed"
            if word.final:
                final[word.word_id] = word.label
    assert set(final) == set(added) - withdrawn
    # Each utterance's last published clean text is its words' latest texts (replacements
    # included) less the disfluent ones.
    utterances = {u.utterance_id: u for diff in diffs for u in diff.utterances}
    for utterance in utterances.values():
        expected = [texts[w] for w in utterance.word_ids
                    if final[w] not in REMOVED_FROM_CLEAN_TEXT]
        assert utterance.clean_text == " ".join(expected)


def test_a_coarse_model_beside_the_fine_one_decides_the_function(
        tmp_path: Path) -> None:
    words = train_word_artifact(invented_corpus(20),
                                WordTrainingConfig(max_iterations=40, min_freq=1))
    save_artifact(words, tmp_path / "words.tagger")
    fine, coarse = tiny_model("swbd42"), tiny_model("coarse", partner=True)
    save_artifact(fine, tmp_path / "functions-swbd42.tagger")
    save_artifact(coarse, tmp_path / "functions-coarse.tagger")
    loaded = ModelBundle.load_directory(tmp_path)
    assert loaded.function_tagger.scheme == "swbd42"
    assert loaded.coarse_tagger.scheme == "coarse"
    assert [i.name for i in loaded.describe()] == [
        "words.tagger", "functions-swbd42.tagger", "functions-coarse.tagger"]
    coarse_tagger = FunctionTagger.from_artifact(coarse)
    fine_tagger = FunctionTagger.from_artifact(fine)
    engine = loaded.new_engine()
    final = {u.utterance_id: u for diff in _stream(engine, _SAMPLE) for u in diff.utterances}
    # Each published utterance: the fine class from the fine model and the function from the
    # coarse one, both over the context the engine kept (the final utterances before it).
    published = [u for u in final.values() if u.word_ids]
    views = engine.context
    assert 2 <= len(published) == len(views) <= coarse_tagger.context
    position = {view.words: i for i, view in enumerate(views)}
    for utterance in published:
        i = position[tuple(utterance.clean_text.split())]
        window, view = list(views[:i]), views[i]
        assert utterance.function == coarse_tagger.label_partial(window, view).function
        assert utterance.fine_class == fine_tagger.label_partial(window, view).label
    # Alone, the fine model gives both, as before.
    (tmp_path / "functions-coarse.tagger").unlink()
    assert ModelBundle.load_directory(tmp_path).coarse_tagger.scheme == "swbd42"
