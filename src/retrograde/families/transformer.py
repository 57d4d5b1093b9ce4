"""Family ``transformer``: a small decoder-only causal transformer.

Pre-norm blocks (causal self-attention, then a GELU MLP four times as wide), learned or
sinusoidal absolute positions, a linear softmax head over ``vocab_size + 1`` outcomes.
Needs PyTorch (``pip install torch==2.13.0``, the CPU build). A network reads at most ``context`` positions; longer
units are scored with sliding windows that condition only on earlier tokens of the same
unit (:mod:`retrograde.families._torch_common`).
"""

from __future__ import annotations

from types import ModuleType
from typing import Any, ClassVar

from ..validation import check_choice, check_float, check_int, invalid
from ._torch_family import TorchFamily

__all__ = ["Transformer"]


class Transformer(TorchFamily):
    """Decoder-only causal transformer.

    Parameters
    ----------
    width : int
        Model width (capacity; must be a multiple of ``heads``).
    layers, heads : int
        Transformer blocks and attention heads per block.
    dropout : float
        On embeddings, attention weights and residual branches; 0 disables.
    positional : {"learned", "sinusoidal"}
        Absolute position encoding: a learned table or the fixed sinusoids.
    context : int
        Positions one window holds (sweep it for context-length studies).
    stride, batch_size, epochs, lr, weight_decay, warmup, min_lr_ratio, grad_clip,
    patience, token_budget, step_budget, threads, bf16, progress, device
        Training and scoring; documented in ``docs/torch.md``.
    """

    name = "transformer"
    width: int
    layers: int
    heads: int
    dropout: float
    positional: str
    example_params: ClassVar[dict[str, Any]] = {
        "width": 16,
        "layers": 1,
        "heads": 2,
        "context": 8,
        "epochs": 2,
        "batch_size": 8,
    }

    def __init__(
        self,
        *,
        width: int = 64,
        layers: int = 2,
        heads: int = 4,
        dropout: float = 0.0,
        positional: str = "learned",
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
            width=width,
            layers=layers,
            heads=heads,
            dropout=dropout,
            positional=positional,
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
        width = check_int(owner, "width", params["width"], 1)
        check_int(owner, "layers", params["layers"], 1)
        heads = check_int(owner, "heads", params["heads"], 1)
        if width % heads:
            raise invalid(owner, "width", width, f"a multiple of heads={heads}")
        check_float(owner, "dropout", params["dropout"], 0.0, 1.0, high_open=True)
        check_choice(owner, "positional", params["positional"], ["learned", "sinusoidal"])

    def _build_network(self, torch: ModuleType, vocab_size: int) -> Any:
        from ._torch_nets import TransformerNet

        return TransformerNet(
            vocab_size=vocab_size,
            context=int(self.context),
            width=int(self.width),
            layers=int(self.layers),
            heads=int(self.heads),
            dropout=float(self.dropout),
            positional=str(self.positional),
        )
