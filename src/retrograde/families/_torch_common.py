"""Shared machinery of the PyTorch families: stream layout, windows, threads, schedule.

Everything here is importable without PyTorch; functions that need it receive the
``torch`` module from :func:`import_torch`, which raises a one-line
:class:`~retrograde.errors.MissingDependencyError` when it is absent.

Stream layout
-------------
A unit with tokens ``t_0 .. t_{L-1}`` becomes ``L + 1`` *positions*. The input at position
``p`` is the BEGIN id (``vocab_size + 1``, an input-only id) for ``p = 0`` and ``t_{p-1}``
otherwise; the target at ``p`` is ``t_p``, or the end marker (outcome ``vocab_size``) at
``p = L``. The networks output ``vocab_size + 1`` logits per position.

Windows
-------
A network sees at most ``context`` positions at once.

* **Training** cuts each unit into consecutive, non-overlapping windows of ``context``
  positions (``stride = context``); a window that starts mid-unit starts with no state.
* **Scoring** slides: position ``p`` is predicted by the window that starts at
  ``s(p) = 0`` if ``p < context`` else ``stride * ceil((p - context + 1) / stride)`` and
  sees inputs ``s(p) .. p`` only. ``s(p)`` depends on ``p`` alone — never on the unit's
  length or later tokens — so the product of the per-position probabilities is a proper
  distribution over units, and every prediction after the first window sees at least
  ``context - stride`` earlier positions of its own unit.
"""

from __future__ import annotations

import contextlib
import copy
import math
import re
from collections.abc import Iterator
from dataclasses import dataclass
from types import ModuleType
from typing import Any

import numpy as np

from ..data import SequenceSet
from ..errors import ConfigError, MissingDependencyError
from ..validation import invalid

__all__ = [
    "Stream",
    "TRAINING_DEFAULTS",
    "TrainingRun",
    "Windows",
    "batches",
    "import_torch",
    "learning_rate",
    "require_torch",
    "make_stream",
    "make_windows",
    "prediction_windows",
    "resolve_device",
    "torch_session",
]

#: what to run, in a checkout or an installed package alike: the ``torch`` extra adds
#: nothing but this wheel (``pip install 'retrograde[torch]'`` would look retrograde itself
#: up on the package index instead of using the checkout)
TORCH_HINT = (
    "pip install torch==2.13.0 (the CPU build; in a retrograde checkout `make test` also "
    "puts it in .venv)"
)

#: training parameters shared by every torch family, with their defaults
TRAINING_DEFAULTS: dict[str, Any] = {
    "context": 128,  # positions a network sees at once
    "stride": None,  # scoring stride in positions; None means context // 2
    "batch_size": 32,  # windows per optimizer step
    "epochs": 20,  # most passes over the training windows (ignored with token_budget)
    "lr": 3e-3,  # peak learning rate
    "weight_decay": 0.01,
    "warmup": 0.05,  # fraction of the planned steps spent warming up
    "min_lr_ratio": 0.1,  # cosine decay ends at min_lr_ratio * lr
    "grad_clip": 1.0,  # largest global gradient norm
    "patience": 3,  # epochs without validation gain before stopping; 0 never stops
    "token_budget": None,  # train on exactly this many target positions
    "step_budget": None,  # train exactly this many optimizer steps (context sweeps)
    "threads": 1,
    "bf16": False,
    "progress": True,  # tqdm bar on a terminal, with tokens/s
    "device": "cpu",  # cpu, auto (an accelerator when present), cuda, cuda:N or mps
}

#: what the ``device`` parameter accepts
DEVICE_CHOICES = "cpu, auto, cuda, cuda:N or mps"
_DEVICE = re.compile(r"^(cpu|auto|mps|cuda(:\d+)?)$")


def resolve_device(torch: ModuleType, owner: str, device: Any) -> str:
    """The torch device a fit runs on: ``cpu``, ``cuda:N`` or ``mps``.

    ``auto`` is the first CUDA device when one is present, else Apple's ``mps`` when
    present, else the CPU. A named accelerator that this machine lacks is refused in one
    line (a silent fallback would make a config mean different computations on different
    machines).
    """
    if not isinstance(device, str) or not _DEVICE.match(device):
        raise invalid(owner, "device", device, DEVICE_CHOICES)
    mps = getattr(torch.backends, "mps", None)
    has_mps = bool(mps is not None and mps.is_available())
    if device == "auto":
        if torch.cuda.is_available():
            return "cuda:0"
        return "mps" if has_mps else "cpu"
    if device.startswith("cuda"):
        index = int(device.partition(":")[2] or 0)
        count = torch.cuda.device_count() if torch.cuda.is_available() else 0
        if index >= count:
            raise ConfigError(
                f"{owner}: parameter device={device!r} is invalid on this machine "
                f"({count} CUDA device{'s' if count != 1 else ''}); allowed: cpu or auto"
            )
        return f"cuda:{index}"
    if device == "mps" and not has_mps:
        raise ConfigError(
            f"{owner}: parameter device='mps' is invalid on this machine (no mps backend); "
            "allowed: cpu or auto"
        )
    return device


