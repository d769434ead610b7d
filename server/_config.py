"""Configuration of the server: where it listens, what it loads, and its explicit limits.

Both classes are frozen keyword-only dataclasses; constructing one opens nothing. Every limit
and its default is listed (with the status code a violation gets) in ``docs/limits.md``.
Environment variables are never read here: ``midstream serve`` reads them and passes values in.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

from midstream import InputError


@dataclass(frozen=True, slots=True, kw_only=True)
class ServerLimits:
    """Explicit limits of one server; the defaults are documented in ``docs/limits.md``.

    Units are in the names: ``_chars`` counts Unicode code points, ``_bytes`` bytes, ``_s``
    seconds; everything else counts items.

    Examples
    --------
    >>> ServerLimits(idle_timeout_s=5.0).idle_timeout_s
    5.0
    """

    max_word_chars: int = 100
    """Longest word text accepted, before normalisation."""
    max_id_chars: int = 128
    """Longest word id, speaker name or conversation id."""
    max_words_per_message: int = 512
    """Most words in one ``WordBatch``."""
    max_live_conversations: int = 256
    """Most conversations being ingested at once (ended ones do not count)."""
    max_speakers_per_conversation: int = 16
    """Most distinct speakers in one conversation."""
    replay_updates: int = 4096
    """Updates kept per conversation for followers to resume from."""
    replay_bytes: int = 4 * 1024 * 1024
    """Estimated bytes of the updates kept per conversation (the two newest always stay)."""
    history_revisions: int = 32768
    """Published word and utterance states kept per conversation for ``GetRevisions``."""
    history_bytes: int = 8 * 1024 * 1024
    """Estimated bytes of the states kept per conversation for ``GetRevisions``."""
    snapshot_states: int = 10000
    """Latest word states, and latest utterance states, kept per conversation for snapshots."""
    snapshot_bytes: int = 4 * 1024 * 1024
    """Estimated bytes of the latest states kept per conversation for snapshots."""
    max_kept_bytes: int = 1024 * 1024 * 1024
    """Estimated bytes all conversations of the server keep (replay, history, snapshot
    states; live and ended): over it, ended conversations are forgotten, then the live ones
    keeping the most shed their oldest records."""
    max_followers_per_conversation: int = 32
    """Most ``Follow`` streams on one conversation at once."""
    follower_queue: int = 1024
    """Messages one follower may have waiting before it is told it lagged."""
    follower_queue_bytes: int = 8 * 1024 * 1024
    """Estimated bytes of the messages one follower may have waiting before it is told it
    lagged."""
    max_message_bytes: int = 4 * 1024 * 1024
    """Largest gRPC message received or sent."""
    idle_timeout_s: float = 300.0
    """A ``Feed`` stream (or ``FeedMany`` channel) silent this long has its conversation
    finished."""
    ended_retention_s: float = 600.0
    """How long an ended conversation stays for late followers and ``GetRevisions``."""
    max_ended_conversations: int = 256
    """Most ended conversations kept at once; the oldest-ended go first."""
    max_transcript_items: int = 50_000
    """Most items in one ``TagTranscript`` request."""
    max_channels_per_stream: int = 1024
    """Most conversations open at once on one ``FeedMany`` stream."""
    max_events_per_frame: int = 1024
    """Most channel events in one ``FeedMany`` request frame."""
    max_streams_without_conversation: int = 64
    """Most ingest streams at once with no conversation open: ``Feed`` before its
    ``open``, ``FeedMany`` with no open channel. Each ends after ``idle_timeout_s``."""
    server_tick_min_silence_s: float = 0.5
    """For a conversation opened with ``server_ticks``: the shortest silence after a word at
    which the server ticks its time on (it ticks at the boundary model's silence marks from
    here on); shorter pauses, common between the words of one utterance, cost no decode."""

    def __post_init__(self) -> None:
        for name in (
            "max_word_chars", "max_id_chars", "max_words_per_message", "max_live_conversations",
            "max_speakers_per_conversation", "replay_updates", "history_revisions",
            "snapshot_states", "replay_bytes", "history_bytes", "snapshot_bytes",
            "max_kept_bytes", "follower_queue_bytes", "max_followers_per_conversation",
            "follower_queue",
            "max_message_bytes", "max_ended_conversations", "max_transcript_items",
            "max_channels_per_stream", "max_events_per_frame",
            "max_streams_without_conversation",
        ):
            if getattr(self, name) < 1:
                raise InputError(f"ServerLimits.{name} must be at least 1, not "
                                 f"{getattr(self, name)}")
        if not self.idle_timeout_s > 0:
            raise InputError(f"ServerLimits.idle_timeout_s must be > 0, not {self.idle_timeout_s}")
        if not (math.isfinite(self.server_tick_min_silence_s)
                and self.server_tick_min_silence_s >= 0):
            raise InputError("ServerLimits.server_tick_min_silence_s must be a finite number "
                             f">= 0, not {self.server_tick_min_silence_s}")
        if not self.ended_retention_s >= 0:
            raise InputError("ServerLimits.ended_retention_s must be >= 0, not "
                             f"{self.ended_retention_s}")


#: URL schemes that name a Redis Cluster rather than one server.
_CLUSTER_SCHEMES = ("redis+cluster://", "rediss+cluster://")


@dataclass(frozen=True, slots=True, kw_only=True)
class SharedLogConfig:
    """Where replicas share their update logs (a Redis server), and how much it keeps.

    Every limit is listed in ``docs/limits.md``. ``url`` is a ``redis://`` or ``rediss://`` URL
    (it may hold a password, so the repr hides it); ``redis+cluster://HOST:PORT`` (or
    ``rediss+cluster://``) names any node of a Redis Cluster, which is then used through a
    cluster client. Counts are entries of one conversation's streams; ``_s`` fields are
    seconds.

    Examples
    --------
    >>> SharedLogConfig(url="redis://127.0.0.1:6379/0", max_entries=100).max_entries
    100
    """

    url: str = field(repr=False)
    max_entries: int = 4096
    """Updates kept per conversation in its Redis stream (up to a quarter more between trims)."""
    max_age_s: float = 3600.0
    """Updates older than this are trimmed at the conversation's next write; a conversation's
    keys expire this long after its last write."""
    max_events: int = 100_000
    """Input events kept per conversation for failover; past it the conversation can no
    longer be continued on another replica (it goes on where it is)."""
    buffer_entries: int = 100_000
    """Entries (updates and events, all conversations) held locally while Redis is unreachable
    or slow; past it the oldest conversations' pending entries are dropped and their followers
    get a gap notice."""
    key_prefix: str = "midstream"
    """Prefix of every key this server writes (several deployments may share one Redis)."""
    timeout_s: float = 2.0
    """How long one Redis round trip may take before the log counts as degraded."""
    lease_s: float = 10.0
    """How long a replica's liveness lease in Redis lasts; each replica renews its own every
    quarter of this. A replica whose lease is this old counts as lost."""
    orphan_grace_s: float = 120.0
    """How long after its replica's lease lapsed a live conversation waits for its caller to
    continue it elsewhere (``open.resume``); then the first replica to notice ends it
    (``END_REASON_OWNER_LOST``) so its followers everywhere get ``ended``."""

    @property
    def cluster(self) -> bool:
        """Whether ``url`` names a Redis Cluster (``redis+cluster://``, ``rediss+cluster://``)."""
        return self.url.startswith(_CLUSTER_SCHEMES)

    @property
    def client_url(self) -> str:
        """``url`` as the Redis client takes it (a cluster URL without its ``+cluster``)."""
        return self.url.replace("+cluster://", "://", 1) if self.cluster else self.url

    def __post_init__(self) -> None:
        if not self.url.startswith(("redis://", "rediss://", "unix://", *_CLUSTER_SCHEMES)):
            raise InputError("the shared log URL must start with redis://, rediss://, "
                             "unix://, or redis+cluster:// or rediss+cluster:// for a Redis "
                             "Cluster (e.g. redis://127.0.0.1:6379/0)")
        for name in ("max_entries", "max_events", "buffer_entries"):
            if getattr(self, name) < 1:
                raise InputError(f"SharedLogConfig.{name} must be at least 1, not "
                                 f"{getattr(self, name)}")
        if not (self.max_age_s > 0 and self.timeout_s > 0):
            raise InputError("SharedLogConfig.max_age_s and timeout_s must be > 0")
        for name in ("lease_s", "orphan_grace_s"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value > 0):
                raise InputError(f"SharedLogConfig.{name} must be a finite number > 0, not "
                                 f"{value}")
        if not self.key_prefix or any(c in self.key_prefix for c in "{}"):
            raise InputError("SharedLogConfig.key_prefix must be non-empty and hold no braces")


@dataclass(frozen=True, slots=True, kw_only=True)
class ServerConfig:
    """Where and how one server runs.

    ``port=0`` picks a free port (read it from :attr:`MidstreamServer.port` after ``start``).
    ``models_dir=None`` serves the shipped default models. ``max_open_words`` and ``settle``
    set when a word's label becomes final (see ``midstream.models.DecoderConfig``: ``lag`` and
    ``settle``); ``None`` and ``True`` keep the decoder's defaults. ``metrics_port=None`` serves no
    metrics; ``0`` picks a free port. ``token`` (never shown in the repr) makes every call but
    the health check require ``authorization: Bearer <token>`` metadata. ``require_tls`` refuses
    to start without ``tls_cert`` and ``tls_key``. ``grace_s`` bounds a graceful stop.
    ``shared_log`` (a :class:`SharedLogConfig`) makes this server one replica of several.
    ``setting`` names the conversation setting utterance functions are labelled in.
    """

    host: str = "127.0.0.1"
    port: int = 50051
    models_dir: Path | None = None
    metrics_host: str = "127.0.0.1"
    metrics_port: int | None = None
    tls_cert: Path | None = None
    tls_key: Path | None = None
    require_tls: bool = False
    token: str | None = field(default=None, repr=False)
    grace_s: float = 10.0
    limits: ServerLimits = field(default_factory=ServerLimits)
    max_open_words: int | None = None
    """A word's label is final once no later word can change it, or at the latest when this
    many newer words of its speaker have arrived; ``None``: the decoder's default."""
    settle: bool = True
    """``False``: every label becomes final exactly ``max_open_words`` words late."""
    shared_log: SharedLogConfig | None = None
    """Publish every conversation to a shared Redis log, so that any replica serves
    ``Follow``, ``GetRevisions`` and the listing and can continue a conversation whose replica
    died (``docs/deploy.md``); ``None``: everything stays in this process."""
    reuse_port: bool = False
    """Let several processes listen on one port (``SO_REUSEPORT``; ``serve --workers``)."""
    setting: str | None = None
    """The conversation setting every conversation's utterance functions are labelled in: one
    of the corpora the coarse function model learnt apart (``ModelBundle.settings``), also for
    models loaded later by ``ReloadModels``; ``None``: the shared weights alone."""

    def __post_init__(self) -> None:
        if self.max_open_words is not None and self.max_open_words < 0:
            raise InputError(f"ServerConfig.max_open_words must be >= 0, not "
                             f"{self.max_open_words}")
