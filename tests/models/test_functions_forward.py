"""label_partial's compiled forward step against crfsuite, the reference, under any caching.

``FunctionTagger.label_partial`` does not call crfsuite; it runs crfsuite's forward and Viterbi
recursions from the model's weights in compiled kernels and caches what does not change from
word to word. Here every result is held to crfsuite itself (``CrfTagger.tag_with_marginals``
over the same window, features from ``sequence_features``) within ``TOLERANCE``: marginals
within it, and the Viterbi label crfsuite's unless the two labels' final scores are within it
(a tie the two may break apart), over SwDA validation prefixes (the corpus
annotation gives realistic views) and over invented views built to hit the corners: repeated
n-grams, words that look like the begin/end markers or contain the n-gram separator, empty
and over-long utterances, speaker changes, unknown words.
"""

from __future__ import annotations

import threading
from collections.abc import Iterator, Sequence
from pathlib import Path

import pytest
from function_kit import invented_conversation, tiny_model
from hypothesis import given, settings
from hypothesis import strategies as st
from midstream import InputError
from midstream.corpora import read_corpus
from midstream.models._artifact import ModelArtifact, load_artifact
from midstream.models._crf import CrfTagger
from midstream.models.functions._features import MAX_FEATURE_WORDS, sequence_features
from midstream.models.functions._inference import TOLERANCE
from midstream.models.functions._tagger import (
    NGRAM_CACHE_SIZE,
    SHARED_WORDS,
    WINDOW_CACHE_SIZE,
    WORDS_MEMO_SIZE,
    ContextWindow,
    FunctionGuess,
    FunctionTagger,
    WordsMemo,
)
from midstream.models.functions._views import UtteranceView, clean_view, conversation_views

SHIPPED = Path(__file__).resolve().parents[2] / "models" / "weights" / "functions-swbd42.tagger"

@pytest.fixture(scope="module")
def shipped() -> ModelArtifact:
    return load_artifact(SHIPPED, expected_kind="utterance_functions")


@pytest.fixture(scope="module")
def tiny_fine() -> ModelArtifact:
    return tiny_model("swbd42")


@pytest.fixture(scope="module")
def tiny_coarse() -> ModelArtifact:
    # With the partner, opening, look-back and timing features: every path must agree on them
    # (the invented conversations open some utterances with a removed "uh" and are timed, and
    # the hypothesis views below repeat speakers, so earlier partners are looked for and slide
    # out of windows, and carry partner gaps of every class, or none).
    return tiny_model("coarse", partner=True, opening=True, lookback=True, timing=True)


def crfsuite_reference(crf: CrfTagger, tagger: FunctionTagger,
                       context: Sequence[UtteranceView],
                       current: UtteranceView) -> tuple[str, dict[str, float]]:
    """What the tagger decoded through crfsuite before: the window plus current, last item."""
    window = list(context[-tagger.context:]) if tagger.context else []
    labels, marginals = crf.tag_with_marginals(
        sequence_features([*window, current], tagger.config))
    return labels[-1], marginals


def assert_agrees(tagger: FunctionTagger, crf: CrfTagger, context: Sequence[UtteranceView],
                  current: UtteranceView) -> None:
    label, marginals = crfsuite_reference(crf, tagger, context, current)
    step = tagger._decode_partial(context, current)
    scores = step.scores.tolist()
    # The fast path's Viterbi label is the best of its own final scores (the first of equals)...
    assert scores[step.label] == max(scores)
    assert scores.index(max(scores)) == step.label
    # ...and crfsuite's, unless crfsuite's label scores within the tolerance of it (log space).
    tied = scores[step.label] - scores[tagger.labels.index(label)] <= TOLERANCE
    assert tagger.labels[step.label] == label or tied, (label, scores)
    assert list(tagger.labels) == list(marginals)
    for name, p in zip(tagger.labels, step.marginals.tolist(), strict=True):
        assert abs(p - marginals[name]) <= TOLERANCE, (name, p, marginals[name])
    if tagger.labels[step.label] == label:
        guess = tagger.label_partial(context, current)
        assert_same_guess(guess, tagger._guess(label, marginals))


def assert_same_guess(got: FunctionGuess, want: FunctionGuess) -> None:
    assert (got.label, got.function) == (want.label, want.function)
    assert abs(got.confidence - want.confidence) <= TOLERANCE
    assert abs(got.function_confidence - want.function_confidence) <= TOLERANCE


