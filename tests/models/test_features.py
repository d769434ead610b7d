"""Word features: what they read, and that streaming pieces equal whole-sequence features."""

from __future__ import annotations

from hypothesis import given, settings
from hypothesis import strategies as st
from midstream import Conversation, Utterance, UtteranceFunction, Word
from midstream.models.words._classes import CLOSED_CLASSES
from midstream.models.words._features import FeatureConfig, Token, feature_piece, features_at
from midstream.models.words._tags import channel_sequences

CONFIG = FeatureConfig(lexicon={"uh": "F", "um": "F", "mean": "E", "well": "D"},
                       restart_span=5, word_classes=dict(CLOSED_CLASSES), break_ahead=True)

_token = st.builds(
    Token,
    text=st.sampled_from(["i", "the", "uh", "think", "a", "mean", "well", "s-", "go", "she",
                          "is", "was"]),
    fragment=st.booleans(),
    start=st.none() | st.floats(0, 100),
    end=st.none() | st.floats(0, 100),
    confidence=st.none() | st.floats(0, 1),
    after_other_speaker=st.booleans(),
)


def _tokens(text: str) -> list[Token]:
    return [Token(text=w) for w in text.split()]


@settings(max_examples=150, deadline=None)
@given(tokens=st.lists(_token, min_size=1, max_size=30), data=st.data())
def test_identical_windows_give_identical_features(
    tokens: list[Token], data: st.DataObject
) -> None:
    i = data.draw(st.integers(0, len(tokens) - 1))
    lo = max(0, i - CONFIG.left)
    hi = i + CONFIG.right + 1
    assert features_at(tokens[lo:hi], i - lo, CONFIG) == features_at(tokens, i, CONFIG)


@settings(max_examples=150, deadline=None)
@given(tokens=st.lists(_token, min_size=1, max_size=30), data=st.data())
def test_a_piece_reads_nothing_right_of_its_word(tokens: list[Token], data: st.DataObject) -> None:
    # What the streaming decoder computes when word i + k arrives must equal what training
    # computes with the whole channel known.
    i = data.draw(st.integers(0, len(tokens) - 1))
    k = data.draw(st.integers(0, min(CONFIG.right, len(tokens) - 1 - i)))
    copy = list(tokens)
    assert feature_piece(tokens[: i + k + 1], i, k, CONFIG) == feature_piece(tokens, i, k, CONFIG)
    assert tokens == copy


def test_repetition_marks_the_reparandum_not_the_repair() -> None:
    tokens = _tokens("so i think i think it works")
    first_think = features_at(tokens, 2, CONFIG)
    second_think = features_at(tokens, 4, CONFIG)
    assert "m0_2" in first_think and "lc2_2" in first_think
    assert "m0_2" not in second_think and "lm2" in second_think
    first_i = features_at(tokens, 1, CONFIG)
    assert "fc2_2" in first_i  # "i think" comes again two words later


def test_phrase_restart_marks_the_interruption_point() -> None:
    tokens = _tokens("i give them a uh i give them")
    assert "nx3" in features_at(tokens, 3, CONFIG)  # "a": the next content word is "i"
    assert not any(f.startswith("nx") for f in features_at(tokens, 7, CONFIG))
    off = FeatureConfig(lexicon=CONFIG.lexicon)
    assert not any(f.startswith("nx") for f in features_at(tokens, 3, off))


def test_interregnum_between_copies() -> None:
    tokens = _tokens("the uh the dog")
    assert "mskip" in features_at(tokens, 0, CONFIG)
    assert "lx+1=F" in features_at(tokens, 0, CONFIG)


def test_times_and_confidence_only_when_given() -> None:
    bare = features_at(_tokens("hello there"), 1, CONFIG)
    assert not any(f.startswith(("pb=", "pa=", "cf=")) for f in bare)
    timed = [Token(text="hello", start=0.0, end=0.4), Token(text="there", start=1.6, end=2.0,
                                                            confidence=0.95)]
    features = features_at(timed, 1, CONFIG)
    assert "pb=4" in features  # 1.2 s: at least 1.0 s, under 1.5 s
    assert "cf=4" in features
    assert "pos=0" in features  # a pause of at least GAP_SECONDS resets the position count


def test_fragment_prefix_matches_the_completed_word() -> None:
    tokens = [Token(text="s-", fragment=True), Token(text="said")]
    features = features_at(tokens, 0, CONFIG)
    assert "frag" in features and "fpre1" in features


def test_config_round_trips_through_json() -> None:
    assert FeatureConfig.from_json(CONFIG.to_json()) == CONFIG


def test_tag_bias_round_trips_through_json() -> None:
    config = FeatureConfig(lexicon={"uh": "F"}, tag_bias={"rp": 0.5})
    assert FeatureConfig.from_json(config.to_json()) == config
    # Models written before the field existed read as "no bias".
    assert FeatureConfig.from_json({"right": 5, "left": 8, "lexicon": {}}).tag_bias == {}


def test_a_phrase_begun_before_the_word_recurring_marks_a_rough_copy() -> None:
    tokens = _tokens("it was true it was truly awful")
    true = features_at(tokens, 2, CONFIG)
    assert "bg2_2" in true  # "it was" (2 back) recurs ending 2 ahead
    tokens = _tokens("we are fortunate we were fortunate")
    assert "sb2_3" in features_at(tokens, 2, CONFIG)  # "we are fortunate" / "we were fortunate"
    assert not any(f.startswith("sb") for f in features_at(_tokens("we are fortunate we are "
                                                                   "fortunate"), 2, CONFIG))


