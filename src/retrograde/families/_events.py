"""Events of a set of units: one prediction per token plus one for the end marker.

Shared by the families that predict from a fixed number of earlier symbols (``ngram``,
``mlp``). With ``V = units.vocab_size``, context symbols are token ids plus the begin
marker ``V`` (padding before a unit starts, never predicted) and outcomes are token ids
plus the end marker ``V`` (predicted after the last token, never context).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from ..data import SequenceSet, index_dtype
from ._ngram_counts import gather

__all__ = ["unit_events"]


def unit_events(units: SequenceSet) -> tuple[Callable[[int], np.ndarray], np.ndarray, np.ndarray]:
    """Events of ``units``: ``(symbol_at_lag, outcomes, event_offsets)``.

    Unit ``i`` owns events ``event_offsets[i]:event_offsets[i+1]`` (its tokens, then the end
    marker). ``symbol_at_lag(j)`` gives each event's symbol ``j`` back, the begin marker
    (= ``vocab_size``) before the unit starts.
    """
    begin = end = int(units.vocab_size if units.vocab_size is not None else 0)
    lengths = units.lengths
    n_units = len(units)
    event_offsets = units.offsets + np.arange(n_units + 1, dtype=np.int64)
    n_events = int(event_offsets[-1])
    # int32 halves the memory of these (n_events,) arrays at 25 M tokens.
    dtype = index_dtype(n_events)
    unit_of_event: np.ndarray = np.repeat(np.arange(n_units, dtype=dtype), lengths + 1)
    # Flat token index of each event's own position (== next unit's start for end markers).
    token_index = np.arange(n_events, dtype=dtype) - unit_of_event
    # Position inside the unit, capped: only "is it at least lag?" is asked, lag <= 127.
    # Computed in place in that dtype: int64 temporaries here were the fit's memory peak.
    starts = gather(units.offsets[:-1].astype(dtype), unit_of_event)
    del unit_of_event
    np.subtract(token_index, starts, out=starts)
    np.minimum(starts, 127, out=starts)
    position = starts.astype(np.int8)
    del starts
    # One dummy token when there are none keeps the clipped look-ups below in range.
    tokens = np.asarray(units.tokens) if len(units.tokens) else np.zeros(1, dtype=np.int32)
    outcomes = np.full(n_events, end, dtype=np.int32)
    is_token = np.ones(n_events, dtype=bool)
    is_token[event_offsets[1:] - 1] = False
    outcomes[is_token] = gather(tokens, token_index[is_token])
    del is_token

    def symbol_at_lag(lag: int) -> np.ndarray:
        # Clipped at the first token; positions before the unit start get the begin marker.
        symbols = gather(tokens, np.maximum(token_index, lag), offset=-lag)
        symbols = symbols.astype(np.int32, copy=False)
        symbols[position < lag] = begin
        return symbols

    return symbol_at_lag, outcomes, event_offsets
