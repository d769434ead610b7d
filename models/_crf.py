"""The one adapter over python-crfsuite: load a linear-chain CRF from bytes, tag, train.

No other module imports ``pycrfsuite``. Model bytes are checked here before they reach C code
(a corrupt or truncated model file must give a :class:`~midstream.ModelError`, not a crash).

Thread safety: a :class:`CrfTagger` keeps crfsuite's hidden per-sequence state (``set()`` then
``tag()`` / ``marginal()``); every public method runs that whole sequence under one lock, so a
tagger may be shared between threads, but calls are serialised. For parallel decoding give each
thread its own tagger (``CrfTagger.from_bytes`` is cheap).
"""

from __future__ import annotations

import multiprocessing
import os
import struct
import tempfile
import threading
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from multiprocessing.connection import Connection
from typing import Any

import numpy as np
import numpy.typing as npt
import pycrfsuite
from midstream import InputError, ModelError

__all__ = [
    "CrfTagger",
    "CrfWeights",
    "ItemFeatures",
    "TrainingOptions",
    "TrainingPairs",
    "shift_state_weights",
    "train_crf",
    "train_crf_from",
]


#: Features of one item (one word): attribute name to value (1.0 for an indicator).
ItemFeatures = Mapping[str, float]

#: A zero-argument callable yielding (features, labels) sequence pairs; called in the child.
TrainingPairs = Callable[[], Iterable[tuple[Sequence[ItemFeatures | Sequence[str]], Sequence[str]]]]

# crfsuite's model header (crfsuite/lib/crf/src/crf1m_model.c): 4-byte magic "lCRF", then a
# little-endian uint32 holding the whole file's size, then the 4-byte model type "FOMC".
_MAGIC = b"lCRF"
_MODEL_TYPE = b"FOMC"
_HEADER_SIZE = 48


def _check_model_bytes(data: bytes) -> None:
    if len(data) < _HEADER_SIZE:
        raise ModelError(f"CRF model truncated: {len(data)} bytes, header alone is {_HEADER_SIZE}")
    if data[:4] != _MAGIC:
        raise ModelError(f"not a CRF model: magic {data[:4]!r}, expected {_MAGIC!r}")
    (size,) = struct.unpack_from("<I", data, 4)
    if size != len(data):
        raise ModelError(
            f"CRF model truncated or padded: header says {size} bytes, got {len(data)}"
        )
    if data[8:12] != _MODEL_TYPE:
        raise ModelError(f"unknown CRF model type {data[8:12]!r}, expected {_MODEL_TYPE!r}")
    # Then version, three counts and five section offsets; an offset past the end would make
    # crfsuite read out of bounds.
    offsets = struct.unpack_from("<5I", data, 28)
    if any(not _HEADER_SIZE <= offset <= size for offset in offsets):
        raise ModelError(f"CRF model corrupt: section offsets {offsets} outside {size} bytes")


@dataclass(frozen=True, slots=True, kw_only=True)
class CrfWeights:
    """A linear-chain CRF's parameters as arrays, for decoders that score words themselves.

    The score of a label sequence ``y`` for items with attribute sets ``A_t`` is
    ``sum_t sum_{a in A_t} state[a, y_t] + sum_{t>0} transitions[y_{t-1}, y_t]`` (crfsuite's
    first-order CRF has no start or end transitions). Attributes without a weight are left out.
    """

    labels: tuple[str, ...]
    attributes: dict[str, int]
    state: npt.NDArray[np.float64]
    transitions: npt.NDArray[np.float64]


