"""An invented phone call for ``midstream demo``: a caller books a bicycle repair with a shop.

Written for the demo (no corpus text): it has filled pauses, editing terms, discourse markers,
self-repairs, a restart, questions, answers, acknowledgements and a clarification request.
Times are invented too: words at a steady pace with short pauses between turns.
"""

from __future__ import annotations

from midstream._types import Word
from midstream.client._inputs import TimedEvent
from midstream.client._results import AddWord, SpeakerHint

#: ``(speaker, words)`` turns in order.
TURNS: tuple[tuple[str, str], ...] = (
    ("shop", "good morning hillside cycles how can i help"),
    ("caller", "hi um yeah i was wondering if you could uh if you could take a look at my bike"),
    ("shop", "sure what seems to be the problem"),
    ("caller", "well the the chain keeps slipping and the back brake i mean the front brake "
               "is rubbing"),
    ("shop", "okay"),
    ("caller", "i was going to we could maybe do it this week"),
    ("shop", "we could do thursday morning does that work for you"),
    ("caller", "sorry did you say thursday"),
    ("shop", "yes thursday morning around nine"),
    ("caller", "uh thursday yeah thursday is fine"),
    ("caller", "how much will it um how much will that cost roughly"),
    ("shop", "about forty pounds for both i think"),
    ("caller", "right okay great"),
    ("shop", "can i take a name please"),
    ("caller", "it's sam no sorry it's samira"),
    ("shop", "thanks samira see you on thursday"),
    ("caller", "thank you bye"),
)

#: Seconds per word and between turns (a relaxed speaking rate; invented).
WORD_S = 0.32
TURN_GAP_S = 0.6


def demo_events() -> list[TimedEvent]:
    """The call as recogniser events: words with times and a turn-end hint after each turn."""
    events: list[TimedEvent] = []
    clock = 0.0
    count = 0
    for turn, (speaker, text) in enumerate(TURNS, start=1):
        for token in text.split():
            count += 1
            word = Word(text=token, speaker=speaker, start=round(clock, 2),
                        end=round(clock + WORD_S * 0.9, 2), confidence=0.95)
            events.append(TimedEvent(event=AddWord(word_id=f"w{count}", word=word),
                                     time=word.end, line=turn))
            clock += WORD_S
        events.append(TimedEvent(event=SpeakerHint(speaker=speaker, turn_end=True),
                                 time=round(clock, 2), line=turn))
        clock += TURN_GAP_S
    return events