def streamed_calls(views: Sequence[UtteranceView], context: int
                   ) -> Iterator[tuple[list[UtteranceView], UtteranceView]]:
    """(context, prefix) pairs as a stream makes them: every cleaned prefix of every utterance."""
    for i, view in enumerate(views):
        window = list(views[max(0, i - context):i])
        for n in range(len(view.words) + 1):
            yield window, view.prefix(n)


# --- SwDA validation prefixes ----------------------------------------------------------------


@pytest.mark.corpus
@pytest.mark.slow
def test_shipped_model_agrees_with_crfsuite_on_swda_val_prefixes(
        swda_dir: Path, shipped: ModelArtifact) -> None:
    # The shipped 42-class model over every word-by-word prefix of the first 6 validation
    # conversations (views cleaned with the corpus's gold disfluency annotation), about 8,000
    # calls: what the engine asks after each word.
    tagger = FunctionTagger.from_artifact(shipped)
    crf = CrfTagger.from_bytes(shipped.crf)
    calls = 0
    for n, conversation in enumerate(read_corpus(swda_dir, split="val")):
        if n == 6:
            break
        views = conversation_views(conversation)
        for i, utterance in enumerate(conversation.utterances):
            context = views[max(0, i - tagger.context):i]
            for k in range(1, len(utterance.words) + 1):
                assert_agrees(tagger, crf, context, clean_view(conversation, utterance, upto=k))
                calls += 1
    assert calls > 5000


@pytest.mark.corpus
def test_tiny_models_agree_with_crfsuite_on_swda_val_prefixes(
        swda_dir: Path, tiny_fine: ModelArtifact, tiny_coarse: ModelArtifact) -> None:
    # Models trained on invented data see SwDA words mostly as unknown: the context and the
    # shape features carry the decision, another corner of the arithmetic.
    conversation = next(iter(read_corpus(swda_dir, split="val")))
    views = conversation_views(conversation)[:60]
    for artifact in (tiny_fine, tiny_coarse):
        tagger = FunctionTagger.from_artifact(artifact)
        crf = CrfTagger.from_bytes(artifact.crf)
        for context, current in streamed_calls(views, tagger.context):
            assert_agrees(tagger, crf, context, current)


# --- invented views ---------------------------------------------------------------------------

# Words the n-gram bookkeeping could confuse: marker look-alikes, the separator, repeats.
_VOCABULARY = ("do", "you", "have", "kids", "yes", "yeah", "uh-huh", "we", "i", "think",
               "<s>", "</s>", "a|b", "a", "b", "=", "zyzzyva")

_views = st.builds(
    UtteranceView,
    speaker=st.sampled_from(("A", "B")),
    words=st.one_of(
        st.lists(st.sampled_from(_VOCABULARY), max_size=8).map(tuple),
        st.lists(st.sampled_from(_VOCABULARY[:6]), min_size=MAX_FEATURE_WORDS - 1,
                 max_size=MAX_FEATURE_WORDS + 3).map(tuple)),
    removed=st.integers(min_value=0, max_value=4),
    complete=st.booleans(),
    # A known opening, one the model never saw, none.
    opening=st.sampled_from(("", "uh", "zyzzyva")),
    # Untimed, each timing class (gap_bucket), no partner yet.
    partner_gap=st.sampled_from((None, -1.0, -0.2, 0.1, 0.6, 1.5, 4.0, float("inf"))),
)


@pytest.fixture(scope="module")
def three_taggers(shipped: ModelArtifact, tiny_fine: ModelArtifact, tiny_coarse: ModelArtifact
                  ) -> list[tuple[FunctionTagger, CrfTagger]]:
    # Shared by all examples, so their caches fill up across examples as in a long session.
    return [(FunctionTagger.from_artifact(a), CrfTagger.from_bytes(a.crf))
            for a in (shipped, tiny_fine, tiny_coarse)]


@settings(max_examples=120, deadline=None)
@given(context=st.lists(_views, max_size=6), current=_views)
def test_invented_views_agree_with_crfsuite(
        context: list[UtteranceView], current: UtteranceView,
        three_taggers: list[tuple[FunctionTagger, CrfTagger]]) -> None:
    for tagger, crf in three_taggers:
        assert_agrees(tagger, crf, context, current)
        # Word by word, as a stream grows the utterance (the n-gram rows are then extended
        # from the previous prefix's entry rather than built afresh).
        for n in range(len(current.words) + 1):
            assert_agrees(tagger, crf, context, current.prefix(n))


