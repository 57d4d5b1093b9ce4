"""Events of a set of units: one prediction per token plus one for the end marker.

Shared by the families that predict from a fixed number of earlier symbols (``ngram``,
``mlp``). With ``V = units.vocab_size``, context symbols are token ids plus the begin
marker ``V`` (padding before a unit starts, never predicted) and outcomes are token ids
plus the end marker ``V`` (predicted after the last token, never context).
"""

from __future__ import annotations

import numpy as np

from ..sequences import SequenceSet
from ._ngram_counts import SymbolsAtLag

__all__ = ["unit_events"]

#: events per block when building the per-event arrays
_BLOCK = 1 << 20


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
    # (n_events,) position of each event inside its unit, capped: only "is it at least
    # lag?" is asked, lag <= 127. (n_events,) outcomes: the tokens in order, an end marker
    # after each unit's last token. Both filled for whole units about a million events at
    # a time, so no other (n_events,) array is ever made.
    position = np.empty(n_events, dtype=np.int8)
    outcomes = np.empty(n_events, dtype=np.int32)
    cuts = np.searchsorted(event_offsets, np.arange(_BLOCK, n_events, _BLOCK))
    bounds = [0, *np.unique(cuts[(cuts > 0) & (cuts < n_units)]).tolist(), n_units]
    for first, last in zip(bounds[:-1], bounds[1:], strict=True):
        start, stop = int(event_offsets[first]), int(event_offsets[last])
        # (block,) offset of each event's unit start inside the block
        unit_start = np.repeat(event_offsets[first:last] - start, lengths[first:last] + 1)
        np.subtract(np.arange(stop - start), unit_start, out=unit_start)
        np.minimum(unit_start, 127, out=unit_start)
        position[start:stop] = unit_start
        block = outcomes[start:stop]
        block[...] = end
        is_token = np.ones(stop - start, dtype=bool)
        is_token[event_offsets[first + 1 : last + 1] - 1 - start] = False
        block[is_token] = units.tokens[units.offsets[first] : units.offsets[last]]

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