def require_torch(family: str) -> None:
    """Refuse (as :func:`import_torch` does) when torch is not installed, without importing
    it: composing a config builds every model, and importing torch costs seconds that
    ``run --dry``, ``plan`` and ``check`` need not pay."""
    import importlib.util

    try:
        found = importlib.util.find_spec("torch") is not None
    except (ImportError, ValueError):  # a broken or blocked installation
        found = False
    if not found:
        import_torch(family)


def import_torch(family: str) -> ModuleType:
    """The ``torch`` module, or a one-line MissingDependencyError naming ``family``."""
    try:
        import torch
    except ImportError as exc:
        raise MissingDependencyError(
            f"family {family!r} needs PyTorch, which is not installed; install the CPU build "
            f"with: {TORCH_HINT}"
        ) from exc
    return torch


def bf16_supported(torch: ModuleType) -> bool:
    """Whether this CPU runs bfloat16 matrix products natively (AVX512-BF16 or AMX)."""
    try:
        return bool(torch.ops.mkldnn._is_mkldnn_bf16_supported())
    except (AttributeError, RuntimeError):
        return False


@contextlib.contextmanager
def torch_session(torch: ModuleType, *, threads: int, seed: int) -> Iterator[None]:
    """Fixed thread count, deterministic kernels and a private RNG seeded with ``seed``.

    Global torch state (thread count, determinism flag, RNG) is restored on exit, so a fit
    never changes what other code in the process sees.
    """
    previous_threads = torch.get_num_threads()
    previous_deterministic = torch.are_deterministic_algorithms_enabled()
    torch.set_num_threads(threads)
    torch.use_deterministic_algorithms(True)
    try:
        with torch.random.fork_rng(devices=[]):
            torch.manual_seed(seed)
            yield
    finally:
        torch.set_num_threads(previous_threads)
        torch.use_deterministic_algorithms(previous_deterministic)


@dataclass(frozen=True)
class Stream:
    """Flat per-position arrays of a SequenceSet, all (n_positions,) int64.

    ``offsets`` is (n_units + 1,): unit i owns positions ``offsets[i]:offsets[i+1]``.
    """

    inputs: np.ndarray
    targets: np.ndarray
    offsets: np.ndarray

    @property
    def n_positions(self) -> int:
        return int(self.offsets[-1])


def make_stream(units: SequenceSet, vocab_size: int) -> Stream:
    """Inputs ``[BEGIN] + tokens`` and targets ``tokens + [END]`` of every unit.

    Examples
    --------
    >>> s = make_stream(SequenceSet.from_list([[2, 0], []], vocab_size=3), vocab_size=3)
    >>> s.inputs.tolist(), s.targets.tolist(), s.offsets.tolist()
    ([4, 2, 0, 4], [2, 0, 3, 3], [0, 3, 4])
    """
    lengths = units.lengths + 1
    offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
    n_positions = int(offsets[-1])
    tokens = np.asarray(units.tokens, dtype=np.int64)
    inputs = np.empty(n_positions, dtype=np.int64)
    targets = np.empty(n_positions, dtype=np.int64)
    is_first = np.zeros(n_positions, dtype=bool)
    is_first[offsets[:-1]] = True
    is_last = np.zeros(n_positions, dtype=bool)
    is_last[offsets[1:] - 1] = True
    inputs[is_first] = vocab_size + 1
    inputs[~is_first] = tokens
    targets[is_last] = vocab_size
    targets[~is_last] = tokens
    return Stream(inputs, targets, offsets)


@dataclass(frozen=True)
class Windows:
    """Windows over a stream, all (n_windows,) int64.

    Window w reads positions ``start[w] .. start[w] + length[w] - 1`` of unit ``unit[w]``
    (relative to the unit) and owns — scores or trains on — its positions from
    ``owned_from[w]`` (relative to the window) on.
    """

    unit: np.ndarray
    start: np.ndarray
    length: np.ndarray
    owned_from: np.ndarray

    def __len__(self) -> int:
        return len(self.unit)

    def take(self, index: np.ndarray) -> Windows:
        return Windows(
            self.unit[index], self.start[index], self.length[index], self.owned_from[index]
        )