def test_other_context_lengths_agree_with_crfsuite(tiny_fine: ModelArtifact) -> None:
    views = conversation_views(invented_conversation(60))
    crf = CrfTagger.from_bytes(tiny_fine.crf)
    for context in (0, 1, 7):
        tagger = FunctionTagger.from_artifact(tiny_fine, context=context)
        for window, current in streamed_calls(views, context + 2):
            assert_agrees(tagger, crf, window, current)


def test_timed_views_agree_with_crfsuite(tiny_coarse: ModelArtifact) -> None:
    views = conversation_views(invented_conversation(67, timed=True))
    # Every kind of start is there: over the partner, after a gap, before anyone else spoke.
    gaps = [v.partner_gap for v in views]
    assert min(g for g in gaps if g is not None) < 0 < max(g for g in gaps if g is not None)
    tagger = FunctionTagger.from_artifact(tiny_coarse)
    crf = CrfTagger.from_bytes(tiny_coarse.crf)
    assert tagger.config.timing
    for context, current in streamed_calls(views, tagger.context):
        assert_agrees(tagger, crf, context, current)


def test_coarse_from_label_setting_agrees_with_crfsuite(tiny_fine: ModelArtifact) -> None:
    tagger = FunctionTagger.from_artifact(tiny_fine, coarse_from="label")
    crf = CrfTagger.from_bytes(tiny_fine.crf)
    for context, current in streamed_calls(conversation_views(invented_conversation(61)), 4):
        assert_agrees(tagger, crf, context, current)


# --- caches -------------------------------------------------------------------------------


def test_caches_never_change_an_answer(tiny_fine: ModelArtifact) -> None:
    # Two conversations interleaved word by word on one tagger (two engines sharing it), views
    # rebuilt as equal but new objects, and the same calls replayed backwards, all give what a
    # fresh tagger gives for each call alone.
    shared = FunctionTagger.from_artifact(tiny_fine)
    first = list(streamed_calls(conversation_views(invented_conversation(62)), 4))
    second = list(streamed_calls(conversation_views(invented_conversation(63)), 4))
    interleaved = [call for pair in zip(first, second, strict=False) for call in pair]
    rebuilt = [([UtteranceView(speaker=v.speaker, words=tuple(v.words), removed=v.removed,
                               complete=v.complete) for v in context], current)
               for context, current in first]
    for calls in (interleaved, rebuilt, list(reversed(interleaved))):
        for context, current in calls:
            alone = FunctionTagger.from_artifact(tiny_fine).label_partial(context, current)
            assert shared.label_partial(context, current) == alone


def test_a_kept_context_window_answers_as_crfsuite_after_the_shared_caches_moved_on(
        tiny_fine: ModelArtifact) -> None:
    # What the engine does: it keeps the window of its last final utterances and labels every
    # word's growing utterance after it, while other conversations push the window out of the
    # tagger's shared caches. Reference: crfsuite over the same window (crfsuite_reference).
    tagger = FunctionTagger.from_artifact(tiny_fine)
    crf = CrfTagger.from_bytes(tiny_fine.crf)
    views = conversation_views(invented_conversation(64))
    context, current = views[:6], views[6]
    kept = tagger.context_window(context)
    assert kept.views == tuple(context[-tagger.context:])
    for i in range(WINDOW_CACHE_SIZE + 10):  # other conversations' windows evict this one
        tagger.context_window([UtteranceView(speaker="A", words=("so", f"w{i}"))])
    for n in range(1, len(current.words) + 1):
        prefix = current.prefix(n)
        label, marginals = crfsuite_reference(crf, tagger, context, prefix)
        assert_same_guess(tagger.label_built(kept, prefix), tagger._guess(label, marginals))
    assert tagger.context_window([]).views == ()


