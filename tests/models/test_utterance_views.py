"""One utterance view for training and serving (models/functions/_views.py ``build_view``).

The function model is trained on views built from a corpus's words and gold disfluency labels;
the live engine builds them from the recogniser's words and the word tagger's labels. Both must
apply the same rule, and both must put the same utterances on the context chain, or the model is
served something it never saw.
"""

from __future__ import annotations

from importlib import resources
from pathlib import Path

import pytest
from function_kit import tiny_model
from midstream import Conversation, DisfluencyLabel, Utterance, UtteranceHypothesis, Word
from midstream.corpora import read_corpus
from midstream.models import ModelBundle
from midstream.models._artifact import save_artifact
from midstream.models.functions._views import (
    NO_PARTNER_YET,
    UtteranceView,
    build_view,
    conversation_views,
)

F = DisfluencyLabel.FLUENT


def test_build_view_drops_fragments_uncounted_and_disfluent_words_counted() -> None:
    view = build_view("A", [("i", False, F), ("w", True, F), ("uh", False, DisfluencyLabel.FILLER),
                            ("went", False, F), ("", False, F)], complete=False)
    assert view == UtteranceView(speaker="A", words=("i", "went"), removed=1, complete=False)
    # Without disfluency labels every word is kept, but a fragment still is not.
    assert build_view("B", [("so", False, None), ("th", True, None)], complete=True).words == (
        "so",)


def test_build_view_names_a_removed_opening_filler_or_editing_term() -> None:
    # "sorry which day": the editing term is cleaned away, but which word opened the utterance
    # is what tells a repetition request, so the view keeps it.
    edit = DisfluencyLabel.EDIT_TERM
    view = build_view("B", [("sorry", False, edit), ("which", False, F), ("day", False, F)],
                      complete=True)
    assert (view.words, view.removed, view.opening) == (("which", "day"), 1, "sorry")
    # A fragment before it is not a word a recogniser gives; the opening is still "sorry".
    assert build_view("B", [("s", True, F), ("sorry", False, edit)], complete=False).opening == (
        "sorry")
    # Only the first word counts, and only as a filler or editing term: a removed reparandum
    # opening the utterance, or an editing term later on, is no opening.
    assert build_view("B", [("which", False, F), ("sorry", False, edit)],
                      complete=True).opening == ""
    assert build_view("B", [("i", False, DisfluencyLabel.REPARANDUM), ("we", False, F)],
                      complete=True).opening == ""
    # The prefix of a growing utterance keeps it.
    assert view.prefix(1).opening == "sorry"


def _stream_with_gold_ends(bundle: ModelBundle, conversation: Conversation) -> tuple[
        list[UtteranceHypothesis], dict[str, DisfluencyLabel],
        list[tuple[int, tuple[UtteranceView, ...]]]]:
    """Stream the words, hinting each gold utterance end; the final utterances in the order they
    became final, every word's final label, and after each event the engine's context with the
    number of utterances final by then."""
    last_word = {u.words[-1] for u in conversation.utterances if u.words}
    engine = bundle.new_engine()
    finals: list[UtteranceHypothesis] = []
    labels: dict[str, DisfluencyLabel] = {}
    contexts: list[tuple[int, tuple[UtteranceView, ...]]] = []

    def take(diff_utterances: tuple[UtteranceHypothesis, ...]) -> None:
        finals.extend(u for u in diff_utterances if u.final and u.word_ids)
        contexts.append((len(finals), engine.context))

    for i, word in enumerate(conversation.words):
        diff = engine.add_word(f"w{i}", word)
        labels.update({w.word_id: w.label for w in diff.words})
        take(diff.utterances)
        if i in last_word:
            diff = engine.hint(word.speaker, turn_end=False)
            labels.update({w.word_id: w.label for w in diff.words})
            take(diff.utterances)
    diff = engine.finish()
    labels.update({w.word_id: w.label for w in diff.words})
    take(diff.utterances)
    return finals, labels, contexts


def _streamed_and_offline(bundle: ModelBundle, conversation: Conversation) -> tuple[
        list[UtteranceView], list[tuple[int, tuple[UtteranceView, ...]]]]:
    """Stream ``conversation`` with its gold ends hinted; the views of the same conversation
    offline, as training reads one (the streamed segmentation and the streamed disfluency
    labels, in the order the utterances became final), and the engine's contexts."""
    finals, labels, contexts = _stream_with_gold_ends(bundle, conversation)
    offline = Conversation(
        id=conversation.id, corpus=conversation.corpus, words=conversation.words,
        labels=tuple(labels[f"w{i}"] for i in range(len(conversation.words))),
        utterances=tuple(
            Utterance(speaker=u.speaker, words=tuple(int(w[1:]) for w in u.word_ids),
                      function=u.function, fine_tag=u.fine_class, fine_class=u.fine_class)
            for u in finals))
    views = conversation_views(offline)
    assert len(views) == len(finals)
    return views, contexts