class CrfTagger:
    """A trained linear-chain CRF, loaded from bytes.

    Examples
    --------
    >>> model = train_crf([[{"w=a": 1.0}, {"w=b": 1.0}]] * 3, [["x", "y"]] * 3,
    ...                   max_iterations=20)
    >>> tagger = CrfTagger.from_bytes(model)
    >>> tagger.tag([{"w=a": 1.0}, {"w=b": 1.0}])
    ['x', 'y']
    """

    def __init__(self, tagger: Any, data: bytes) -> None:
        # Private: use from_bytes, which checks the bytes first.
        self._tagger = tagger
        # crfsuite reads the model in place: keep the buffer alive as long as the tagger.
        self._data = data
        self._labels: tuple[str, ...] = tuple(tagger.labels())
        self._lock = threading.Lock()

    @classmethod
    def from_bytes(cls, data: bytes) -> CrfTagger:
        """Load a model from the bytes crfsuite wrote (checked before they reach C)."""
        data = bytes(data)
        _check_model_bytes(data)
        tagger = pycrfsuite.Tagger()
        try:
            tagger.open_inmemory(data)
        except (ValueError, OSError) as exc:
            raise ModelError(f"CRF model rejected by crfsuite: {exc}") from exc
        return cls(tagger, data)

    @property
    def labels(self) -> tuple[str, ...]:
        """The labels the model can predict, in the model's order."""
        return self._labels

    @property
    def model_bytes(self) -> bytes:
        return self._data

    def weights(self) -> CrfWeights:
        """The model's weights as arrays, read straight from the checked model bytes."""
        label_names, attribute_names, features = _read_features(self._data)
        index = {label: k for k, label in enumerate(self._labels)}
        try:
            label_index = np.array([index[name] for name in label_names], dtype=np.int64)
        except KeyError as exc:
            raise ModelError(f"CRF model corrupt: label {exc} not known to crfsuite") from exc
        kinds, sources, targets, values = (
            features["type"], features["src"], features["dst"], features["w"]
        )
        state = kinds == _STATE_FEATURE
        transition = kinds == _TRANSITION_FEATURE
        if (sources[state] >= len(attribute_names)).any() or (
            targets.max(initial=0) >= len(label_names)
            or (sources[transition] >= len(label_names)).any()
        ):
            raise ModelError("CRF model corrupt: a feature refers past its string tables")
        transitions = np.zeros((len(self._labels), len(self._labels)))
        transitions[label_index[sources[transition]], label_index[targets[transition]]] = (
            values[transition]
        )
        # Keep only attributes that carry a weight, renumbered densely.
        used, rows = np.unique(sources[state], return_inverse=True)
        matrix = np.zeros((len(used), len(self._labels)))
        matrix[rows, label_index[targets[state]]] = values[state]
        attributes = {attribute_names[int(k)]: row for row, k in enumerate(used.tolist())}
        return CrfWeights(
            labels=self._labels, attributes=attributes, state=matrix, transitions=transitions
        )

    def tag(self, xseq: Sequence[ItemFeatures]) -> list[str]:
        """Most probable label sequence (Viterbi) for ``xseq``."""
        if not xseq:
            return []
        with self._lock:
            self._tagger.set(_items(xseq))
            return list(self._tagger.tag())

    def tag_with_confidence(self, xseq: Sequence[ItemFeatures]) -> tuple[list[str], list[float]]:
        """Viterbi labels and, for each, its marginal probability at that position."""
        if not xseq:
            return [], []
        with self._lock:
            self._tagger.set(_items(xseq))
            labels: list[str] = list(self._tagger.tag())
            confidences = [
                float(self._tagger.marginal(label, t)) for t, label in enumerate(labels)
            ]
        return labels, confidences

    def marginals(self, xseq: Sequence[ItemFeatures]) -> list[dict[str, float]]:
        """Marginal probability of every label at every position."""
        if not xseq:
            return []
        with self._lock:
            self._tagger.set(_items(xseq))
            return [
                {label: float(self._tagger.marginal(label, t)) for label in self._labels}
                for t in range(len(xseq))
            ]

    def tag_with_marginals(self, xseq: Sequence[ItemFeatures],
                           position: int = -1) -> tuple[list[str], dict[str, float]]:
        """Viterbi labels, and the marginal of every label at one ``position`` only.

        One ``set()`` for both, and marginals for a single item: the utterance-function tagger
        needs every label's probability only for the utterance it is labelling (the last).

        Raises
        ------
        IndexError
            ``position`` is outside ``xseq``.
        """
        if not xseq:
            return [], {}
        t = range(len(xseq))[position]
        with self._lock:
            self._tagger.set(_items(xseq))
            labels: list[str] = list(self._tagger.tag())
            marginals = {label: float(self._tagger.marginal(label, t)) for label in self._labels}
        return labels, marginals


# crfsuite's feature chunk ("FEAT", size, count) then 20-byte records (crf1d_model.c).
_FEATURE_RECORD = np.dtype([("type", "<u4"), ("src", "<u4"), ("dst", "<u4"), ("w", "<f8")])
_STATE_FEATURE = 0
_TRANSITION_FEATURE = 1


