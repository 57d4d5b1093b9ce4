"""Events of a set of units: one prediction per token plus one for the end marker.

Shared by the families that predict from a fixed number of earlier symbols (``ngram``,
``mlp``). With ``V = units.vocab_size``, context symbols are token ids plus the begin
marker ``V`` (padding before a unit starts, never predicted) and outcomes are token ids
plus the end marker ``V`` (predicted after the last token, never context).
"""

from __future__ import annotations

import numpy as np

from ..sequences import SequenceSet, index_dtype
from ._ngram_counts import SymbolsAtLag

__all__ = ["unit_events"]


def unit_events(units: SequenceSet) -> tuple[SymbolsAtLag, np.ndarray, np.ndarray]:
    """Events of ``units``: ``(symbol_at_lag, outcomes, event_offsets)``.

    Unit ``i`` owns events ``event_offsets[i]:event_offsets[i+1]`` (its tokens, then the end
    marker). ``symbol_at_lag(j)`` gives each event's symbol ``j`` back, the begin marker
    (= ``vocab_size``) before the unit starts; ``symbol_at_lag(j, start, stop)`` the same
    for events ``start:stop`` only.
    """
    begin = end = int(units.vocab_size if units.vocab_size is not None else 0)
    lengths = units.lengths
    n_units = len(units)
    event_offsets = units.offsets + np.arange(n_units + 1, dtype=np.int64)
    n_events = int(event_offsets[-1])
    # int32 halves the memory of these (n_events,) arrays at 25 M tokens.
    dtype = index_dtype(n_events)
    # (n_events,) position of each event inside its unit, capped: only "is it at least
    # lag?" is asked, lag <= 127. Computed in place: int64 temporaries were the fit's peak.
    position_wide = np.arange(n_events, dtype=dtype)
    position_wide -= np.repeat(event_offsets[:-1].astype(dtype), lengths + 1)
    np.minimum(position_wide, 127, out=position_wide)
    position = position_wide.astype(np.int8)
    del position_wide
    # (n_events,) the tokens in order, an end marker after each unit's last token.
    outcomes = np.full(n_events, end, dtype=np.int32)
    is_token = np.ones(n_events, dtype=bool)
    is_token[event_offsets[1:] - 1] = False
    outcomes[is_token] = units.tokens
    del is_token

    def symbol_at_lag(lag: int, start: int = 0, stop: int | None = None) -> np.ndarray:
        # Inside a unit the symbol lag back is the outcome of the event lag earlier (a
        # shifted copy, no gather); before the unit starts it is the begin marker.
        stop = n_events if stop is None else stop
        symbols = np.empty(stop - start, dtype=np.int32)
        # events start .. start + before - 1 have no event lag earlier in the whole set
        before = min(max(lag - start, 0), len(symbols))
        symbols[:before] = begin
        symbols[before:] = outcomes[start + before - lag : stop - lag]
        np.copyto(symbols, begin, where=position[start:stop] < lag)
        return symbols

    return symbol_at_lag, outcomes, event_offsets
