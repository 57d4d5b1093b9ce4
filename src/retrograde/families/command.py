"""The ``command`` family: a team's own trainer, run as an argument list (never a shell).

Protocol (what the trainer sees and must write):

- ``command`` is a list of arguments with placeholders, substituted as plain text:
  ``{train}``, ``{valid}``, ``{test}`` (folders in the :class:`~retrograde.SequenceSet`
  format: ``tokens.npy``, ``offsets.npy``, ``meta.json`` with ``vocab_size``), ``{out}``
  (an empty folder) and ``{seed}`` (an integer). The trainer trains on ``{train}`` (``{valid}``
  for early stopping; it may have 0 units) and scores ``{test}``.
- It writes ``{out}/logprobs.npy``: float64 ``(n_test_tokens + n_test_units,)``, for each
  test unit in order its ``len + 1`` natural-log probabilities (one per token, then the end
  marker, outcome ``vocab_size``), each ``<= 0`` and finite.
- Optionally ``{out}/curve.json``: a list of ``{"epoch": int, "valid_bits_per_token": float}``.

``fit`` runs ``command`` once with ``{test}`` = the validation units (so failures surface
early and the learning curve exists). ``logprobs`` then needs the trainer again:

- with ``score_command`` (placeholders ``{model}``, ``{test}``, ``{out}``, ``{seed}``), the
  ``{out}`` folder of the fit run is kept as ``{model}`` (the trainer should save its
  weights there) and only scoring runs; the folder is saved with the model;
- without it, ``command`` runs again from scratch (train and valid units are kept, and
  saved with the model), so a deterministic trainer gives the same scores.

The pipeline's fit stage calls ``fit_logprobs(train, valid, test, seed)`` instead: without
``score_command`` that is one run with ``{test}`` = the test units, so the trainer trains
once per cell.

Relative paths in the arguments are resolved from the current working directory (the DVC
stage folder in a pipeline). A non-zero exit, a timeout, or output of the wrong length,
non-finite or positive values raise :class:`~retrograde.errors.FitError` with the tail of
the trainer's stderr. The trainer runs in its own process group, killed whole on a timeout
(and after the trainer exits), so no process it started outlives it.
"""

from __future__ import annotations

import hashlib
import shutil
import tempfile
import weakref
from collections.abc import Sequence
from pathlib import Path
from typing import Any, ClassVar

import numpy as np

from ..data import Ragged, SequenceSet, write_npz
from ..validation import check_float
from ._base import Family
from ._command_run import check_arguments, read_curve, run_trainer
from ._probe import PROBE_FILE, probe_positions, probe_size

__all__ = ["CommandFamily"]

_FIT_KEYS = ("train", "valid", "test", "out", "seed")
_SCORE_KEYS = ("model", "test", "out", "seed")


