"""Every live and recently ended conversation of one server, and what each keeps in memory.

The registry opens sessions, keeps ended ones for late followers and ``GetRevisions`` within
``ended_retention_s`` and ``max_ended_conversations``, and sheds what the server keeps when its
bytes pass ``max_kept_bytes`` (see :class:`SessionRegistry`).
"""

from __future__ import annotations

import logging
import secrets
import time
from collections import OrderedDict
from collections.abc import Callable

from midstream import (
    EndReason,
    LimitExceededError,
    NotFoundError,
)
from midstream.server._config import ServerLimits
from midstream.server._limits import check_id
from midstream.server._metrics import ServerMetrics
from midstream.server._models import Bundle
from midstream.server._published import Outgoing
from midstream.server._session import Journal, KeptBytes, Session
from midstream.server._status import ConflictError

_log = logging.getLogger(__name__)


class SessionRegistry:
    """Every live and recently ended conversation of one server.

    Ended conversations stay ``ended_retention_s`` seconds (at most ``max_ended_conversations``
    of them) so late followers and ``GetRevisions`` still find them; they are dropped lazily
    whenever the registry is touched. When more must go (too many ended, or the server's kept
    bytes over ``max_kept_bytes``), the oldest-ended conversation of the caller that has the
    most of them kept goes first: one caller ending conversations in a hurry pushes out its own,
    not everybody's. When no ended conversation is left and the bytes are still over, the live
    conversations that keep the most shed their oldest records, down to a common level.
    """

    def __init__(self, limits: ServerLimits, metrics: ServerMetrics, *,
                 journal: Callable[[Session], Journal] | None = None) -> None:
        self._limits = limits
        self._metrics = metrics
        self._journal = journal  # gives each new session its journal (a shared log)
        self._live: dict[str, Session] = {}
        self._ended: OrderedDict[str, Session] = OrderedDict()
        self._ended_by_owner: dict[str, int] = {}
        self.kept = KeptBytes(limits.max_kept_bytes)
        self.kept.relieve = self._relieve

    def open(self, conversation_id: str, bundle: Bundle, *, owner: str = "") -> Session:
        """Start a conversation with a fresh engine from ``bundle``.

        An empty id gets an unguessable one (``secrets.token_urlsafe``), never starting with
        ``-`` so it can be given to the command line as it is.

        Raises
        ------
        ConflictError
            When the id names a live or kept conversation.
        LimitExceededError
            When ``max_live_conversations`` conversations are live.
        """
        self.purge()
        if conversation_id:
            check_id(conversation_id, "open.conversation_id", self._limits)
            if conversation_id in self._live or conversation_id in self._ended:
                raise ConflictError(f"conversation id {conversation_id!r} is already in use")
        else:
            conversation_id = secrets.token_urlsafe(18)
            while conversation_id.startswith("-"):
                # `midstream subscribe -x...` would read it as an option; one draw in 64.
                conversation_id = secrets.token_urlsafe(18)
        limit = self._limits.max_live_conversations
        if len(self._live) >= limit:
            raise LimitExceededError(
                "max_live_conversations", limit,
                f"{limit} conversations are live; limit max_live_conversations is {limit}",
            )
        session = Session(conversation_id, bundle.new_engine(), self._limits, self._metrics,
                          budget=self.kept, owner=owner)
        if self._journal is not None:
            session.journal = self._journal(session)
        self._live[conversation_id] = session
        self._metrics.live.set(len(self._live))
        _log.info("conversation %s opened", conversation_id)
        return session

    def close(self, session: Session, reason: EndReason) -> tuple[Outgoing, ...]:
        """Finish ``session`` (if live) and move it to the kept ended conversations."""
        messages = session.finish(reason)
        if self._live.pop(session.id, None) is not None:
            self._ended[session.id] = session
            owners = self._ended_by_owner
            owners[session.owner] = owners.get(session.owner, 0) + 1
            while len(self._ended) > self._limits.max_ended_conversations:
                self._forget_one()
            self._metrics.live.set(len(self._live))
        return messages

    def forget(self, session: Session) -> None:
        """Drop ``session`` without publishing its end (a conversation that could not be
        rebuilt from a shared log, whose log must stay as it is)."""
        session.journal = None
        session.finish(EndReason.UNKNOWN)
        if self._live.get(session.id) is session:
            del self._live[session.id]
            self.kept.used -= session.kept_bytes
            self._metrics.live.set(len(self._live))

    def _forget(self, session: Session) -> None:
        del self._ended[session.id]
        owners = self._ended_by_owner
        left = owners[session.owner] - 1
        if left:
            owners[session.owner] = left
        else:
            del owners[session.owner]
        self.kept.used -= session.kept_bytes

    def _forget_one(self) -> None:
        """Forget the oldest-ended conversation of the caller with the most kept."""
        owners = self._ended_by_owner
        heaviest = max(owners, key=owners.__getitem__)
        for session in self._ended.values():
            if session.owner == heaviest:
                self._forget(session)
                return

    def _relieve(self) -> None:
        """Bring the kept bytes under ``max_kept_bytes`` (by a sixteenth, so this is rare)."""
        kept = self.kept
        target = kept.limit - kept.limit // 16
        while self._ended and kept.used > target:
            self._forget_one()
        excess = kept.used - target
        if excess <= 0 or not self._live:
            return
        # Water-filling: lower the largest conversations to one common level that frees the
        # excess, so the conversation keeping the most gives up the most.
        sizes = sorted((s.kept_bytes for s in self._live.values()), reverse=True)
        level, freed_above = 0, 0
        for count, size in enumerate(sizes, start=1):
            below = sizes[count] if count < len(sizes) else 0
            if freed_above + count * (size - below) >= excess:
                level = size - -(-(excess - freed_above) // count)
                break
            freed_above += count * (size - below)
        for session in self._live.values():
            surplus = session.kept_bytes - level
            if surplus > 0:
                kept.used -= session.shed(surplus)

    def close_all(self, reason: EndReason) -> None:
        """Finish every live conversation (graceful shutdown)."""
        for session in list(self._live.values()):
            self.close(session, reason)

    def get(self, conversation_id: str) -> Session:
        """A live or kept conversation.

        Raises
        ------
        NotFoundError
            When no such conversation is live or still kept.
        """
        self.purge()
        session = self._live.get(conversation_id) or self._ended.get(conversation_id)
        if session is None:
            raise NotFoundError(f"no live or kept conversation with id {conversation_id!r}")
        return session

    def sessions(self) -> list[Session]:
        """Live conversations, then kept ended ones, oldest first in each."""
        self.purge()
        return [*self._live.values(), *self._ended.values()]

    @property
    def live_count(self) -> int:
        return len(self._live)

    def purge(self) -> None:
        """Drop ended conversations kept longer than ``ended_retention_s``."""
        cutoff = time.time() - self._limits.ended_retention_s
        while self._ended:
            oldest = next(iter(self._ended.values()))
            if oldest.ended_at is not None and oldest.ended_at > cutoff:
                break
            self._forget(oldest)