@pytest.mark.corpus
def test_corpus_conversation_has_the_same_views_and_contexts_offline_and_streamed(
        swda_dir: Path) -> None:
    # A SwDA val conversation (Jurafsky, Shriberg & Biasca 1997) with word fragments and
    # filler-only utterances ("uh"): the two places the engine's view used to differ.
    def gold_differences(c: Conversation) -> bool:
        views = conversation_views(c)
        return (any(w.fragment for w in c.words)
                and any(not v.words and v.removed for v in views))
    conversation = next(c for c in read_corpus(swda_dir, split="val")
                        if len(c.words) <= 900 and gold_differences(c))
    bundle = ModelBundle.load_default()
    views, contexts = _streamed_and_offline(bundle, conversation)
    assert len(views) > 20
    context = bundle.function_tagger.context
    for done, streamed in contexts:
        assert streamed == tuple(views[:done][-context:])
    # The case that used to differ was there: an utterance left empty by cleaning, which the
    # engine once kept off the chain that training puts it on.
    assert any(not v.words for v in views[:contexts[-1][0]])


def _opening_of(conversation: Conversation, words: int) -> Conversation:
    """The conversation's first utterances, up to the first point after ``words`` words where
    no utterance is open (meetings interleave their speakers' utterances)."""
    spans = sorted((min(u.words), max(u.words)) for u in conversation.utterances if u.words)
    cut, reach = 0, -1
    for first, last in spans:
        if first > reach and first >= words:
            cut = first
            break
        reach = max(reach, last)
    assert cut, "the conversation is shorter than asked"
    return Conversation(
        id=conversation.id, corpus=conversation.corpus, words=conversation.words[:cut],
        labels=None if conversation.labels is None else conversation.labels[:cut],
        utterances=tuple(u for u in conversation.utterances if u.words and max(u.words) < cut))


@pytest.fixture(scope="module")
def timing_bundle(tmp_path_factory: pytest.TempPathFactory) -> ModelBundle:
    """The shipped models with a coarse function model that reads timing (the engine reads
    the partner gap only for a model that uses it)."""
    folder = tmp_path_factory.mktemp("timing-models")
    shipped = resources.files("midstream.models") / "weights"
    for name in ("words.tagger", "boundaries.tagger", "functions-swbd42.tagger"):
        (folder / name).write_bytes((shipped / name).read_bytes())
    save_artifact(tiny_model("coarse", partner=True, opening=True, timing=True),
                  folder / "functions-coarse.tagger")
    return ModelBundle.load_directory(folder)


@pytest.mark.corpus
def test_timed_meeting_has_the_same_partner_gaps_offline_and_streamed(
        mrda_dir: Path, timing_bundle: ModelBundle) -> None:
    # An MRDA val meeting (Shriberg et al. 2004) with its word times, fed in its word order as
    # a recogniser would: the gap each utterance's view reads from the other speakers' talk
    # must be the one training read offline from the whole conversation.
    conversation = _opening_of(next(iter(read_corpus(mrda_dir, split="val"))), 600)
    views, contexts = _streamed_and_offline(timing_bundle, conversation)
    context = timing_bundle.function_tagger.context
    for done, streamed in contexts:
        assert streamed == tuple(views[:done][-context:])
    gaps = [v.partner_gap for v in views if v.partner_gap is not None]
    assert len(gaps) == len(views)
    # Meetings overlap: some utterances start over another speaker, others after a gap.
    assert min(gaps) < 0 < max(gaps)


def _gap_after_a_revision(bundle: ModelBundle, revise: str) -> float | None:
    """B's "yeah" at 1.0 s after A's "so" (0.0-0.3 s), once A's word was revised as ``revise``
    says: the partner gap of B's finished utterance."""
    engine = bundle.new_engine()
    engine.add_word("a", Word(text="so", speaker="A", start=0.0, end=0.3))
    engine.add_word("b", Word(text="yeah", speaker="B", start=1.0, end=1.2))
    if revise == "longer":
        engine.replace_word("a", Word(text="so", speaker="A", start=0.0, end=0.9))
    elif revise == "withdrawn":
        engine.withdraw_word("a")
    engine.hint("B", turn_end=True)
    return next(v.partner_gap for v in engine.context if v.speaker == "B")


def test_the_gap_follows_the_recognisers_revisions(timing_bundle: ModelBundle) -> None:
    assert _gap_after_a_revision(timing_bundle, "none") == pytest.approx(0.7)
    # A revised end time moves the gap; a withdrawn word no longer counts as the partner's talk.
    assert _gap_after_a_revision(timing_bundle, "longer") == pytest.approx(0.1)
    assert _gap_after_a_revision(timing_bundle, "withdrawn") == NO_PARTNER_YET


def test_the_engine_reads_no_timing_for_models_without_it() -> None:
    # The shipped coarse model has no timing features: its views stay untimed, and the search
    # of the other speakers' times is not made.
    engine = ModelBundle.load_default().new_engine()
    engine.add_word("a", Word(text="so", speaker="A", start=0.0, end=0.3))
    engine.hint("A", turn_end=True)
    engine.add_word("b", Word(text="yeah", speaker="B", start=0.5, end=0.8))
    engine.hint("B", turn_end=True)
    assert [v.partner_gap for v in engine.context] == [None, None]


def test_engine_context_keeps_utterances_left_empty_by_cleaning() -> None:
    bundle = ModelBundle.load_default()
    engine = bundle.new_engine()
    turns = [("A", ("uh",)), ("B", ("right",)), ("A", ("we", "went"))]
    for speaker, texts in turns:
        for text in texts:
            engine.add_word(f"{speaker}{text}", Word(text=text, speaker=speaker))
        engine.hint(speaker, turn_end=True)
    engine.finish()
    words = [v.words for v in engine.context]
    # "uh" alone is a filled pause: nothing left to label, but it stays on the chain as in
    # training, where every corpus utterance is one position of the chain.
    assert words == [(), ("right",), ("we", "went")]
