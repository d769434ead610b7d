"""Scoring utterance-function taggers against annotated conversations.

Two views of quality:

*gold segmentation*
    every utterance of a conversation (the corpus's own segmentation, cleaned with the gold
    disfluency labels) labelled by :meth:`FunctionTagger.label_conversation`, compared with the
    corpus annotation (the coarse function always; the SWBD-DAMSL 42 classes too when the tagger
    is a 42-class model and the conversations are SwDA's);
*accuracy after k words*
    each utterance replayed word by word through :meth:`FunctionTagger.label_partial` with the
    preceding utterances as context, and the coarse label as it stood after its first k received
    words scored (``end``: after its last word; an utterance shorter than k counts with its end
    label). Words are cleaned with the gold labels of the words received so far, which is kinder
    than a live stream, where a reparandum is recognised only after its repair.

Figures come back in one flat dictionary keyed by dotted names (see :func:`evaluate_functions`).
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence

from midstream import SWBD42_CLASSES, Conversation
from midstream.models.functions._tagger import FunctionTagger
from midstream.models.functions._views import UtteranceView, clean_view

#: Prefix lengths (received words) at which the growing label is scored.
AFTER_WORDS: tuple[int, ...] = (1, 2, 3, 5)

_PREFIX = "utterance_functions"
_SWBD42 = frozenset(SWBD42_CLASSES)


def classification_figures(gold: Sequence[str], predicted: Sequence[str],
                           prefix: str) -> dict[str, float]:
    """Accuracy, macro-F1 and per-class precision/recall/F1 under ``prefix``.

    Macro-F1 averages over the union of gold and predicted labels, with F1 taken as 0 for a
    class that is never predicted or never gold (scikit-learn's ``f1_score(average="macro",
    zero_division=0)`` convention; a test checks the two agree).

    Examples
    --------
    >>> f = classification_figures(["a", "a", "b"], ["a", "b", "b"], "x")
    >>> f["x.accuracy"], f["x.per_class.b.precision"], f["x.per_class.a.recall"]
    (0.6666666666666666, 0.5, 0.5)
    """
    if len(gold) != len(predicted):
        raise ValueError(f"{len(gold)} gold labels but {len(predicted)} predictions")
    figures: dict[str, float] = {}
    n = len(gold)
    figures[f"{prefix}.count"] = float(n)
    figures[f"{prefix}.accuracy"] = (
        sum(g == p for g, p in zip(gold, predicted, strict=True)) / n if n else 0.0
    )
    labels = sorted(set(gold) | set(predicted))
    f1s: list[float] = []
    for label in labels:
        tp = sum(g == label and p == label for g, p in zip(gold, predicted, strict=True))
        n_pred = sum(p == label for p in predicted)
        n_gold = sum(g == label for g in gold)
        precision = tp / n_pred if n_pred else 0.0
        recall = tp / n_gold if n_gold else 0.0
        f1 = 2 * precision * recall / (precision + recall) if precision + recall else 0.0
        f1s.append(f1)
        base = f"{prefix}.per_class.{label}"
        figures[f"{base}.precision"] = precision
        figures[f"{base}.recall"] = recall
        figures[f"{base}.f1"] = f1
        figures[f"{base}.support"] = float(n_gold)
    figures[f"{prefix}.macro_f1"] = sum(f1s) / len(f1s) if f1s else 0.0
    return figures


def replay_labels(tagger: FunctionTagger, conversation: Conversation,
                  index: int, context: Sequence[UtteranceView]) -> list[str]:
    """Coarse labels of utterance ``index`` after each of its received words (then the end).

    Returns one label per received word plus the label of the finished utterance, so entry
    ``k - 1`` is the label after ``k`` words and the last entry the end label.
    """
    utterance = conversation.utterances[index]
    labels = [
        tagger.label_partial(context, clean_view(conversation, utterance, upto=k)).function.value
        for k in range(1, len(utterance.words))
    ]
    end = tagger.label_partial(context, clean_view(conversation, utterance))
    labels.append(end.function.value)
    return labels


def evaluate_functions(conversations: Iterable[Conversation], tagger: FunctionTagger, *,
                       replay: bool = True) -> dict[str, float]:
    """Score ``tagger`` on annotated conversations.

    Parameters
    ----------
    conversations
        Any corpus's conversations with gold utterance functions (SwDA, MRDA, Map Task, own
        transcripts). 42-class figures are computed only for a ``"swbd42"`` tagger on
        conversations whose classes are all SWBD-DAMSL 42 classes.
    tagger
        A trained :class:`FunctionTagger`.
    replay
        Also replay every utterance word by word for the ``accuracy_after_words`` figures (about
        five decodes per utterance; turn off for a quick gold-segmentation score).

    Returns
    -------
    dict
        Flat figures, all floats:

        - ``utterance_functions.gold_segmentation.coarse.{accuracy,macro_f1,count}``
        - ``utterance_functions.gold_segmentation.coarse.per_class.<label>.<figure>`` with
          figures ``precision``, ``recall``, ``f1`` and ``support``
        - the same under ``...gold_segmentation.swbd42`` for a 42-class tagger on SwDA
        - ``utterance_functions.accuracy_after_words.{1,2,3,5,end}`` (coarse, when ``replay``)
    """
    coarse_gold: list[str] = []
    coarse_pred: list[str] = []
    fine_gold: list[str] = []
    fine_pred: list[str] = []
    fine_ok = tagger.scheme == "swbd42"
    after: dict[str, list[bool]] = {str(k): [] for k in AFTER_WORDS}
    after["end"] = []
    for conversation in conversations:
        views = [clean_view(conversation, u) for u in conversation.utterances]
        guesses = tagger.label_conversation(views)
        for utterance, guess in zip(conversation.utterances, guesses, strict=True):
            coarse_gold.append(utterance.function.value)
            coarse_pred.append(guess.function.value)
            if fine_ok and utterance.fine_class in _SWBD42:
                fine_gold.append(utterance.fine_class)
                fine_pred.append(guess.label)
            else:
                fine_ok = False
        if not replay:
            continue
        for i, utterance in enumerate(conversation.utterances):
            context = views[max(0, i - tagger.context):i]
            labels = replay_labels(tagger, conversation, i, context)
            gold = utterance.function.value
            for k in AFTER_WORDS:
                after[str(k)].append(labels[min(k, len(labels)) - 1] == gold)
            after["end"].append(labels[-1] == gold)
    figures = classification_figures(coarse_gold, coarse_pred,
                                     f"{_PREFIX}.gold_segmentation.coarse")
    if fine_ok and fine_gold:
        figures.update(classification_figures(fine_gold, fine_pred,
                                              f"{_PREFIX}.gold_segmentation.swbd42"))
    if replay:
        for name, hits in after.items():
            figures[f"{_PREFIX}.accuracy_after_words.{name}"] = (
                sum(hits) / len(hits) if hits else 0.0
            )
    return figures