def test_a_callers_memo_keeps_answers_exact_and_stays_bounded(tiny_fine: ModelArtifact) -> None:
    # An engine's own memo of feature rows: its utterances grow from their previous words'
    # rows even when the shared cache has dropped them; the answers stay crfsuite's
    # (crfsuite_reference) and the memo never holds more than its documented size.
    tagger = FunctionTagger.from_artifact(tiny_fine)
    crf = CrfTagger.from_bytes(tiny_fine.crf)
    memo = WordsMemo()
    views = conversation_views(invented_conversation(65))
    kept = tagger.context_window(views[:3])
    current = views[3]
    for n in range(1, len(current.words) + 1):
        for i in range(NGRAM_CACHE_SIZE + 5):  # other callers flood the shared cache
            tagger._words_of(("flood", f"w{i}"))
        prefix = current.prefix(n)
        # The previous words' rows are still at hand for the new word to extend.
        assert n == 1 or memo.find(prefix.words[:-1]) is not None
        label, marginals = crfsuite_reference(crf, tagger, views[:3], prefix)
        assert_same_guess(tagger.label_built(kept, prefix, memo),
                          tagger._guess(label, marginals))
        assert len(memo._entries) <= WORDS_MEMO_SIZE


def test_a_caller_with_a_memo_shares_only_short_word_sequences(
        tiny_fine: ModelArtifact) -> None:
    # An engine's long utterances are its own: they stay out of the cache other conversations
    # use (so they cannot push out the short ones many conversations say), and the answers
    # stay crfsuite's (crfsuite_reference).
    tagger = FunctionTagger.from_artifact(tiny_fine)
    crf = CrfTagger.from_bytes(tiny_fine.crf)
    memo = WordsMemo()
    words = ("so", "we", "went", "to", "the", "lake", "again")
    for n in range(1, len(words) + 1):
        prefix = UtteranceView(speaker="A", words=words[:n], complete=n == len(words))
        label, marginals = crfsuite_reference(crf, tagger, [], prefix)
        assert_same_guess(tagger.label_built(tagger.context_window([]), prefix, memo),
                          tagger._guess(label, marginals))
        assert (tagger._words.peek(words[:n]) is not None) == (n <= SHARED_WORDS)


def assert_same_window(got: ContextWindow, want: ContextWindow) -> None:
    assert got.views == want.views
    if want.carry is None:
        assert got.carry is None
        return
    assert got.carry is not None
    # Bit for bit: the same kernel over the same rows, so any difference is a wrong row.
    assert got.carry.forward.tolist() == want.carry.forward.tolist()
    assert got.carry.best.tolist() == want.carry.best.tolist()
    assert (got.carry.same, got.carry.other) == (want.carry.same, want.carry.other)


def test_a_slid_window_is_the_window_of_its_views_and_labels_as_crfsuite(
        tiny_fine: ModelArtifact, tiny_coarse: ModelArtifact) -> None:
    # What the engine does when an utterance becomes final: the window it keeps slides on by
    # that utterance, summed from the rows the window kept. It must be the window
    # context_window makes of the same views, and what follows it must label as crfsuite does
    # over those views (crfsuite_reference), at several context lengths.
    views = conversation_views(invented_conversation(66))
    for artifact, context in ((tiny_fine, 4), (tiny_coarse, 4), (tiny_fine, 1), (tiny_fine, 7),
                              (tiny_fine, 0)):
        tagger = FunctionTagger.from_artifact(artifact, context=context)
        crf = CrfTagger.from_bytes(artifact.crf)
        memo = WordsMemo()
        window = tagger.context_window([])
        for i, view in enumerate(views[:-1]):
            tagger.label_built(window, view, memo)  # as the engine labels it before it is final
            window = tagger.extend_window(window, view, memo)
            assert_same_window(window, tagger.context_window(views[:i + 1]))
            following = views[i + 1]
            for n in (1, len(following.words)):
                prefix = following.prefix(n)
                label, marginals = crfsuite_reference(crf, tagger, views[:i + 1], prefix)
                assert_same_guess(tagger.label_built(window, prefix, memo),
                                  tagger._guess(label, marginals))


@settings(max_examples=60, deadline=None)
@given(views=st.lists(_views, min_size=1, max_size=9))
def test_invented_views_slide_into_the_same_windows(
        views: list[UtteranceView], three_taggers: list[tuple[FunctionTagger, CrfTagger]]) -> None:
    # Any views, speakers changing or not, long and empty ones: sliding equals building afresh.
    for tagger, _ in three_taggers:
        window = tagger.context_window([])
        for i, view in enumerate(views):
            window = tagger.extend_window(window, view)
            assert_same_window(window, tagger.context_window(views[:i + 1]))


