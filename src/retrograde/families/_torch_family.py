"""Base class of the PyTorch families: the training loop, scoring, saving.

Subclasses (``gru``, ``lstm``, ``transformer``) declare their network parameters, check them
in ``_validate_network`` and build the network in ``_build_network``. Everything else —
AdamW with warm-up and cosine decay, gradient clipping, early stopping, the token budget,
threads, bf16 autocast and the window scheme of :mod:`._torch_common` — lives here.
"""

from __future__ import annotations

import math
import os
import time
from collections.abc import Iterator, Sequence
from pathlib import Path
from types import ModuleType
from typing import Any, ClassVar

import numpy as np

from ..data import Ragged, SequenceSet
from ..errors import DataError
from ..validation import check_float, check_int, invalid
from ._base import Family
from ._progress import progress_bar
from ._torch_common import (
    Stream,
    TrainingRun,
    Windows,
    batches,
    check_bf16,
    import_torch,
    learning_rate,
    make_stream,
    make_windows,
    prediction_windows,
    require_torch,
    resolve_device,
    torch_session,
)

__all__ = ["TorchFamily"]

# Scoring batches are capped so a batch's logits stay near 2**24 numbers (128 MB as float64).
_LOGIT_BUDGET = 2**24


class TorchFamily(Family):
    """A Family whose network is a causal PyTorch module (see :mod:`._torch_common`)."""

    #: 2: the fit stage gives each order its own stream (``own_stream_per_order``)
    numerics_version: ClassVar[int] = 2
    #: initial weights, batch order and dropout come from ``seed`` alone
    own_stream_per_order: ClassVar[bool] = True
    #: the parameter a context-length sweep varies
    context_parameter: ClassVar[str | None] = "context"
    #: what a sweep can hold equal across its values -> the parameter that fixes it
    budget_parameters: ClassVar[dict[str, str]] = {
        "steps": "step_budget",
        "tokens": "token_budget",
    }

    # training parameters (set by Family.__init__ from the subclass's keyword arguments)
    context: int
    stride: int | None
    batch_size: int
    epochs: int
    lr: float
    weight_decay: float
    warmup: float
    min_lr_ratio: float
    grad_clip: float
    patience: int
    token_budget: int | None
    step_budget: int | None
    threads: int
    bf16: bool
    progress: bool
    device: str

    def __init__(self, **params: Any) -> None:
        require_torch(self.name)  # fail at construction, with the install hint
        super().__init__(**params)

    # ------------------------------------------------------------------ parameters
    def _validate_params(self) -> None:
        owner = f"family {self.name!r}"
        p = self.get_params()
        context = check_int(owner, "context", p["context"], 1)
        if p["stride"] is not None:
            check_int(owner, "stride", p["stride"], 1, context)
        check_int(owner, "batch_size", p["batch_size"], 1)
        check_int(owner, "epochs", p["epochs"], 1)
        check_float(owner, "lr", p["lr"], 0.0, low_open=True)
        check_float(owner, "weight_decay", p["weight_decay"], 0.0)
        check_float(owner, "warmup", p["warmup"], 0.0, 1.0, high_open=True)
        check_float(owner, "min_lr_ratio", p["min_lr_ratio"], 0.0, 1.0)
        check_float(owner, "grad_clip", p["grad_clip"], 0.0, low_open=True)
        check_int(owner, "patience", p["patience"], 0)
        if p["token_budget"] is not None:
            check_int(owner, "token_budget", p["token_budget"], 1)
        if p["step_budget"] is not None:
            check_int(owner, "step_budget", p["step_budget"], 1)
            if p["token_budget"] is not None:
                raise invalid(
                    owner,
                    "step_budget",
                    p["step_budget"],
                    "null when token_budget is set (one budget)",
                )
        check_int(owner, "threads", p["threads"], 1)
        for key in ("bf16", "progress"):
            if not isinstance(p[key], bool):
                raise invalid(owner, key, p[key], "True or False")
        # Only what depends on this machine imports torch (seconds): a bf16 request, and a
        # named accelerator; ``cpu`` and ``auto`` are valid everywhere.
        if p["bf16"]:
            check_bf16(import_torch(self.name), owner, p["bf16"])
        if p["device"] not in ("cpu", "auto"):
            resolve_device(import_torch(self.name), owner, p["device"])
        self._validate_network(owner, p)

    def _validate_network(self, owner: str, params: dict[str, Any]) -> None:
        raise NotImplementedError

    def _build_network(self, torch: ModuleType, vocab_size: int) -> Any:
        raise NotImplementedError

    @property
    def _stride(self) -> int:
        stride = self.get_params()["stride"]
        return int(stride) if stride is not None else max(1, int(self.context) // 2)

    # -------------------------------------------------------------------- training
    def fit(
        self, train: SequenceSet, valid: SequenceSet | None = None, seed: int = 0
    ) -> TorchFamily:
        self._validate_params()
        check_int(f"family {self.name!r}", "seed", seed, 0)
        torch = import_torch(self.name)
        if len(train) == 0:
            raise DataError(f"family {self.name!r}: the training split has no units")
        self.vocab_size_ = max(
            train.effective_vocab_size(), 0 if valid is None else valid.effective_vocab_size()
        )
        if valid is not None and len(valid) == 0:
            valid = None
        self.device_ = resolve_device(torch, f"family {self.name!r}", self.device)
        if self.device_.startswith("cuda"):
            # Deterministic cuBLAS kernels need this workspace setting (CUDA only).
            os.environ.setdefault("CUBLAS_WORKSPACE_CONFIG", ":4096:8")
        with torch_session(torch, threads=int(self.threads), seed=int(seed)):
            # Built on the CPU, then moved: the initial weights do not depend on the device.
            self.network_ = self._build_network(torch, self.vocab_size_).to(self.device_)
            self._train(torch, train, valid, np.random.default_rng(seed))
        return self

    def _plan(self, n_windows: int, n_positions: int) -> tuple[int, int]:
        """(planned optimizer steps, most epochs) for the schedule and the epoch loop."""
        steps_per_epoch = math.ceil(n_windows / int(self.batch_size))
        if self.step_budget is not None:
            return int(self.step_budget), math.ceil(int(self.step_budget) / steps_per_epoch)
        if self.token_budget is None:
            return int(self.epochs) * steps_per_epoch, int(self.epochs)
        # Forward and reverse splits have the same window lengths, hence the same plan.
        epochs_needed = self.token_budget / n_positions
        return math.ceil(epochs_needed * steps_per_epoch), math.ceil(epochs_needed)

    def _train(
        self,
        torch: ModuleType,
        train: SequenceSet,
        valid: SequenceSet | None,
        rng: np.random.Generator,
    ) -> None:
        stream = make_stream(train, self.vocab_size_)
        context = int(self.context)
        windows = make_windows(np.diff(stream.offsets), context=context, stride=context)
        total_steps, max_epochs = self._plan(len(windows), stream.n_positions)
        run = TrainingRun(
            optimizer=torch.optim.AdamW(
                self.network_.parameters(), lr=float(self.lr), weight_decay=float(self.weight_decay)
            ),
            total_steps=total_steps,
            warmup_steps=round(float(self.warmup) * total_steps),
        )
        self.learning_curve_ = []
        started = time.perf_counter()
        bar = progress_bar(
            total=self.token_budget or max_epochs * stream.n_positions,
            unit="tok",
            desc=f"{self.name} fit",
            enabled=bool(self.progress),
        )
        for epoch in range(1, max_epochs + 1):
            train_nats, train_positions = self._train_epoch(
                torch, run, stream, windows, rng.permutation(len(windows)), bar
            )
            record = {
                "epoch": epoch,
                "train_nats_per_position": train_nats / max(train_positions, 1),
                "tokens_seen": run.tokens_seen,
                "steps": run.step,
                "lr": run.optimizer.param_groups[0]["lr"],
            }
            if valid is not None:
                record["valid_bits_per_token"] = self._bits_per_token(valid)
                bar.set_postfix(valid_bits_per_token=f"{record['valid_bits_per_token']:.4f}")
                run.remember_if_best(record["valid_bits_per_token"], self.network_)
            self.learning_curve_.append(record)
            if self.token_budget is not None and run.tokens_seen >= self.token_budget:
                break
            if self.step_budget is not None and run.step >= self.step_budget:
                break
            # Early stopping would end runs after unequal compute, so a budget disables it.
            budgeted = self.token_budget is not None or self.step_budget is not None
            if not budgeted and 0 < int(self.patience) <= run.stale_epochs:
                break
        bar.close()
        if run.best_state is not None:
            self.network_.load_state_dict(run.best_state)
        # Wall-clock figures stay out of learning_curve_, which must be deterministic.
        self.steps_ = run.step
        self.fit_seconds_ = time.perf_counter() - started
        self.tokens_per_second_ = run.tokens_seen / max(self.fit_seconds_, 1e-9)
        self.tokens_seen_ = run.tokens_seen

    def _train_epoch(
        self,
        torch: ModuleType,
        run: TrainingRun,
        stream: Stream,
        windows: Windows,
        order: np.ndarray,
        bar: Any,
    ) -> tuple[float, int]:
        """One pass over the windows in ``order``; returns (summed nats, positions trained)."""
        self.network_.train()
        epoch_nats, epoch_positions = 0.0, 0
        budget = self.token_budget
        for first in range(0, len(order), int(self.batch_size)):
            if self.step_budget is not None and run.step >= self.step_budget:
                break
            chosen = order[first : first + int(self.batch_size)]
            inputs, targets, _, owned = batches(stream, windows, chosen)
            if budget is not None and run.tokens_seen + int(owned.sum()) > budget:
                # Keep exactly the positions the budget has left, in row-major order.
                owned &= np.cumsum(owned).reshape(owned.shape) <= budget - run.tokens_seen
            run.step += 1
            for group in run.optimizer.param_groups:
                group["lr"] = learning_rate(
                    run.step,
                    total_steps=run.total_steps,
                    peak=float(self.lr),
                    warmup_steps=run.warmup_steps,
                    min_ratio=float(self.min_lr_ratio),
                )
            epoch_nats += self._train_step(torch, run.optimizer, inputs, targets, owned)
            n_owned = int(owned.sum())
            epoch_positions += n_owned
            run.tokens_seen += n_owned
            bar.update(n_owned)
            if budget is not None and run.tokens_seen >= budget:
                break
        return epoch_nats, epoch_positions

    def _train_step(
        self,
        torch: ModuleType,
        optimizer: Any,
        inputs: np.ndarray,
        targets: np.ndarray,
        owned: np.ndarray,
    ) -> float:
        """One AdamW step on the owned positions; returns their summed loss in nats."""
        n_owned = int(owned.sum())
        if n_owned == 0:
            return 0.0
        device = self.device_
        masked_targets = torch.from_numpy(np.where(owned, targets, -100)).to(
            device
        )  # -100: ignored
        device_type = device.partition(":")[0]
        with torch.autocast(device_type, dtype=torch.bfloat16, enabled=bool(self.bf16)):
            logits = self.network_(torch.from_numpy(inputs).to(device))  # (batch, time, vocab + 1)
        total = torch.nn.functional.cross_entropy(
            logits.float().flatten(0, 1),
            masked_targets.flatten(),
            ignore_index=-100,
            reduction="sum",
        )
        optimizer.zero_grad(set_to_none=True)
        (total / n_owned).backward()
        torch.nn.utils.clip_grad_norm_(self.network_.parameters(), float(self.grad_clip))
        optimizer.step()
        return float(total.detach())

    def _bits_per_token(self, units: SequenceSet) -> float:
        total_nats = -float(self.logprobs(units).values.sum())
        return total_nats / math.log(2) / max(len(units.tokens), 1)

    # --------------------------------------------------------------------- scoring
    def _forward_windows(
        self, stream: Stream, windows: Windows
    ) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """Yield (flat positions (n_owned,), float64 log-softmax (n_owned, vocab_size + 1)) per batch.

        Always float32 without autocast: bf16 only ever affects training.
        """
        torch = import_torch(self.name)
        network = self.network_
        network.eval()
        order = np.argsort(-windows.length, kind="stable")  # similar lengths share a batch
        longest = int(windows.length.max()) if len(windows) else 1
        batch_size = max(
            1, min(int(self.batch_size), _LOGIT_BUDGET // (longest * (self.vocab_size_ + 1)))
        )
        with torch.no_grad():
            for first in range(0, len(order), batch_size):
                inputs, _, flat, owned = batches(stream, windows, order[first : first + batch_size])
                logits = network(torch.from_numpy(inputs).to(self.device_))  # (batch, time, V + 1)
                mask = torch.from_numpy(owned).to(self.device_)
                # float64 on the CPU (mps has no float64); on the CPU .cpu() is a no-op
                owned_logits = logits[mask].cpu().double()  # (n_owned, vocab_size + 1)
                yield flat[owned], owned_logits.log_softmax(-1).numpy()

    def logprobs(self, units: SequenceSet) -> Ragged:
        self._check_fitted()
        self._check_units(units)
        torch = import_torch(self.name)
        stream = make_stream(units, self.vocab_size_)
        windows = make_windows(
            np.diff(stream.offsets), context=int(self.context), stride=self._stride
        )
        values = np.zeros(stream.n_positions, dtype=np.float64)
        with torch_session(torch, threads=int(self.threads), seed=0):
            for positions, log_softmax in self._forward_windows(stream, windows):
                values[positions] = log_softmax[
                    np.arange(len(positions)), stream.targets[positions]
                ]
        return Ragged(values, stream.offsets)

    def next_token_probs(self, contexts: Sequence[np.ndarray]) -> np.ndarray:
        self._check_fitted()
        units = SequenceSet.from_list(list(contexts), vocab_size=self.vocab_size_)
        self._check_units(units)
        torch = import_torch(self.name)
        stream = make_stream(units, self.vocab_size_)
        windows = prediction_windows(units.lengths, context=int(self.context), stride=self._stride)
        probs = np.zeros((len(units), self.vocab_size_ + 1), dtype=np.float64)
        unit_of_position = np.repeat(np.arange(len(units)), np.diff(stream.offsets))
        with torch_session(torch, threads=int(self.threads), seed=0):
            for positions, log_softmax in self._forward_windows(stream, windows):
                probs[unit_of_position[positions]] = np.exp(log_softmax)
        return probs / probs.sum(axis=1, keepdims=True)

    def n_parameters(self) -> int | None:
        self._check_fitted()
        return int(sum(p.numel() for p in self.network_.parameters()))

    # ------------------------------------------------------------------ persistence
    def _save_state(self, folder: Path) -> None:
        state = self.network_.state_dict()
        if getattr(self, "device_", "cpu") != "cpu":  # saved weights always load on a CPU
            state = {key: value.cpu() for key, value in state.items()}
        import_torch(self.name).save(state, folder / "weights.pt")

    def _load_state(self, folder: Path) -> None:
        torch = import_torch(self.name)
        with torch_session(torch, threads=int(self.threads), seed=0):  # leaves the global RNG alone
            self.network_ = self._build_network(torch, self.vocab_size_)
        state = torch.load(folder / "weights.pt", map_location="cpu", weights_only=True)
        self.network_.load_state_dict(state)
        # A model fitted on an accelerator loads on this machine's choice for its device.
        self.device_ = resolve_device(torch, f"family {self.name!r}", self.device)
        self.network_.to(self.device_)
