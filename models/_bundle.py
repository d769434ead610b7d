"""Loaded models as one unit: the word tagger and the utterance-function tagger.

A :class:`ModelBundle` is immutable once loaded; the server swaps whole bundles on reload, so a
live conversation keeps the bundle it started with. The models inside are shared by every
engine the bundle makes: they are read-only, and every engine of a server runs on the one
event-loop thread, so their calls never interleave.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from importlib import resources
from pathlib import Path

from midstream import ModelError, ModelInfo, NotFoundError
from midstream.models._artifact import FORMAT_VERSION, ModelArtifact
from midstream.models._engine import ConversationEngine, EngineConfig
from midstream.models._lattice import warm_up as warm_up_kernels
from midstream.models.boundaries._model import BoundaryModel
from midstream.models.functions._tagger import FunctionTagger
from midstream.models.words._decoder import ChannelDecoder, DecoderConfig
from midstream.models.words._model import WordModel

#: Largest model file read (explicit limit; the shipped models are a few MB).
MAX_MODEL_BYTES = 256 * 1024 * 1024
#: When a folder holds function models of several schemes, the first found here gives the fine
#: class (and, alone, the coarse function by summing its marginals); a coarse-scheme model
#: beside a fine one decides the coarse function.
_SCHEME_PREFERENCE = ("swbd42", "coarse")


@dataclass(frozen=True, slots=True, kw_only=True)
class _Loaded:
    artifact: ModelArtifact
    info: ModelInfo


class ModelBundle:
    """The models one engine needs, loaded and checked.

    Use :meth:`load_default` or :meth:`load_directory`; the constructor only stores.
    """

    def __init__(self, *, word_model: WordModel, function_tagger: FunctionTagger,
                 infos: tuple[ModelInfo, ...], decoder: DecoderConfig | None = None,
                 engine: EngineConfig | None = None,
                 coarse_tagger: FunctionTagger | None = None,
                 boundary_model: BoundaryModel | None = None) -> None:
        self._word_model = word_model
        self._function_tagger = function_tagger
        self._coarse_tagger = coarse_tagger
        self._boundary_model = boundary_model
        self._infos = infos
        self._decoder = decoder or DecoderConfig()
        self._engine = engine or EngineConfig()

    @classmethod
    def load_default(cls) -> ModelBundle:
        """The models shipped inside the package (``midstream/models/weights``)."""
        return cls.load_directory(Path(str(resources.files("midstream.models") / "weights")))

    @classmethod
    def load_directory(cls, path: Path) -> ModelBundle:
        """Load every ``.tagger`` model in a folder: one word model and a function model, and the
        boundary model (timing evidence for utterance ends) when the folder has one.

        Raises
        ------
        NotFoundError
            The folder does not exist.
        ModelError
            A file is corrupt, truncated, of a newer format or of an unexpected kind, or the
            folder lacks a word model or a function model, or holds two boundary models.
        """
        if not path.is_dir():
            raise NotFoundError(f"model folder {path} does not exist")
        loaded = [_load(file) for file in sorted(path.glob("*.tagger"))]
        words = [m for m in loaded if m.artifact.kind == "words"]
        functions = [m for m in loaded if m.artifact.kind == "utterance_functions"]
        if len(words) != 1:
            raise ModelError(f"{path}: expected exactly one word model (.tagger of kind 'words'), "
                             f"found {len(words)}")
        if not functions:
            raise ModelError(f"{path}: no utterance-function model (.tagger of kind "
                             "'utterance_functions') found")
        boundaries = [m for m in loaded if m.artifact.kind == "boundaries"]
        if len(boundaries) > 1:
            raise ModelError(f"{path}: expected at most one boundary model (.tagger of kind "
                             f"'boundaries'), found {len(boundaries)}")
        by_scheme = {m.artifact.features.get("scheme"): m for m in functions}
        chosen = next((by_scheme[s] for s in _SCHEME_PREFERENCE if s in by_scheme), functions[0])
        word_model = WordModel.from_artifact(words[0].artifact)
        function_tagger = FunctionTagger.from_artifact(chosen.artifact)
        boundary_model = (BoundaryModel.from_artifact(boundaries[0].artifact) if boundaries
                          else None)
        coarse = by_scheme.get("coarse")
        if coarse is None or coarse is chosen:
            return cls(word_model=word_model, function_tagger=function_tagger,
                       infos=(words[0].info, chosen.info, *(m.info for m in boundaries)),
                       boundary_model=boundary_model)
        return cls(word_model=word_model, function_tagger=function_tagger,
                   infos=(words[0].info, chosen.info, coarse.info,
                          *(m.info for m in boundaries)),
                   coarse_tagger=FunctionTagger.from_artifact(coarse.artifact),
                   boundary_model=boundary_model)

    def describe(self) -> tuple[ModelInfo, ...]:
        """The models in this bundle: word model, function model, then any boundary model."""
        return self._infos

    def with_decoder(self, decoder: DecoderConfig) -> ModelBundle:
        """The same loaded models, making engines whose decoders use ``decoder`` (cheap)."""
        return ModelBundle(word_model=self._word_model, function_tagger=self._function_tagger,
                           infos=self._infos, decoder=decoder, engine=self._engine,
                           coarse_tagger=self._coarse_tagger,
                           boundary_model=self._boundary_model)

    @property
    def settings(self) -> tuple[str, ...]:
        """The conversation settings the coarse function model has learnt apart (empty for a
        model trained without them): what :meth:`with_setting` takes."""
        return self.coarse_tagger.settings

    @property
    def setting(self) -> str | None:
        """The setting this bundle's engines label conversations in (``None``: none named)."""
        return self.coarse_tagger.setting

    def with_setting(self, setting: str | None) -> ModelBundle:
        """The same loaded models, making engines that label utterance functions as
        conversations of ``setting`` (one of :attr:`settings`; ``None``: the shared weights
        alone). A fine-class model that has not learnt the setting keeps its own weights.

        Raises
        ------
        InputError
            The coarse function model has learnt no such setting (the message lists those it
            has).
        """
        coarse = self.coarse_tagger.for_setting(setting)
        fine = self._function_tagger
        if self._coarse_tagger is None:
            fine = coarse
        elif setting is None or setting in fine.settings:
            fine = fine.for_setting(setting)
        return ModelBundle(word_model=self._word_model, function_tagger=fine,
                           infos=self._infos, decoder=self._decoder, engine=self._engine,
                           coarse_tagger=coarse if self._coarse_tagger is not None else None,
                           boundary_model=self._boundary_model)

    @staticmethod
    def warm_up() -> None:
        """Compile the decoding kernels now (or load them from their disk cache).

        Otherwise the first word decoded in this process pays for it: seconds on a fresh
        install, a fraction of a second afterwards.
        """
        warm_up_kernels()

    def new_engine(self) -> ConversationEngine:
        """A fresh engine for one conversation (cheap: models are shared)."""
        word_model, decoder, boundary = self._word_model, self._decoder, self._boundary_model
        return ConversationEngine(
            new_decoder=lambda: ChannelDecoder(word_model, decoder, boundary),
            function_tagger=self._function_tagger, coarse_tagger=self._coarse_tagger,
            config=self._engine,
            silence_marks=boundary.silence_marks if boundary is not None else ())

    @property
    def function_tagger(self) -> FunctionTagger:
        """The tagger of the fine class (and of the coarse function when alone)."""
        return self._function_tagger

    @property
    def coarse_tagger(self) -> FunctionTagger:
        """The tagger that decides the coarse function."""
        return self._coarse_tagger or self._function_tagger

    @property
    def word_model(self) -> WordModel:
        return self._word_model

    @property
    def boundary_model(self) -> BoundaryModel | None:
        """Timing evidence for utterance ends, or ``None`` (the word model decides alone)."""
        return self._boundary_model


