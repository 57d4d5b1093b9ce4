"""Learned subword tokenizers: ``bpe`` and ``unigram``, trained with SentencePiece.

Both are fitted on the text of the training units only (the units are cut and split first,
from characters, so no vocabulary exists before the split). SentencePiece is used for both
models because its training is deterministic on one thread (measured: the same corpus gave
byte-identical models; the ``tokenizers`` package's unigram trainer did not), and byte
fallback makes every text encodable: a character unseen in training is written as its
UTF-8 bytes, so ``decode(encode(text)) == text`` (no unknown token appears; the one
exception is the character U+2581, which SentencePiece uses for spaces internally and
decodes as a space). The field separator of records (U+001F) is a piece of its own.

Two settings say how orders meet a learned tokenizer (they are read by the pipeline, not
by the tokenizer):

``reorder``
    ``"tokens"`` (default): tokenize the natural text, then orders permute the tokens, as
    with every other tokenizer. ``"characters"``: orders permute the characters of each unit
    and the reordered text is tokenized; token counts then differ between orders, so
    results are compared in bits per byte of the natural text.
``fit``
    ``"shared"`` (default): one tokenizer fitted on the natural training text serves every
    order. ``"per_order"``: each order fits its own on its own reordered training text
    (needs ``reorder="characters"``).
"""

from __future__ import annotations

import base64
import io
from collections.abc import Iterable, Sequence
from typing import Any, ClassVar

import numpy as np

from ..errors import ConfigError, FitError, MissingDependencyError
from ..validation import check_choice, check_int
from .tokenizers import FIELD_SEPARATOR, UNKNOWN_ID, UNKNOWN_TEXT, Tokenizer, registry

__all__ = ["FIT_MODES", "REORDER_LEVELS", "BpeTokenizer", "LearnedTokenizer", "UnigramTokenizer"]

FIT_MODES = ("shared", "per_order")
REORDER_LEVELS = ("tokens", "characters")
#: byte fallback adds one piece per byte value, plus the unknown token and the separator
_RESERVED = 256 + 2


def _sentencepiece(owner: str) -> Any:
    try:
        import sentencepiece
    except ImportError:
        raise MissingDependencyError(
            f"{owner} needs the sentencepiece package; install it with "
            "pip install 'retrograde[tokenizers]'"
        ) from None
    return sentencepiece