class CommandFamily(Family):
    """Run an external trainer/scorer given as an argument list.

    Parameters
    ----------
    command : list of str
        Trains and scores: placeholders ``{train}``, ``{valid}``, ``{test}``, ``{out}``,
        ``{seed}``.
    score_command : list of str or None, default None
        Scores with the model the fit run left in its ``{out}``: placeholders ``{model}``,
        ``{test}``, ``{out}``, ``{seed}``.
    timeout : float, default 3600
        Seconds each run may take.
    """

    name: ClassVar[str] = "command"
    #: The conformance test fills in the example trainer (tests/test_families_conformance.py).
    example_params: ClassVar[dict[str, Any]] = {}

    command: list[str]
    score_command: list[str] | None
    timeout: float
    #: the trainer's {out} folder of the fit run (with score_command), else None
    model_dir_: Path | None

    def __init__(
        self,
        *,
        command: Sequence[str],
        score_command: Sequence[str] | None = None,
        timeout: float = 3600.0,
    ) -> None:
        super().__init__(
            command=_as_list(command),
            score_command=None if score_command is None else _as_list(score_command),
            timeout=timeout,
        )

    def _validate_params(self) -> None:
        owner = f"family {self.name!r}"
        check_arguments(owner, "command", self.command, _FIT_KEYS)
        if self.score_command is not None:
            check_arguments(owner, "score_command", self.score_command, _SCORE_KEYS)
        check_float(owner, "timeout", self.timeout, 0.0, low_open=True)

    # ------------------------------------------------------------------ learning
    def fit(
        self, train: SequenceSet, valid: SequenceSet | None = None, seed: int = 0
    ) -> CommandFamily:
        """Run ``command`` with ``{test}`` = the validation units; keep what scoring needs."""
        self._fit(train, valid, seed, test=None)
        return self

    def fit_logprobs(
        self,
        train: SequenceSet,
        valid: SequenceSet | None,
        test: SequenceSet,
        seed: int = 0,
    ) -> Ragged:
        """Without ``score_command``: one trainer run, with ``{test}`` = ``test``.

        ``fit`` then ``logprobs`` would run the trainer twice (once on the validation
        units, once more from scratch on ``test``); the scores are the same for a
        deterministic trainer. The learning curve then comes from ``curve.json`` only.
        With ``score_command`` this is ``fit`` then ``logprobs``.
        """
        if self.score_command is not None:
            return super().fit_logprobs(train, valid, test, seed)
        values = self._fit(train, valid, seed, test=test)
        return Ragged(values, test.offsets + np.arange(len(test) + 1))

    def _fit(
        self,
        train: SequenceSet,
        valid: SequenceSet | None,
        seed: int,
        test: SequenceSet | None,
    ) -> np.ndarray:
        """Run ``command`` once, scoring ``test`` (the validation units when None)."""
        self._validate_params()
        self.vocab_size_ = train.effective_vocab_size()
        self.seed_ = int(seed)
        empty = SequenceSet.from_list([], vocab_size=self.vocab_size_)
        self.train_ = _with_vocab(train, self.vocab_size_)
        self.valid_ = _with_vocab(valid if valid is not None else empty, self.vocab_size_)
        if test is not None:
            self._check_units(test)
        scored = self.valid_ if test is None else _with_vocab(test, self.vocab_size_)
        workdir = Path(tempfile.mkdtemp(prefix="retrograde-command-"))
        out = workdir / "out"
        try:
            values = self._run_fit_command(scored, workdir, out)
            self.learning_curve_ = read_curve(out / "curve.json")
        except BaseException:
            shutil.rmtree(workdir, ignore_errors=True)
            raise
        finally:
            for split in ("train", "valid", "test"):  # copies of the units: no longer needed
                shutil.rmtree(workdir / split, ignore_errors=True)
        if self.score_command is not None:
            # The trainer's {out} holds its model until this object goes (or is saved).
            self.model_dir_ = out
            weakref.finalize(self, shutil.rmtree, workdir, ignore_errors=True)
        else:
            self.model_dir_ = None
            shutil.rmtree(workdir, ignore_errors=True)
        if not self.learning_curve_ and test is None and len(self.valid_):
            bits = -values.sum() / np.log(2) / max(len(self.valid_.tokens), 1)
            self.learning_curve_ = [{"epoch": 1, "valid_bits_per_token": float(bits)}]
        return values

    def _run_fit_command(
        self, test: SequenceSet, workdir: Path, out: Path, probe: np.ndarray | None = None
    ) -> np.ndarray:
        for split, units in (("train", self.train_), ("valid", self.valid_), ("test", test)):
            units.save(workdir / split)
        out.mkdir()
        places = {key: str(workdir / key) for key in ("train", "valid", "test", "out")}
        places["seed"] = str(self.seed_)
        return self._run(self.command, places, test, "command", probe)

    def _run(
        self,
        arguments: list[str],
        places: dict[str, str],
        test: SequenceSet,
        key: str,
        probe: np.ndarray | None,
    ) -> np.ndarray:
        """Write ``{test}/probe.npy``, run the trainer, keep its probe; the log-probabilities."""
        if probe is None:
            probe = probe_positions(test, probe_size(self.vocab_size_), self.seed_)
        np.save(Path(places["test"]) / PROBE_FILE, probe)
        values, distributions = run_trainer(
            arguments, places, Path(places["out"]), test, self.timeout, key, probe
        )
        self.probe_ = (_digest(test), probe, distributions)
        return values

    # ------------------------------------------------------------------- scoring
    def logprobs(self, units: SequenceSet) -> Ragged:
        """Row ``i``: ``len(units[i]) + 1`` natural-log probabilities from the trainer."""
        return Ragged(self._score(units), units.offsets + np.arange(len(units) + 1))

    def _score(self, units: SequenceSet, probe: np.ndarray | None = None) -> np.ndarray:
        self._check_fitted()
        self._check_units(units)
        units = _with_vocab(units, self.vocab_size_)
        with tempfile.TemporaryDirectory(prefix="retrograde-command-") as tmp:
            workdir = Path(tmp)
            if self.score_command is None or self.model_dir_ is None:
                return self._run_fit_command(units, workdir, workdir / "out", probe)
            units.save(workdir / "test")
            (workdir / "out").mkdir()
            places = {
                "model": str(self.model_dir_),
                "test": str(workdir / "test"),
                "out": str(workdir / "out"),
                "seed": str(self.seed_),
            }
            return self._run(self.score_command, places, units, "score_command", probe)

    def probe_logprobs(self, units: SequenceSet, positions: np.ndarray) -> np.ndarray:
        """The distributions the trainer wrote for ``positions`` in its last run.

        The fit stage probes the positions the trainer was given (the same seeded sample);
        other positions need another trainer run.
        """
        stored = getattr(self, "probe_", None)
        if (
            stored is not None
            and stored[0] == _digest(units)
            and np.array_equal(stored[1], positions)
        ):
            return stored[2]
        self._score(units, positions)
        return self.probe_[2]

    def next_token_probs(self, contexts: Sequence[np.ndarray]) -> np.ndarray:
        """(n_contexts, vocab_size + 1): the trainer's probe of each context's next outcome.

        One trainer run scores the contexts as units and writes the full distribution at
        each context's end (the position of the end marker, ``len(context)``).
        """
        units = SequenceSet.from_list(list(contexts), vocab_size=self.vocab_size_)
        probe = np.column_stack([np.arange(len(units)), units.lengths]).astype(np.int64)
        return np.exp(self.probe_logprobs(units, probe))

    # --------------------------------------------------------------- persistence
    def _save_state(self, folder: Path) -> None:
        state = {"seed": np.array(self.seed_)}
        if self.model_dir_ is not None:
            shutil.copytree(self.model_dir_, folder / "trainer")
        else:
            for split, units in (("train", self.train_), ("valid", self.valid_)):
                state[f"{split}_tokens"] = units.tokens
                state[f"{split}_offsets"] = units.offsets
        write_npz(folder / "state.npz", state)

    def _load_state(self, folder: Path) -> None:
        with np.load(folder / "state.npz", allow_pickle=False) as data:
            self.seed_ = int(data["seed"])
            sets = {}
            for split in ("train", "valid"):
                if f"{split}_tokens" in data.files:
                    sets[split] = SequenceSet(
                        data[f"{split}_tokens"],
                        data[f"{split}_offsets"],
                        vocab_size=self.vocab_size_,
                    )
        self.train_, self.valid_ = sets.get("train"), sets.get("valid")  # type: ignore[assignment]
        trainer = folder / "trainer"
        self.model_dir_ = trainer.resolve() if trainer.is_dir() else None


def _digest(units: SequenceSet) -> str:
    """A fingerprint of the units' content, to match a stored probe to its units."""
    digest = hashlib.blake2b(digest_size=16)
    digest.update(np.ascontiguousarray(units.tokens, dtype="<i8").tobytes())
    digest.update(np.ascontiguousarray(units.offsets, dtype="<i8").tobytes())
    return digest.hexdigest()


def _as_list(arguments: Any) -> Any:
    """Lists (and tuples, OmegaConf ListConfig) become plain lists; anything else is kept
    unchanged so validation can name it."""
    if isinstance(arguments, str) or not isinstance(arguments, Sequence):
        return arguments
    return list(arguments)


def _with_vocab(units: SequenceSet, vocab_size: int) -> SequenceSet:
    if units.vocab_size == vocab_size:
        return units
    return SequenceSet(
        units.tokens,
        units.offsets,
        vocab_size=vocab_size,
        doc_ids=units.doc_ids,
        n_bytes=units.n_bytes,
    )