def default_functions_model_path(scheme: str | None = None) -> Path:
    """The shipped utterance-function model the default bundle serves (the fine one first), or
    the shipped model of ``scheme``."""
    folder = Path(str(resources.files("midstream.models") / "weights"))
    for name in _SCHEME_PREFERENCE if scheme is None else (scheme,):
        path = folder / f"functions-{name}.tagger"
        if path.exists():
            return path
    raise NotFoundError(f"no shipped utterance-function model in {folder}")


def _load(path: Path) -> _Loaded:
    try:
        size = path.stat().st_size
        if size > MAX_MODEL_BYTES:
            raise ModelError(f"{path}: {size} bytes exceeds the model size limit "
                             f"{MAX_MODEL_BYTES}")
        data = path.read_bytes()
    except OSError as exc:
        raise ModelError(f"{path}: cannot read model file: {exc.strerror}") from exc
    artifact = ModelArtifact.from_bytes(data, source=str(path))
    summary = dict(artifact.metadata)
    summary.setdefault("hyper_parameters", dict(artifact.hyper_parameters))
    config = artifact.features.get("config")
    if isinstance(config, dict) and config.get("settings"):
        # What a caller may name (serve --setting): DescribeModels shows it with the model.
        summary.setdefault("settings", list(config["settings"]))
    info = ModelInfo(kind=artifact.kind, name=path.name, format_version=FORMAT_VERSION,
                     labels=artifact.labels, sha256=hashlib.sha256(data).hexdigest(),
                     training_summary=summary)
    return _Loaded(artifact=artifact, info=info)

