"""Recurrent families ``gru`` and ``lstm``: embedding -> recurrent layers -> softmax.

Both need PyTorch (``pip install torch==2.13.0``, the CPU build); without it, constructing one raises a one-line
:class:`~retrograde.errors.MissingDependencyError`. Training and the window scheme are
shared with ``transformer`` (see :mod:`retrograde.families._torch_family`): a network
reads at most ``context`` positions, units longer than that are scored with sliding windows
that condition only on earlier tokens of the same unit.
"""

from __future__ import annotations

from types import ModuleType
from typing import Any, ClassVar

from ..validation import check_float, check_int
from ._torch_family import TorchFamily

__all__ = ["GRU", "LSTM"]


class _Recurrent(TorchFamily):
    """Shared parameters of ``gru`` and ``lstm``.

    Parameters
    ----------
    embedding, hidden : int
        Embedding width and recurrent state width (capacity; sweep ``hidden``).
    layers : int
        Stacked recurrent layers.
    dropout : float
        On embeddings, between layers and on outputs; 0 disables.
    context, stride, batch_size, epochs, lr, weight_decay, warmup, min_lr_ratio, grad_clip,
    patience, token_budget, step_budget, threads, bf16, progress, device
        Training and scoring; documented in ``docs/torch.md``.
    """

    _cell: ClassVar[str] = ""
    embedding: int
    hidden: int
    layers: int
    dropout: float
    example_params: ClassVar[dict[str, Any]] = {
        "embedding": 8,
        "hidden": 16,
        "context": 8,
        "epochs": 2,
        "batch_size": 8,
    }

    def __init__(
        self,
        *,
        embedding: int = 64,
        hidden: int = 128,
        layers: int = 1,
        dropout: float = 0.0,
        context: int = 128,
        stride: int | None = None,
        batch_size: int = 32,
        epochs: int = 20,
        lr: float = 3e-3,
        weight_decay: float = 0.01,
        warmup: float = 0.05,
        min_lr_ratio: float = 0.1,
        grad_clip: float = 1.0,
        patience: int = 3,
        token_budget: int | None = None,
        step_budget: int | None = None,
        threads: int = 1,
        bf16: bool = False,
        progress: bool = True,
        device: str = "cpu",
    ) -> None:
        super().__init__(
            embedding=embedding,
            hidden=hidden,
            layers=layers,
            dropout=dropout,
            context=context,
            stride=stride,
            batch_size=batch_size,
            epochs=epochs,
            lr=lr,
            weight_decay=weight_decay,
            warmup=warmup,
            min_lr_ratio=min_lr_ratio,
            grad_clip=grad_clip,
            patience=patience,
            token_budget=token_budget,
            step_budget=step_budget,
            threads=threads,
            bf16=bf16,
            progress=progress,
            device=device,
        )

    def _validate_network(self, owner: str, params: dict[str, Any]) -> None:
        check_int(owner, "embedding", params["embedding"], 1)
        check_int(owner, "hidden", params["hidden"], 1)
        check_int(owner, "layers", params["layers"], 1)
        check_float(owner, "dropout", params["dropout"], 0.0, 1.0, high_open=True)

    def _build_network(self, torch: ModuleType, vocab_size: int) -> Any:
        from ._torch_nets import RecurrentNet

        return RecurrentNet(
            vocab_size=vocab_size,
            cell=self._cell,
            embedding=int(self.embedding),
            hidden=int(self.hidden),
            layers=int(self.layers),
            dropout=float(self.dropout),
        )


class GRU(_Recurrent):
    """Gated recurrent unit language model (Cho et al., 2014)."""

    name = "gru"
    _cell = "gru"


class LSTM(_Recurrent):
    """Long short-term memory language model (Hochreiter and Schmidhuber, 1997)."""

    name = "lstm"
    _cell = "lstm"