def test_a_window_not_made_by_sliding_still_slides(tiny_fine: ModelArtifact) -> None:
    tagger = FunctionTagger.from_artifact(tiny_fine)
    views = conversation_views(invented_conversation(67))
    made = tagger.context_window(views[:5])  # keeps no rows: sliding falls back to building
    assert_same_window(tagger.extend_window(made, views[5]), tagger.context_window(views[:6]))


def test_caches_stay_within_their_documented_sizes(tiny_fine: ModelArtifact) -> None:
    # More distinct windows and word sequences than the caches hold (bounded memory however
    # many conversations share the tagger).
    tagger = FunctionTagger.from_artifact(tiny_fine)
    views = [UtteranceView(speaker="AB"[i % 2], words=("we", "have", f"w{i}"))
             for i in range(WINDOW_CACHE_SIZE + 40)]
    for i in range(1, len(views)):
        tagger.label_partial(views[max(0, i - 4):i], views[i])
    for i in range(NGRAM_CACHE_SIZE // 3 + 20):
        tagger.label_partial([], UtteranceView(speaker="A", words=("x", "y", f"z{i}")))
    assert len(tagger._carries) <= WINDOW_CACHE_SIZE
    assert len(tagger._recent) <= WINDOW_CACHE_SIZE
    assert len(tagger._context_rows) <= WINDOW_CACHE_SIZE * (tagger.context + 1)
    assert len(tagger._words) <= NGRAM_CACHE_SIZE
    # Still right after evictions.
    crf = CrfTagger.from_bytes(tiny_fine.crf)
    assert_agrees(tagger, crf, views[:4], views[4])


def test_threads_sharing_a_tagger_get_the_single_threaded_answers(
        tiny_fine: ModelArtifact) -> None:
    calls = [call for seed in range(64, 68)
             for call in streamed_calls(conversation_views(invented_conversation(seed)), 4)]
    expected = [FunctionTagger.from_artifact(tiny_fine).label_partial(c, v) for c, v in calls]
    shared = FunctionTagger.from_artifact(tiny_fine)
    results: dict[int, list[FunctionGuess]] = {}

    def work(worker: int) -> None:
        order = calls if worker % 2 == 0 else list(reversed(calls))
        got = [shared.label_partial(c, v) for c, v in order]
        results[worker] = got if worker % 2 == 0 else list(reversed(got))

    threads = [threading.Thread(target=work, args=(w,)) for w in range(4)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert all(results[w] == expected for w in range(4))


# --- errors and the fallback -----------------------------------------------------------------


def test_malformed_context_views_are_refused_with_input_error(
        tiny_fine: ModelArtifact) -> None:
    tagger = FunctionTagger.from_artifact(tiny_fine)
    current = UtteranceView(speaker="B", words=("yes",))
    listed = UtteranceView(speaker="A", words=["do", "you"])  # type: ignore[arg-type]
    with pytest.raises(InputError, match="tuple of strings"):
        tagger.label_partial([listed], current)
    odd_speaker = UtteranceView(speaker=["A"], words=("do",))  # type: ignore[arg-type]
    with pytest.raises(InputError, match="hashable"):
        tagger.label_partial([odd_speaker], current)
    with pytest.raises(InputError, match="removed"):
        tagger.label_partial([UtteranceView(speaker="A", words=("do",), removed=-2)], current)
    with pytest.raises(InputError, match="UtteranceView"):
        tagger.label_partial(["do you"], current)  # type: ignore[list-item]


def test_an_overflow_in_the_compiled_step_hands_the_call_to_crfsuite(
        tiny_fine: ModelArtifact) -> None:
    # No trained model comes near exp's range (scores past 709). Weights far past it in the
    # tagger's own copy only (crfsuite keeps the trained ones): the compiled step must notice
    # the overflow and hand the call over, so that even then the answer is crfsuite's.
    tagger = FunctionTagger.from_artifact(tiny_fine)
    views = conversation_views(invented_conversation(69))
    expected = tagger.label_partial(views[:3], views[3])
    tagger._chain._state = tagger._chain._state * 1e4
    with pytest.raises(OverflowError):
        tagger._decode_partial(views[:3], views[3])
    assert tagger.label_partial(views[:3], views[3]) == expected
    # A window summed over the overflowing weights holds no recursions, and what follows it
    # is crfsuite's too.
    window = tagger.context_window(views[4:7])
    assert window.carry is None
    assert tagger.label_built(window, views[7]) == FunctionTagger.from_artifact(
        tiny_fine).label_partial(views[4:7], views[7])