def test_the_word_resuming_after_an_interregnum_pairs_with_the_last_before_it() -> None:
    tokens = _tokens("and uh but then")
    features = features_at(tokens, 0, CONFIG)
    assert "wi=and|but" in features
    assert "lxi=-|-" in features
    # Without a filled pause or editing term between, the pair is the ordinary bigram.
    assert not any(f.startswith("wi=") for f in features_at(_tokens("and but then"), 0, CONFIG))


def test_a_word_after_the_current_one_recurring_ahead() -> None:
    tokens = _tokens("she was there was so")
    assert "n1m3" in features_at(tokens, 0, CONFIG)  # "was" at +1 recurs at +3


def test_far_interregnum_and_fragment_cues() -> None:
    tokens = [Token(text="the"), Token(text="fact"), Token(text="that"), Token(text="uh"),
              Token(text="w-", fragment=True)]
    features = features_at(tokens, 0, CONFIG)
    assert "lx+3=F" in features
    assert "frag+4" in features


def test_a_same_class_word_after_the_word_marks_a_substitution() -> None:
    # "a- the": no word is copied, but a determiner follows a determiner (Shriberg's
    # reparandum/repair structure with a substituted word; classes: plain English grammar).
    tokens = _tokens("i want a the blue one")
    a = features_at(tokens, 2, CONFIG)
    assert "cs1=D" in a
    assert "cb1=D" in features_at(tokens, 3, CONFIG)  # the repair side sees it too
    # After an interregnum as well, and the class pattern of a two-word stretch recurring.
    assert "csi=P" in features_at(_tokens("he uh she left"), 0, CONFIG)
    assert "cp2" in features_at(_tokens("he is she was here"), 0, CONFIG)
    # The same word again is a copy, not a substitution; open-class words have no class.
    assert not any(f.startswith("cs") for f in features_at(_tokens("a a blue"), 0, CONFIG))
    assert not any(f.startswith("cs") for f in features_at(_tokens("blue green"), 0, CONFIG))


def test_word_classes_are_off_for_models_trained_without_them() -> None:
    # A model file written before the word-class features existed has no table: its features
    # must stay exactly what it was trained on.
    old = FeatureConfig.from_json({"right": 5, "left": 8, "lexicon": {}})
    assert old.word_classes == {}
    tokens = _tokens("i want a the blue one")
    assert not any(f.startswith(("c=", "c-1c", "cs", "cb", "cc+", "cp"))
                   for i in range(len(tokens)) for f in features_at(tokens, i, old))
    assert FeatureConfig.from_json(CONFIG.to_json()).word_classes == CONFIG.word_classes


def test_a_two_word_phrase_said_again_marks_a_forward_copy() -> None:
    # "i went" at 0 comes again 3 words on; reaches its last word at 0 + 4.
    tokens = _tokens("i went to i went home")
    assert "fc3_2" in feature_piece(tokens, 0, 4, CONFIG)
    assert not any(f.startswith("fc") for f in feature_piece(_tokens("i went to i came home"),
                                                             0, 4, CONFIG))


def test_copy_features_reach_back_as_far_as_the_restart_span() -> None:
    # The word at +2 was said 5 words back (the span) and not 6 (beyond it).
    assert "m5_2" in feature_piece(_tokens("so a b c d x y so"), 5, 2, CONFIG)
    assert not any(f == "m6_2" for f in feature_piece(_tokens("so a b c d e x y so"), 6, 2,
                                                      CONFIG))


def test_a_break_ahead_reaches_every_word_before_it() -> None:
    # "i was going to / (other speaker) / we could": the words of an utterance broken off
    # before the other speaker spoke see where it broke and the word it stopped at.
    words = ["i", "was", "going", "to", "we", "could"]
    tokens = [Token(text=w, after_other_speaker=(k == 4)) for k, w in enumerate(words)]
    assert {"oth+3", "othw=to"} <= set(features_at(tokens, 1, CONFIG))
    assert {"oth+1", "othw=to"} <= set(features_at(tokens, 3, CONFIG))
    off = FeatureConfig(lexicon=CONFIG.lexicon)
    assert not any(f.startswith("othw") for f in features_at(tokens, 1, off))


def test_the_size_of_the_other_speakers_interjection_is_read() -> None:
    # A backchannel (1-2 words) lets the speaker keep the floor; a longer turn does not.
    words = ["i", "was", "going", "to", "we", "could"]
    short = [Token(text=w, after_other_speaker=(k == 4), other_words=1 if k == 4 else 0)
             for k, w in enumerate(words)]
    long = [Token(text=w, after_other_speaker=(k == 4), other_words=12 if k == 4 else 0)
            for k, w in enumerate(words)]
    assert "othn+3=1" in features_at(short, 1, CONFIG)
    assert "othn+3=6+" in features_at(long, 1, CONFIG)
    assert "othnw=1|to" in features_at(short, 3, CONFIG)


def test_channels_count_the_other_speakers_words_between() -> None:
    speakers = "AABBBAB"
    conversation = Conversation(
        id="c", corpus="demo",
        words=tuple(Word(text="w", speaker=s) for s in speakers),
        utterances=(Utterance(speaker="A", words=(0, 1, 5), function=UtteranceFunction.OTHER,
                              fine_tag="x", fine_class="x"),))
    a, b = channel_sequences(conversation)
    assert a.other_words == (0, 0, 3)
    assert b.other_words == (0, 0, 0, 1)