def make_windows(n_positions: np.ndarray, *, context: int, stride: int) -> Windows:
    """Windows covering every position once (see the module docstring for the scheme).

    ``stride == context`` gives the non-overlapping training windows.

    Examples
    --------
    >>> w = make_windows(np.array([7, 2]), context=4, stride=2)
    >>> w.unit.tolist(), w.start.tolist(), w.length.tolist(), w.owned_from.tolist()
    ([0, 0, 0, 1], [0, 2, 4, 0], [4, 4, 3, 2], [0, 2, 2, 0])
    """
    n = np.asarray(n_positions, dtype=np.int64)
    beyond_first = np.maximum(n - context, 0)
    counts = 1 + (beyond_first + stride - 1) // stride  # (n_units,) windows per unit
    unit = np.repeat(np.arange(len(n), dtype=np.int64), counts)
    first_of_unit = np.repeat(np.cumsum(counts) - counts, counts)
    k = np.arange(len(unit), dtype=np.int64) - first_of_unit  # window index inside its unit
    start = k * stride
    end = np.minimum(context + k * stride, n[unit])
    owned_from = np.where(k == 0, 0, context - stride).astype(np.int64)
    return Windows(unit, start, end - start, owned_from)


def prediction_windows(context_lengths: np.ndarray, *, context: int, stride: int) -> Windows:
    """One window per prefix: the window that predicts position ``p = len(prefix)``.

    It starts at ``s(p)`` (module docstring) and owns only its last position, so
    ``next_token_probs`` sees exactly what ``logprobs`` sees at the same position.
    """
    p = np.asarray(context_lengths, dtype=np.int64)
    k = np.where(p < context, 0, (p - context + stride) // stride)
    start = k * stride
    length = p + 1 - start
    return Windows(np.arange(len(p), dtype=np.int64), start, length, length - 1)


def batches(
    stream: Stream, windows: Windows, index: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Padded arrays for the windows ``index``.

    Returns ``inputs`` and ``targets`` (batch, time) int64, ``flat`` (batch, time) int64
    stream positions, and ``owned`` (batch, time) bool: real, owned positions. Padding
    sits on the right, so a causal network's outputs at real positions ignore it.
    """
    chosen = windows.take(index)
    columns = np.arange(int(chosen.length.max()), dtype=np.int64)[None, :]  # (1, time)
    real = columns < chosen.length[:, None]
    flat = stream.offsets[chosen.unit][:, None] + chosen.start[:, None] + columns
    flat = np.where(real, flat, 0)
    owned = real & (columns >= chosen.owned_from[:, None])
    return stream.inputs[flat], stream.targets[flat], flat, owned


def learning_rate(
    step: int, *, total_steps: int, peak: float, warmup_steps: int, min_ratio: float
) -> float:
    """Linear warm-up to ``peak`` over ``warmup_steps``, then cosine decay to ``min_ratio * peak``.

    ``step`` counts from 1. Steps past ``total_steps`` stay at the floor.

    Examples
    --------
    >>> [round(learning_rate(s, total_steps=10, peak=1.0, warmup_steps=2, min_ratio=0.0), 3)
    ...  for s in (1, 2, 6, 10)]
    [0.5, 1.0, 0.5, 0.0]
    """
    if step <= warmup_steps:
        return peak * step / max(warmup_steps, 1)
    progress = min(1.0, (step - warmup_steps) / max(total_steps - warmup_steps, 1))
    return peak * (min_ratio + (1.0 - min_ratio) * 0.5 * (1.0 + math.cos(math.pi * progress)))


def check_bf16(torch: ModuleType, owner: str, bf16: Any) -> None:
    """bf16 autocast is refused (one line) on CPUs without native bfloat16 support."""
    if bf16 and not bf16_supported(torch):
        raise ConfigError(
            f"{owner}: parameter bf16=True is invalid on this CPU (no native bfloat16 "
            "support: needs AVX512-BF16 or AMX); allowed: False"
        )


@dataclass
class TrainingRun:
    """Mutable state of one fit: optimizer, schedule, counters, best validation weights."""

    optimizer: Any
    total_steps: int
    warmup_steps: int
    step: int = 0
    tokens_seen: int = 0  # target positions trained on so far
    best_valid: float = math.inf
    best_state: dict[str, Any] | None = None
    stale_epochs: int = 0

    def remember_if_best(self, valid_bits: float, network: Any) -> None:
        if valid_bits < self.best_valid:
            self.best_valid, self.stale_epochs = valid_bits, 0
            self.best_state = copy.deepcopy(network.state_dict())
        else:
            self.stale_epochs += 1