def _read_features(data: bytes) -> tuple[list[str], list[str], npt.NDArray[np.void]]:
    """Label names, attribute names and feature records of checked crfsuite model bytes."""
    offsets = struct.unpack_from("<3I", data, 28)
    features_at, labels_at, attributes_at = offsets
    if features_at + 12 > len(data):
        raise ModelError("CRF model corrupt: feature chunk outside the file")
    magic, _size, count = struct.unpack_from("<4sII", data, features_at)
    if magic != b"FEAT" or features_at + 12 + count * _FEATURE_RECORD.itemsize > len(data):
        raise ModelError("CRF model corrupt: bad feature chunk")
    features = np.frombuffer(data, _FEATURE_RECORD, count, features_at + 12)
    return _read_strings(data, labels_at), _read_strings(data, attributes_at), features


def shift_state_weights(data: bytes, attribute: str, shifts: Mapping[str, float]) -> bytes:
    """Model bytes with ``shifts[label]`` added to the state weight of (``attribute``, label).

    With an attribute every item carries (a bias), this adds a constant to a label's score at
    every position: a prior shift that crfsuite's Viterbi and marginals, and every decoder
    reading :meth:`CrfTagger.weights`, then apply alike, since it is in the model itself. The
    weight is changed in place in crfsuite's feature chunk; the file's layout does not change.

    Raises
    ------
    ModelError
        The bytes are not a model, or the model has no weight for one of the pairs (L1
        regularisation removed it, or the label or attribute is unknown): a feature cannot be
        added without rewriting crfsuite's file.
    """
    data = bytes(data)
    _check_model_bytes(data)
    if not shifts:
        return data
    label_names, attribute_names, features = _read_features(data)
    try:
        source = attribute_names.index(attribute)
    except ValueError:
        raise ModelError(f"CRF model has no attribute {attribute!r}") from None
    out = bytearray(data)
    features_at = struct.unpack_from("<I", data, 28)[0] + 12
    for label, shift in shifts.items():
        if label not in label_names:
            raise ModelError(f"CRF model has no label {label!r}")
        target = label_names.index(label)
        hits = np.flatnonzero((features["type"] == _STATE_FEATURE) & (features["src"] == source)
                              & (features["dst"] == target))
        if len(hits) != 1:
            raise ModelError(f"CRF model has no weight for {attribute!r} and label {label!r}: "
                             "L1 regularisation removed it, so nothing can shift that label "
                             "(a smaller c1 keeps it)")
        at = features_at + int(hits[0]) * _FEATURE_RECORD.itemsize + 12
        (weight,) = struct.unpack_from("<d", out, at)
        struct.pack_into("<d", out, at, weight + shift)
    return bytes(out)


def _read_strings(data: bytes, start: int) -> list[str]:
    """The id-ordered keys of a constant-quark database (crfsuite's cqdb.c layout)."""
    if start + 24 > len(data):
        raise ModelError("CRF model corrupt: string table outside the file")
    magic, _size, _flag, _order, count, backward = struct.unpack_from("<4sIIIII", data, start)
    if magic != b"CQDB" or start + backward + 4 * count > len(data):
        raise ModelError("CRF model corrupt: bad string table")
    names: list[str] = []
    for k, offset in enumerate(np.frombuffer(data, "<u4", count, start + backward).tolist()):
        at = start + offset
        if offset == 0 or at + 8 > len(data):
            raise ModelError(f"CRF model corrupt: string {k} missing")
        value, size = struct.unpack_from("<iI", data, at)
        if value != k or size == 0 or at + 8 + size > len(data):
            raise ModelError(f"CRF model corrupt: string {k} malformed")
        # Keys are stored with their terminating NUL.
        names.append(data[at + 8 : at + 7 + size].decode("utf-8", errors="replace"))
    return names


def _items(xseq: Sequence[ItemFeatures]) -> list[dict[str, float]]:
    # pycrfsuite accepts dicts of str to float; a Mapping that is not a dict is copied.
    return [x if isinstance(x, dict) else dict(x) for x in xseq]


@dataclass(frozen=True, slots=True, kw_only=True)
class TrainingOptions:
    """Hyper-parameters of L-BFGS training with elastic-net regularisation (see :func:`train_crf`).

    ``c1`` weighs the L1 term (drives weights to exactly zero, shrinking the model), ``c2`` the
    L2 term; ``min_freq`` drops attributes seen fewer times in the training data.
    """

    c1: float = 0.1
    c2: float = 0.01
    min_freq: int = 1
    max_iterations: int = 200
    all_possible_transitions: bool = True


