"""The PyTorch networks behind ``gru``, ``lstm`` and ``transformer``.

This module imports torch at the top, so it is imported only after
:func:`retrograde.families._torch_common.import_torch` succeeded. Every network maps
``inputs`` (batch, time) int64 — token ids plus the BEGIN id ``vocab_size + 1`` — to
logits (batch, time, vocab_size + 1) float32, causally: the output at position ``t``
depends on inputs ``0 .. t`` only, so right padding never changes real outputs.
"""

from __future__ import annotations

import math

import torch
from torch import nn
from torch.nn import functional

__all__ = ["RecurrentNet", "TransformerNet"]


class RecurrentNet(nn.Module):
    """Embedding -> ``layers`` GRU or LSTM layers -> linear softmax head."""

    def __init__(
        self,
        *,
        vocab_size: int,
        cell: str,
        embedding: int,
        hidden: int,
        layers: int,
        dropout: float,
    ) -> None:
        super().__init__()
        rnn_class = {"gru": nn.GRU, "lstm": nn.LSTM}[cell]
        self.embed = nn.Embedding(vocab_size + 2, embedding)  # + end marker slot + BEGIN
        # torch applies its own dropout only between stacked layers (and warns for one layer),
        # so dropout on the embeddings and outputs is applied here instead.
        self.rnn = rnn_class(
            embedding,
            hidden,
            num_layers=layers,
            batch_first=True,
            dropout=dropout if layers > 1 else 0.0,
        )
        self.dropout = nn.Dropout(dropout)
        self.head = nn.Linear(hidden, vocab_size + 1)

    def forward(self, inputs: torch.Tensor) -> torch.Tensor:
        embedded = self.dropout(self.embed(inputs))  # (batch, time, embedding)
        states, _ = self.rnn(embedded)  # (batch, time, hidden)
        return self.head(self.dropout(states))  # (batch, time, vocab_size + 1)


class _CausalSelfAttention(nn.Module):
    def __init__(self, width: int, heads: int, dropout: float) -> None:
        super().__init__()
        self.heads = heads
        self.qkv = nn.Linear(width, 3 * width)
        self.proj = nn.Linear(width, width)
        self.dropout = dropout

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        batch, time, width = x.shape
        # (3, batch, heads, time, width / heads)
        qkv = (
            self.qkv(x).view(batch, time, 3, self.heads, width // self.heads).permute(2, 0, 3, 1, 4)
        )
        mixed = functional.scaled_dot_product_attention(
            qkv[0], qkv[1], qkv[2], is_causal=True, dropout_p=self.dropout if self.training else 0.0
        )  # (batch, heads, time, width / heads)
        return self.proj(mixed.transpose(1, 2).reshape(batch, time, width))


class _Block(nn.Module):
    """Pre-norm transformer block: x + attention(norm(x)), then x + mlp(norm(x))."""

    def __init__(self, width: int, heads: int, dropout: float) -> None:
        super().__init__()
        self.norm1 = nn.LayerNorm(width)
        self.attention = _CausalSelfAttention(width, heads, dropout)
        self.norm2 = nn.LayerNorm(width)
        self.mlp = nn.Sequential(
            nn.Linear(width, 4 * width), nn.GELU(), nn.Linear(4 * width, width), nn.Dropout(dropout)
        )
        self.dropout = nn.Dropout(dropout)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = x + self.dropout(self.attention(self.norm1(x)))
        return x + self.mlp(self.norm2(x))


def _gpt2_init(module: nn.Module) -> None:
    """Radford et al. (2019) GPT-2 initialization: weights N(0, 0.02), biases 0."""
    if isinstance(module, (nn.Linear, nn.Embedding)):
        nn.init.normal_(module.weight, mean=0.0, std=0.02)
    if isinstance(module, nn.Linear) and module.bias is not None:
        nn.init.zeros_(module.bias)


def sinusoidal_table(context: int, width: int) -> torch.Tensor:
    """(context, width) fixed encodings: sin on even, cos on odd features.

    Vaswani et al. (2017), "Attention is all you need", section 3.5.
    """
    position = torch.arange(context, dtype=torch.float32)[:, None]
    frequency = torch.exp(
        torch.arange(0, width, 2, dtype=torch.float32) * (-math.log(10000.0) / width)
    )
    table = torch.zeros(context, width)
    table[:, 0::2] = torch.sin(position * frequency)
    table[:, 1::2] = torch.cos(position * frequency[: width // 2])
    return table


class TransformerNet(nn.Module):
    """Decoder-only causal transformer (pre-norm blocks, tied nothing, GELU MLP)."""

    def __init__(
        self,
        *,
        vocab_size: int,
        context: int,
        width: int,
        layers: int,
        heads: int,
        dropout: float,
        positional: str,
    ) -> None:
        super().__init__()
        self.embed = nn.Embedding(vocab_size + 2, width)  # + end marker slot + BEGIN
        self.positional = positional
        if positional == "learned":
            self.position = nn.Parameter(torch.zeros(context, width))
            nn.init.normal_(self.position, std=0.02)
        else:
            self.register_buffer("position", sinusoidal_table(context, width), persistent=False)
        self.dropout = nn.Dropout(dropout)
        self.blocks = nn.ModuleList(_Block(width, heads, dropout) for _ in range(layers))
        self.norm = nn.LayerNorm(width)
        self.head = nn.Linear(width, vocab_size + 1)
        # Token and position signals start at the same small scale (GPT-2's N(0, 0.02));
        # with torch's default N(0, 1) token embeddings the learned positions are drowned
        # out and attention learns to look bits up by position far more slowly (measured on
        # linear_gf2 with nonzeros=0, a permuted copy).
        self.apply(_gpt2_init)

    def forward(self, inputs: torch.Tensor) -> torch.Tensor:
        time = inputs.shape[1]
        x = self.dropout(self.embed(inputs) + self.position[:time])  # (batch, time, width)
        for block in self.blocks:
            x = block(x)
        return self.head(self.norm(x))  # (batch, time, vocab_size + 1)