class LearnedTokenizer(Tokenizer):
    """A SentencePiece model of type :attr:`model_type`, fitted on the training units.

    Parameters
    ----------
    vocab_size : int
        Pieces in the vocabulary, the 256 byte pieces, the unknown token and the separator
        included; it must exceed the distinct characters of the training text by ~260.
    fit : {"shared", "per_order"}
    reorder : {"tokens", "characters"}
    """

    #: the SentencePiece ``model_type``
    model_type: ClassVar[str] = ""
    lossless = True
    #: pieces are characters until fitted; units are tokenized one by one (see prepare_units)
    learned: ClassVar[bool] = True

    def __init__(self, *, vocab_size: int = 1000, fit: str = "shared", reorder: str = "tokens"):
        super().__init__(vocab_size=vocab_size, fit=fit, reorder=reorder)
        owner = f"tokenizer {self.name!r}"
        self.target_vocab_size = check_int(owner, "vocab_size", vocab_size, low=_RESERVED + 2)
        self.fit_mode = check_choice(owner, "fit", fit, FIT_MODES)
        self.reorder = check_choice(owner, "reorder", reorder, REORDER_LEVELS)
        if self.fit_mode == "per_order" and self.reorder != "characters":
            raise ConfigError(
                f"{owner}: parameter fit='per_order' needs reorder='characters' (a tokenizer "
                "per order is fitted on that order's text, so orders act before tokenizing)"
            )

    @classmethod
    def library_version(cls) -> str:
        """The training library and its version (composed into the params: a new version
        retrains, since it may tokenize differently)."""
        return f"sentencepiece {_sentencepiece(f'tokenizer {cls.name!r}').__version__}"

    def pieces(self, text: str) -> list[Any]:
        return list(text)  # characters: cutting and splitting happen before any vocabulary

    def fit(self, piece_lists: Iterable[Sequence[Any]]) -> LearnedTokenizer:
        """Train on the texts of the training units (each a str or a list of characters)."""
        texts = [p if isinstance(p, str) else "".join(p) for p in piece_lists]
        texts = [t for t in texts if t]
        if not texts:
            raise FitError(f"tokenizer {self.name!r}: the training units hold no text to fit on")
        spm = _sentencepiece(f"tokenizer {self.name!r}")
        model = io.BytesIO()
        try:
            spm.SentencePieceTrainer.train(
                sentence_iterator=iter(texts),
                model_writer=model,
                model_type=self.model_type,
                vocab_size=self.target_vocab_size,
                hard_vocab_limit=False,  # a small corpus may support fewer pieces
                num_threads=1,  # deterministic
                byte_fallback=True,
                character_coverage=1.0,
                user_defined_symbols=[FIELD_SEPARATOR],
                unk_id=UNKNOWN_ID,
                bos_id=-1,
                eos_id=-1,
                pad_id=-1,
                add_dummy_prefix=False,
                remove_extra_whitespaces=False,
                normalization_rule_name="identity",
                split_by_whitespace=True,
                max_sentence_length=1 << 20,
                minloglevel=2,
            )
        except RuntimeError as exc:
            raise ConfigError(
                f"tokenizer {self.name!r}: SentencePiece could not train with "
                f"vocab_size={self.target_vocab_size} ({str(exc).splitlines()[-1][-160:]}); "
                "raise vocab_size (it counts 256 byte pieces and every distinct character)"
            ) from None
        self._set_vocab(base64.b64encode(model.getvalue()).decode("ascii"))
        return self

    def _set_vocab(self, vocab: Any) -> None:
        spm = _sentencepiece(f"tokenizer {self.name!r}")
        self.model_proto_ = str(vocab)
        self.processor_ = spm.SentencePieceProcessor(
            model_proto=base64.b64decode(self.model_proto_)
        )

    def _get_vocab(self) -> Any:
        self._fitted()
        return self.model_proto_

    def _fitted(self) -> Any:
        if not hasattr(self, "processor_"):
            raise FitError(
                f"tokenizer {self.name!r}: call fit() on the training units before encoding"
            )
        return self.processor_

    def encode(self, text: str) -> np.ndarray:
        return np.asarray(self._fitted().encode(text), dtype=np.int32)

    def encode_many(self, texts: Sequence[str]) -> list[np.ndarray]:
        """One (n_tokens,) int32 array per text."""
        return [np.asarray(ids, dtype=np.int32) for ids in self._fitted().encode(list(texts))]

    def encode_pieces(self, pieces: Sequence[Any]) -> np.ndarray:
        return self.encode(pieces if isinstance(pieces, str) else "".join(pieces))

    def token_id(self, piece: Any) -> int:
        if not isinstance(piece, str):
            return UNKNOWN_ID
        processor = self._fitted()
        found = processor.piece_to_id(piece.replace(" ", "\u2581"))
        return int(found) if not processor.is_unknown(found) else UNKNOWN_ID

    def decode(self, ids: Iterable[int] | np.ndarray) -> str:
        processor = self._fitted()
        values = [int(i) for i in np.asarray(ids).reshape(-1)]
        parts: list[str] = []
        run: list[int] = []
        for value in values:  # the unknown token reads as U+FFFD, as for every tokenizer
            if value == UNKNOWN_ID:
                parts += [processor.decode(run), UNKNOWN_TEXT]
                run = []
            else:
                run.append(value)
        return "".join([*parts, processor.decode(run)])

    @property
    def vocab_size(self) -> int:
        return int(self._fitted().get_piece_size())


@registry.register("bpe")
class BpeTokenizer(LearnedTokenizer):
    """Byte-pair encoding (SentencePiece ``bpe``), fitted on the training units.

    >>> tok = BpeTokenizer(vocab_size=300).fit(["low lower lowest"] * 50)
    >>> tok.decode(tok.encode("lowest low")) == "lowest low"
    True
    """

    name = "bpe"
    model_type = "bpe"


@registry.register("unigram")
class UnigramTokenizer(LearnedTokenizer):
    """Unigram language-model pieces (SentencePiece ``unigram``), fitted on the training units."""

    name = "unigram"
    model_type = "unigram"