def train_crf(
    xseqs: Sequence[Sequence[ItemFeatures]],
    yseqs: Sequence[Sequence[str]],
    *,
    c1: float = 0.1,
    c2: float = 0.01,
    min_freq: int = 1,
    max_iterations: int = 200,
    all_possible_transitions: bool = True,
) -> bytes:
    """Train a CRF in a child process and return the model bytes.

    crfsuite's training holds the GIL for its whole run; a child process keeps the caller's
    threads (progress bars, servers) responsive. The child is forked so the training set need
    not be pickled; training is started from the command line or tests, never from a threaded
    server.

    Raises
    ------
    InputError
        Sequences and label sequences differ in number or length, or there is no data.
    ModelError
        crfsuite failed to train.
    """
    if len(xseqs) != len(yseqs):
        raise InputError(f"{len(xseqs)} feature sequences but {len(yseqs)} label sequences")
    for i, (x, y) in enumerate(zip(xseqs, yseqs, strict=True)):
        if len(x) != len(y):
            raise InputError(f"sequence {i}: {len(x)} items but {len(y)} labels")
    if not any(xseqs):
        raise InputError("no training data")
    return train_crf_from(
        lambda: zip(xseqs, yseqs, strict=True),
        c1=c1, c2=c2, min_freq=min_freq, max_iterations=max_iterations,
        all_possible_transitions=all_possible_transitions,
    )


def train_crf_from(
    pairs: TrainingPairs,
    *,
    c1: float = 0.1,
    c2: float = 0.01,
    min_freq: int = 1,
    max_iterations: int = 200,
    all_possible_transitions: bool = True,
) -> bytes:
    """Like :func:`train_crf`, but the training pairs are produced inside the child process.

    ``pairs()`` is called in the child, so a large training set is built there, streamed
    into crfsuite and never held as Python objects in the caller. An item may be a mapping of
    attribute to value or a sequence of attribute names (each valued 1.0).

    Raises
    ------
    ModelError
        crfsuite failed, or ``pairs()`` raised or yielded no data (message says which).
    """
    options = TrainingOptions(
        c1=c1, c2=c2, min_freq=min_freq, max_iterations=max_iterations,
        all_possible_transitions=all_possible_transitions,
    )
    method = "fork" if "fork" in multiprocessing.get_all_start_methods() else "spawn"
    context = multiprocessing.get_context(method)
    receiver, sender = context.Pipe(duplex=False)
    process = context.Process(  # type: ignore[attr-defined]
        target=_train_child, args=(sender, pairs, options), daemon=True
    )
    process.start()
    sender.close()
    try:
        result = receiver.recv()
    except EOFError as exc:
        process.join()
        raise ModelError(f"CRF training process died (exit code {process.exitcode})") from exc
    finally:
        receiver.close()
    process.join()
    if isinstance(result, str):
        raise ModelError(f"CRF training failed: {result}")
    assert isinstance(result, bytes)
    _check_model_bytes(result)
    return result


def _train_child(sender: Connection, pairs: TrainingPairs, options: TrainingOptions) -> None:
    try:
        trainer = pycrfsuite.Trainer(verbose=False)
        count = 0
        for x, y in pairs():
            if len(x) != len(y):
                raise InputError(f"sequence {count}: {len(x)} items but {len(y)} labels")
            if x:
                trainer.append(list(x), list(y))
                count += 1
        if not count:
            raise InputError("no training data")
        trainer.select("lbfgs")
        trainer.set_params(
            {
                "c1": options.c1,
                "c2": options.c2,
                "feature.minfreq": options.min_freq,
                "max_iterations": options.max_iterations,
                "feature.possible_transitions": options.all_possible_transitions,
            }
        )
        with tempfile.TemporaryDirectory(prefix="midstream-crf-") as folder:
            path = os.path.join(folder, "model.crfsuite")
            trainer.train(path)
            with open(path, "rb") as handle:
                sender.send(handle.read())
    except Exception as exc:  # reported to the parent, which raises ModelError
        sender.send(f"{type(exc).__name__}: {exc}")
    finally:
        sender.close()
