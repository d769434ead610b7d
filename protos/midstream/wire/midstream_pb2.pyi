from google.protobuf.internal import containers as _containers
from google.protobuf.internal import enum_type_wrapper as _enum_type_wrapper
from google.protobuf import descriptor as _descriptor
from google.protobuf import message as _message
from collections.abc import Iterable as _Iterable, Mapping as _Mapping
from typing import ClassVar as _ClassVar, Optional as _Optional, Union as _Union

DESCRIPTOR: _descriptor.FileDescriptor

class HintKind(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    HINT_KIND_UNSPECIFIED: _ClassVar[HintKind]
    HINT_KIND_UTTERANCE_END: _ClassVar[HintKind]
    HINT_KIND_TURN_END: _ClassVar[HintKind]

class WordRole(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    WORD_ROLE_UNSPECIFIED: _ClassVar[WordRole]
    WORD_ROLE_FLUENT: _ClassVar[WordRole]
    WORD_ROLE_FILLER: _ClassVar[WordRole]
    WORD_ROLE_EDIT_TERM: _ClassVar[WordRole]
    WORD_ROLE_DISCOURSE_MARKER: _ClassVar[WordRole]
    WORD_ROLE_REPARANDUM: _ClassVar[WordRole]
    WORD_ROLE_REPAIR: _ClassVar[WordRole]
    WORD_ROLE_RESTART: _ClassVar[WordRole]

class Function(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    FUNCTION_UNSPECIFIED: _ClassVar[Function]
    FUNCTION_STATEMENT: _ClassVar[Function]
    FUNCTION_QUESTION: _ClassVar[Function]
    FUNCTION_ANSWER: _ClassVar[Function]
    FUNCTION_AGREEMENT: _ClassVar[Function]
    FUNCTION_ACKNOWLEDGEMENT: _ClassVar[Function]
    FUNCTION_CLARIFICATION_REQUEST: _ClassVar[Function]
    FUNCTION_OTHER: _ClassVar[Function]

class GapReason(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    GAP_REASON_UNSPECIFIED: _ClassVar[GapReason]
    GAP_REASON_EVICTED: _ClassVar[GapReason]
    GAP_REASON_LAGGED: _ClassVar[GapReason]
    GAP_REASON_EPOCH_MISMATCH: _ClassVar[GapReason]
    GAP_REASON_OWNER_CHANGED: _ClassVar[GapReason]

class EndReason(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    END_REASON_UNSPECIFIED: _ClassVar[EndReason]
    END_REASON_CLOSED: _ClassVar[EndReason]
    END_REASON_IDLE_TIMEOUT: _ClassVar[EndReason]
    END_REASON_CALLER_VANISHED: _ClassVar[EndReason]
    END_REASON_SERVER_SHUTDOWN: _ClassVar[EndReason]
    END_REASON_REJECTED: _ClassVar[EndReason]
    END_REASON_OWNER_LOST: _ClassVar[EndReason]
HINT_KIND_UNSPECIFIED: HintKind
HINT_KIND_UTTERANCE_END: HintKind
HINT_KIND_TURN_END: HintKind
WORD_ROLE_UNSPECIFIED: WordRole
WORD_ROLE_FLUENT: WordRole
WORD_ROLE_FILLER: WordRole
WORD_ROLE_EDIT_TERM: WordRole
WORD_ROLE_DISCOURSE_MARKER: WordRole
WORD_ROLE_REPARANDUM: WordRole
WORD_ROLE_REPAIR: WordRole
WORD_ROLE_RESTART: WordRole
FUNCTION_UNSPECIFIED: Function
FUNCTION_STATEMENT: Function
FUNCTION_QUESTION: Function
FUNCTION_ANSWER: Function
FUNCTION_AGREEMENT: Function
FUNCTION_ACKNOWLEDGEMENT: Function
FUNCTION_CLARIFICATION_REQUEST: Function
FUNCTION_OTHER: Function
GAP_REASON_UNSPECIFIED: GapReason
GAP_REASON_EVICTED: GapReason
GAP_REASON_LAGGED: GapReason
GAP_REASON_EPOCH_MISMATCH: GapReason
GAP_REASON_OWNER_CHANGED: GapReason
END_REASON_UNSPECIFIED: EndReason
END_REASON_CLOSED: EndReason
END_REASON_IDLE_TIMEOUT: EndReason
END_REASON_CALLER_VANISHED: EndReason
END_REASON_SERVER_SHUTDOWN: EndReason
END_REASON_REJECTED: EndReason
END_REASON_OWNER_LOST: EndReason

class SpokenWord(_message.Message):
    __slots__ = ("word_id", "speaker", "text", "start_s", "end_s", "confidence")
    WORD_ID_FIELD_NUMBER: _ClassVar[int]
    SPEAKER_FIELD_NUMBER: _ClassVar[int]
    TEXT_FIELD_NUMBER: _ClassVar[int]
    START_S_FIELD_NUMBER: _ClassVar[int]
    END_S_FIELD_NUMBER: _ClassVar[int]
    CONFIDENCE_FIELD_NUMBER: _ClassVar[int]
    word_id: str
    speaker: str
    text: str
    start_s: float
    end_s: float
    confidence: float
    def __init__(self, word_id: _Optional[str] = ..., speaker: _Optional[str] = ..., text: _Optional[str] = ..., start_s: _Optional[float] = ..., end_s: _Optional[float] = ..., confidence: _Optional[float] = ...) -> None: ...

class OpenConversation(_message.Message):
    __slots__ = ("conversation_id", "resume", "server_ticks", "epoch")
    CONVERSATION_ID_FIELD_NUMBER: _ClassVar[int]
    RESUME_FIELD_NUMBER: _ClassVar[int]
    SERVER_TICKS_FIELD_NUMBER: _ClassVar[int]
    EPOCH_FIELD_NUMBER: _ClassVar[int]
    conversation_id: str
    resume: bool
    server_ticks: bool
    epoch: int
    def __init__(self, conversation_id: _Optional[str] = ..., resume: _Optional[bool] = ..., server_ticks: _Optional[bool] = ..., epoch: _Optional[int] = ...) -> None: ...

class WordBatch(_message.Message):
    __slots__ = ("words",)
    WORDS_FIELD_NUMBER: _ClassVar[int]
    words: _containers.RepeatedCompositeFieldContainer[SpokenWord]
    def __init__(self, words: _Optional[_Iterable[_Union[SpokenWord, _Mapping]]] = ...) -> None: ...

class ReplaceWord(_message.Message):
    __slots__ = ("word",)
    WORD_FIELD_NUMBER: _ClassVar[int]
    word: SpokenWord
    def __init__(self, word: _Optional[_Union[SpokenWord, _Mapping]] = ...) -> None: ...

class WithdrawWord(_message.Message):
    __slots__ = ("word_id",)
    WORD_ID_FIELD_NUMBER: _ClassVar[int]
    word_id: str
    def __init__(self, word_id: _Optional[str] = ...) -> None: ...

class SpeakerHint(_message.Message):
    __slots__ = ("speaker", "kind")
    SPEAKER_FIELD_NUMBER: _ClassVar[int]
    KIND_FIELD_NUMBER: _ClassVar[int]
    speaker: str
    kind: HintKind
    def __init__(self, speaker: _Optional[str] = ..., kind: _Optional[_Union[HintKind, str]] = ...) -> None: ...

class CloseConversation(_message.Message):
    __slots__ = ()
    def __init__(self) -> None: ...

class TimeTick(_message.Message):
    __slots__ = ("time_s",)
    TIME_S_FIELD_NUMBER: _ClassVar[int]
    time_s: float
    def __init__(self, time_s: _Optional[float] = ...) -> None: ...

class ClientEvent(_message.Message):
    __slots__ = ("open", "words", "replace", "withdraw", "hint", "close", "tick")
    OPEN_FIELD_NUMBER: _ClassVar[int]
    WORDS_FIELD_NUMBER: _ClassVar[int]
    REPLACE_FIELD_NUMBER: _ClassVar[int]
    WITHDRAW_FIELD_NUMBER: _ClassVar[int]
    HINT_FIELD_NUMBER: _ClassVar[int]
    CLOSE_FIELD_NUMBER: _ClassVar[int]
    TICK_FIELD_NUMBER: _ClassVar[int]
    open: OpenConversation
    words: WordBatch
    replace: ReplaceWord
    withdraw: WithdrawWord
    hint: SpeakerHint
    close: CloseConversation
    tick: TimeTick
    def __init__(self, open: _Optional[_Union[OpenConversation, _Mapping]] = ..., words: _Optional[_Union[WordBatch, _Mapping]] = ..., replace: _Optional[_Union[ReplaceWord, _Mapping]] = ..., withdraw: _Optional[_Union[WithdrawWord, _Mapping]] = ..., hint: _Optional[_Union[SpeakerHint, _Mapping]] = ..., close: _Optional[_Union[CloseConversation, _Mapping]] = ..., tick: _Optional[_Union[TimeTick, _Mapping]] = ...) -> None: ...

class ChannelEvent(_message.Message):
    __slots__ = ("channel", "event")
    CHANNEL_FIELD_NUMBER: _ClassVar[int]
    EVENT_FIELD_NUMBER: _ClassVar[int]
    channel: int
    event: ClientEvent
    def __init__(self, channel: _Optional[int] = ..., event: _Optional[_Union[ClientEvent, _Mapping]] = ...) -> None: ...

class ClientFrame(_message.Message):
    __slots__ = ("events",)
    EVENTS_FIELD_NUMBER: _ClassVar[int]
    events: _containers.RepeatedCompositeFieldContainer[ChannelEvent]
    def __init__(self, events: _Optional[_Iterable[_Union[ChannelEvent, _Mapping]]] = ...) -> None: ...

class ChannelError(_message.Message):
    __slots__ = ("code", "message")
    CODE_FIELD_NUMBER: _ClassVar[int]
    MESSAGE_FIELD_NUMBER: _ClassVar[int]
    code: str
    message: str
    def __init__(self, code: _Optional[str] = ..., message: _Optional[str] = ...) -> None: ...

class ChannelReply(_message.Message):
    __slots__ = ("channel", "message", "error")
    CHANNEL_FIELD_NUMBER: _ClassVar[int]
    MESSAGE_FIELD_NUMBER: _ClassVar[int]
    ERROR_FIELD_NUMBER: _ClassVar[int]
    channel: int
    message: ServerMessage
    error: ChannelError
    def __init__(self, channel: _Optional[int] = ..., message: _Optional[_Union[ServerMessage, _Mapping]] = ..., error: _Optional[_Union[ChannelError, _Mapping]] = ...) -> None: ...

class ServerFrame(_message.Message):
    __slots__ = ("replies",)
    REPLIES_FIELD_NUMBER: _ClassVar[int]
    replies: _containers.RepeatedCompositeFieldContainer[ChannelReply]
    def __init__(self, replies: _Optional[_Iterable[_Union[ChannelReply, _Mapping]]] = ...) -> None: ...

class WordState(_message.Message):
    __slots__ = ("word_id", "speaker", "role", "confidence", "revision", "final", "repaired_by", "interruption_point", "text", "start_s", "end_s")
    WORD_ID_FIELD_NUMBER: _ClassVar[int]
    SPEAKER_FIELD_NUMBER: _ClassVar[int]
    ROLE_FIELD_NUMBER: _ClassVar[int]
    CONFIDENCE_FIELD_NUMBER: _ClassVar[int]
    REVISION_FIELD_NUMBER: _ClassVar[int]
    FINAL_FIELD_NUMBER: _ClassVar[int]
    REPAIRED_BY_FIELD_NUMBER: _ClassVar[int]
    INTERRUPTION_POINT_FIELD_NUMBER: _ClassVar[int]
    TEXT_FIELD_NUMBER: _ClassVar[int]
    START_S_FIELD_NUMBER: _ClassVar[int]
    END_S_FIELD_NUMBER: _ClassVar[int]
    word_id: str
    speaker: str
    role: WordRole
    confidence: float
    revision: int
    final: bool
    repaired_by: str
    interruption_point: bool
    text: str
    start_s: float
    end_s: float
    def __init__(self, word_id: _Optional[str] = ..., speaker: _Optional[str] = ..., role: _Optional[_Union[WordRole, str]] = ..., confidence: _Optional[float] = ..., revision: _Optional[int] = ..., final: _Optional[bool] = ..., repaired_by: _Optional[str] = ..., interruption_point: _Optional[bool] = ..., text: _Optional[str] = ..., start_s: _Optional[float] = ..., end_s: _Optional[float] = ...) -> None: ...

class UtteranceState(_message.Message):
    __slots__ = ("utterance_id", "speaker", "word_ids", "clean_text", "function", "fine_class", "confidence", "revision", "final")
    UTTERANCE_ID_FIELD_NUMBER: _ClassVar[int]
    SPEAKER_FIELD_NUMBER: _ClassVar[int]
    WORD_IDS_FIELD_NUMBER: _ClassVar[int]
    CLEAN_TEXT_FIELD_NUMBER: _ClassVar[int]
    FUNCTION_FIELD_NUMBER: _ClassVar[int]
    FINE_CLASS_FIELD_NUMBER: _ClassVar[int]
    CONFIDENCE_FIELD_NUMBER: _ClassVar[int]
    REVISION_FIELD_NUMBER: _ClassVar[int]
    FINAL_FIELD_NUMBER: _ClassVar[int]
    utterance_id: str
    speaker: str
    word_ids: _containers.RepeatedScalarFieldContainer[str]
    clean_text: str
    function: Function
    fine_class: str
    confidence: float
    revision: int
    final: bool
    def __init__(self, utterance_id: _Optional[str] = ..., speaker: _Optional[str] = ..., word_ids: _Optional[_Iterable[str]] = ..., clean_text: _Optional[str] = ..., function: _Optional[_Union[Function, str]] = ..., fine_class: _Optional[str] = ..., confidence: _Optional[float] = ..., revision: _Optional[int] = ..., final: _Optional[bool] = ...) -> None: ...

class Update(_message.Message):
    __slots__ = ("seq", "server_time", "words", "utterances", "withdrawn_word_ids", "conversation_final", "epoch")
    SEQ_FIELD_NUMBER: _ClassVar[int]
    SERVER_TIME_FIELD_NUMBER: _ClassVar[int]
    WORDS_FIELD_NUMBER: _ClassVar[int]
    UTTERANCES_FIELD_NUMBER: _ClassVar[int]
    WITHDRAWN_WORD_IDS_FIELD_NUMBER: _ClassVar[int]
    CONVERSATION_FINAL_FIELD_NUMBER: _ClassVar[int]
    EPOCH_FIELD_NUMBER: _ClassVar[int]
    seq: int
    server_time: float
    words: _containers.RepeatedCompositeFieldContainer[WordState]
    utterances: _containers.RepeatedCompositeFieldContainer[UtteranceState]
    withdrawn_word_ids: _containers.RepeatedScalarFieldContainer[str]
    conversation_final: bool
    epoch: int
    def __init__(self, seq: _Optional[int] = ..., server_time: _Optional[float] = ..., words: _Optional[_Iterable[_Union[WordState, _Mapping]]] = ..., utterances: _Optional[_Iterable[_Union[UtteranceState, _Mapping]]] = ..., withdrawn_word_ids: _Optional[_Iterable[str]] = ..., conversation_final: _Optional[bool] = ..., epoch: _Optional[int] = ...) -> None: ...

class Snapshot(_message.Message):
    __slots__ = ("seq", "words", "utterances", "conversation_final", "epoch")
    SEQ_FIELD_NUMBER: _ClassVar[int]
    WORDS_FIELD_NUMBER: _ClassVar[int]
    UTTERANCES_FIELD_NUMBER: _ClassVar[int]
    CONVERSATION_FINAL_FIELD_NUMBER: _ClassVar[int]
    EPOCH_FIELD_NUMBER: _ClassVar[int]
    seq: int
    words: _containers.RepeatedCompositeFieldContainer[WordState]
    utterances: _containers.RepeatedCompositeFieldContainer[UtteranceState]
    conversation_final: bool
    epoch: int
    def __init__(self, seq: _Optional[int] = ..., words: _Optional[_Iterable[_Union[WordState, _Mapping]]] = ..., utterances: _Optional[_Iterable[_Union[UtteranceState, _Mapping]]] = ..., conversation_final: _Optional[bool] = ..., epoch: _Optional[int] = ...) -> None: ...

class Gap(_message.Message):
    __slots__ = ("first_missing", "oldest_kept", "reason")
    FIRST_MISSING_FIELD_NUMBER: _ClassVar[int]
    OLDEST_KEPT_FIELD_NUMBER: _ClassVar[int]
    REASON_FIELD_NUMBER: _ClassVar[int]
    first_missing: int
    oldest_kept: int
    reason: GapReason
    def __init__(self, first_missing: _Optional[int] = ..., oldest_kept: _Optional[int] = ..., reason: _Optional[_Union[GapReason, str]] = ...) -> None: ...

class Welcome(_message.Message):
    __slots__ = ("conversation_id", "next_seq", "epoch", "events_logged")
    CONVERSATION_ID_FIELD_NUMBER: _ClassVar[int]
    NEXT_SEQ_FIELD_NUMBER: _ClassVar[int]
    EPOCH_FIELD_NUMBER: _ClassVar[int]
    EVENTS_LOGGED_FIELD_NUMBER: _ClassVar[int]
    conversation_id: str
    next_seq: int
    epoch: int
    events_logged: int
    def __init__(self, conversation_id: _Optional[str] = ..., next_seq: _Optional[int] = ..., epoch: _Optional[int] = ..., events_logged: _Optional[int] = ...) -> None: ...

class Ended(_message.Message):
    __slots__ = ("reason", "last_seq")
    REASON_FIELD_NUMBER: _ClassVar[int]
    LAST_SEQ_FIELD_NUMBER: _ClassVar[int]
    reason: EndReason
    last_seq: int
    def __init__(self, reason: _Optional[_Union[EndReason, str]] = ..., last_seq: _Optional[int] = ...) -> None: ...

class ServerMessage(_message.Message):
    __slots__ = ("welcome", "update", "snapshot", "gap", "ended")
    WELCOME_FIELD_NUMBER: _ClassVar[int]
    UPDATE_FIELD_NUMBER: _ClassVar[int]
    SNAPSHOT_FIELD_NUMBER: _ClassVar[int]
    GAP_FIELD_NUMBER: _ClassVar[int]
    ENDED_FIELD_NUMBER: _ClassVar[int]
    welcome: Welcome
    update: Update
    snapshot: Snapshot
    gap: Gap
    ended: Ended
    def __init__(self, welcome: _Optional[_Union[Welcome, _Mapping]] = ..., update: _Optional[_Union[Update, _Mapping]] = ..., snapshot: _Optional[_Union[Snapshot, _Mapping]] = ..., gap: _Optional[_Union[Gap, _Mapping]] = ..., ended: _Optional[_Union[Ended, _Mapping]] = ...) -> None: ...

class FollowRequest(_message.Message):
    __slots__ = ("conversation_id", "from_seq", "epoch")
    CONVERSATION_ID_FIELD_NUMBER: _ClassVar[int]
    FROM_SEQ_FIELD_NUMBER: _ClassVar[int]
    EPOCH_FIELD_NUMBER: _ClassVar[int]
    conversation_id: str
    from_seq: int
    epoch: int
    def __init__(self, conversation_id: _Optional[str] = ..., from_seq: _Optional[int] = ..., epoch: _Optional[int] = ...) -> None: ...

class ConversationSummary(_message.Message):
    __slots__ = ("conversation_id", "speakers", "words", "last_seq", "started_at", "ended", "epoch")
    CONVERSATION_ID_FIELD_NUMBER: _ClassVar[int]
    SPEAKERS_FIELD_NUMBER: _ClassVar[int]
    WORDS_FIELD_NUMBER: _ClassVar[int]
    LAST_SEQ_FIELD_NUMBER: _ClassVar[int]
    STARTED_AT_FIELD_NUMBER: _ClassVar[int]
    ENDED_FIELD_NUMBER: _ClassVar[int]
    EPOCH_FIELD_NUMBER: _ClassVar[int]
    conversation_id: str
    speakers: _containers.RepeatedScalarFieldContainer[str]
    words: int
    last_seq: int
    started_at: float
    ended: bool
    epoch: int
    def __init__(self, conversation_id: _Optional[str] = ..., speakers: _Optional[_Iterable[str]] = ..., words: _Optional[int] = ..., last_seq: _Optional[int] = ..., started_at: _Optional[float] = ..., ended: _Optional[bool] = ..., epoch: _Optional[int] = ...) -> None: ...

class ListConversationsRequest(_message.Message):
    __slots__ = ()
    def __init__(self) -> None: ...

class ListConversationsReply(_message.Message):
    __slots__ = ("conversations",)
    CONVERSATIONS_FIELD_NUMBER: _ClassVar[int]
    conversations: _containers.RepeatedCompositeFieldContainer[ConversationSummary]
    def __init__(self, conversations: _Optional[_Iterable[_Union[ConversationSummary, _Mapping]]] = ...) -> None: ...

class TranscriptItem(_message.Message):
    __slots__ = ("word", "hint", "tick")
    WORD_FIELD_NUMBER: _ClassVar[int]
    HINT_FIELD_NUMBER: _ClassVar[int]
    TICK_FIELD_NUMBER: _ClassVar[int]
    word: SpokenWord
    hint: SpeakerHint
    tick: TimeTick
    def __init__(self, word: _Optional[_Union[SpokenWord, _Mapping]] = ..., hint: _Optional[_Union[SpeakerHint, _Mapping]] = ..., tick: _Optional[_Union[TimeTick, _Mapping]] = ...) -> None: ...

class TagTranscriptRequest(_message.Message):
    __slots__ = ("items",)
    ITEMS_FIELD_NUMBER: _ClassVar[int]
    items: _containers.RepeatedCompositeFieldContainer[TranscriptItem]
    def __init__(self, items: _Optional[_Iterable[_Union[TranscriptItem, _Mapping]]] = ...) -> None: ...

class TagTranscriptReply(_message.Message):
    __slots__ = ("words", "utterances")
    WORDS_FIELD_NUMBER: _ClassVar[int]
    UTTERANCES_FIELD_NUMBER: _ClassVar[int]
    words: _containers.RepeatedCompositeFieldContainer[WordState]
    utterances: _containers.RepeatedCompositeFieldContainer[UtteranceState]
    def __init__(self, words: _Optional[_Iterable[_Union[WordState, _Mapping]]] = ..., utterances: _Optional[_Iterable[_Union[UtteranceState, _Mapping]]] = ...) -> None: ...

class GetRevisionsRequest(_message.Message):
    __slots__ = ("conversation_id",)
    CONVERSATION_ID_FIELD_NUMBER: _ClassVar[int]
    conversation_id: str
    def __init__(self, conversation_id: _Optional[str] = ...) -> None: ...

class Revision(_message.Message):
    __slots__ = ("seq", "server_time", "word", "utterance")
    SEQ_FIELD_NUMBER: _ClassVar[int]
    SERVER_TIME_FIELD_NUMBER: _ClassVar[int]
    WORD_FIELD_NUMBER: _ClassVar[int]
    UTTERANCE_FIELD_NUMBER: _ClassVar[int]
    seq: int
    server_time: float
    word: WordState
    utterance: UtteranceState
    def __init__(self, seq: _Optional[int] = ..., server_time: _Optional[float] = ..., word: _Optional[_Union[WordState, _Mapping]] = ..., utterance: _Optional[_Union[UtteranceState, _Mapping]] = ...) -> None: ...

class GetRevisionsReply(_message.Message):
    __slots__ = ("conversation_id", "revisions", "truncated", "epoch")
    CONVERSATION_ID_FIELD_NUMBER: _ClassVar[int]
    REVISIONS_FIELD_NUMBER: _ClassVar[int]
    TRUNCATED_FIELD_NUMBER: _ClassVar[int]
    EPOCH_FIELD_NUMBER: _ClassVar[int]
    conversation_id: str
    revisions: _containers.RepeatedCompositeFieldContainer[Revision]
    truncated: bool
    epoch: int
    def __init__(self, conversation_id: _Optional[str] = ..., revisions: _Optional[_Iterable[_Union[Revision, _Mapping]]] = ..., truncated: _Optional[bool] = ..., epoch: _Optional[int] = ...) -> None: ...

class ModelDescription(_message.Message):
    __slots__ = ("kind", "name", "format_version", "labels", "sha256", "training_summary_json")
    KIND_FIELD_NUMBER: _ClassVar[int]
    NAME_FIELD_NUMBER: _ClassVar[int]
    FORMAT_VERSION_FIELD_NUMBER: _ClassVar[int]
    LABELS_FIELD_NUMBER: _ClassVar[int]
    SHA256_FIELD_NUMBER: _ClassVar[int]
    TRAINING_SUMMARY_JSON_FIELD_NUMBER: _ClassVar[int]
    kind: str
    name: str
    format_version: int
    labels: _containers.RepeatedScalarFieldContainer[str]
    sha256: str
    training_summary_json: str
    def __init__(self, kind: _Optional[str] = ..., name: _Optional[str] = ..., format_version: _Optional[int] = ..., labels: _Optional[_Iterable[str]] = ..., sha256: _Optional[str] = ..., training_summary_json: _Optional[str] = ...) -> None: ...

class DescribeModelsRequest(_message.Message):
    __slots__ = ()
    def __init__(self) -> None: ...

class DescribeModelsReply(_message.Message):
    __slots__ = ("models",)
    MODELS_FIELD_NUMBER: _ClassVar[int]
    models: _containers.RepeatedCompositeFieldContainer[ModelDescription]
    def __init__(self, models: _Optional[_Iterable[_Union[ModelDescription, _Mapping]]] = ...) -> None: ...

class ReloadModelsRequest(_message.Message):
    __slots__ = ("directory",)
    DIRECTORY_FIELD_NUMBER: _ClassVar[int]
    directory: str
    def __init__(self, directory: _Optional[str] = ...) -> None: ...
