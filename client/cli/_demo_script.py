"""An invented phone call for ``midstream demo``: a caller books a bicycle repair with a shop on
the moon (no such shop exists: the scenario is made up end to end).

Written for the demo (no corpus text): it has filled pauses, editing terms, discourse markers,
self-repairs, a restart, questions, answers, acknowledgements and a clarification request.
Times are invented too: words at a steady pace, a silence before every utterance, and no
caller hint anywhere: the call reaches the server as a recogniser gives it, a NIST CTM file of
timed words on two channels (:func:`demo_ctm`), with the recogniser's clock ticking through
the silences, so utterances end where the speakers stop.
"""

from __future__ import annotations

from midstream import AddWord, TimeTick
from midstream.client._inputs import TimedEvent, parse_ctm, sort_by_time

#: ``(speaker, silence before in seconds, words)``, one utterance each, in order.
UTTERANCES: tuple[tuple[str, float, str], ...] = (
    ("shop", 0.3, "good morning moonbase bike repairs"),
    ("shop", 0.9, "how can i help"),
    ("caller", 1.3, "hi um yeah i was wondering if you could uh if you could take a look at "
                    "my bike"),
    ("shop", 1.2, "sure what seems to be the problem"),
    ("caller", 1.4, "well the the chain keeps slipping"),
    ("caller", 1.3, "and the back brake i mean the front brake is rubbing"),
    ("shop", 1.2, "okay"),
    ("caller", 1.5, "i was going to we could maybe do it this week"),
    ("shop", 1.3, "we could do thursday morning"),
    ("shop", 1.2, "does that work for you"),
    ("caller", 1.4, "sorry did you say thursday"),
    ("shop", 1.2, "yes thursday morning around nine"),
    ("caller", 1.3, "uh thursday yeah thursday is fine"),
    ("caller", 1.6, "how much will it um how much will that cost roughly"),
    ("shop", 1.4, "about forty pounds for both i think"),
    ("caller", 1.2, "right okay great"),
    ("shop", 1.3, "can i take a name please"),
    ("caller", 1.5, "it's sam no sorry it's samira"),
    ("shop", 1.2, "thanks samira see you on thursday"),
    ("caller", 1.3, "thank you bye"),
)

#: Seconds per word, of which the word itself takes 90 % (a relaxed speaking rate; invented).
WORD_S = 0.32
#: How often the recogniser's clock ticks while nobody speaks (seconds; invented).
TICK_S = 0.5


def demo_ctm() -> str:
    """The call as a NIST CTM file: ``<file> <channel> <start> <duration> <word> <confidence>``.

    Each channel's words are listed in a block, as recognisers write them.
    """
    lines: dict[str, list[str]] = {}
    clock = 0.0
    for speaker, silence, text in UTTERANCES:
        clock += silence
        for token in text.split():
            lines.setdefault(speaker, []).append(
                f"bikeshop {speaker} {clock:.2f} {WORD_S * 0.9:.2f} {token} 0.95")
            clock += WORD_S
        clock -= WORD_S * 0.1  # the silence is counted from the last word's end
    return "".join(line + "\n" for block in lines.values() for line in block)


def demo_events() -> list[TimedEvent]:
    """The call as a live recogniser sends it: the CTM's words in time order, and a time tick
    every :data:`TICK_S` seconds of silence (no caller hints)."""
    words = sort_by_time(parse_ctm(demo_ctm().splitlines(), "demo call"))
    events: list[TimedEvent] = []
    last_end: float | None = None
    for timed in words:
        assert isinstance(timed.event, AddWord)  # a CTM holds words only
        start = timed.event.word.start
        if last_end is not None and start is not None:
            clock = last_end + TICK_S
            while clock < start:
                events.append(TimedEvent(event=TimeTick(time=round(clock, 2)),
                                         time=round(clock, 2), line=timed.line))
                clock += TICK_S
        events.append(timed)
        last_end = timed.time
    return events
