"""Events of a set of units: one prediction per token plus one for the end marker.

Shared by the families that predict from a fixed number of earlier symbols (``ngram``,
``mlp``). With ``V = units.vocab_size``, context symbols are token ids plus the begin
marker ``V`` (padding before a unit starts, never predicted) and outcomes are token ids
plus the end marker ``V`` (predicted after the last token, never context).
"""

from __future__ import annotations

import numpy as np

from ..data import SequenceSet
from ._ngram_counts import SymbolsAtLag

__all__ = ["unit_event_blocks", "unit_events"]

#: events per block when building the per-event arrays
_BLOCK = 1 << 20
#: events before a block whose outcomes are built with it: the lags up to this are slices
_HALO = 16


def unit_events(units: SequenceSet) -> tuple[SymbolsAtLag, np.ndarray, np.ndarray]:
    """Events of ``units``: ``(symbol_at_lag, outcomes, event_offsets)``.

    Unit ``i`` owns events ``event_offsets[i]:event_offsets[i+1]`` (its tokens, then the end
    marker). ``symbol_at_lag(j)`` gives each event's symbol ``j`` back, the begin marker
    (= ``vocab_size``) before the unit starts; ``symbol_at_lag(j, start, stop)`` the same
    for events ``start:stop`` only; ``symbol_at_lag(0)`` is the outcomes.
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


def unit_event_blocks(units: SequenceSet) -> tuple[SymbolsAtLag, int]:
    """``(symbol_at_lag, n_events)`` of ``units``, computed from the tokens one block at a time.

    The same events and symbols as :func:`unit_events` (``symbol_at_lag(0, start, stop)``
    is the outcomes), but nothing of size ``n_events`` is kept: a call builds the outcomes
    of events ``start:stop`` and of the few events before them (a slice of the tokens with
    end markers put in), and a lag is then a shifted slice of those. For passes over the
    events in blocks, as when counting: the last block is kept for the next lag.
    """
    begin = end = int(units.vocab_size if units.vocab_size is not None else 0)
    tokens = np.asarray(units.tokens)
    event_offsets = units.offsets + np.arange(len(units) + 1, dtype=np.int64)
    n_events = int(event_offsets[-1])
    # (start, stop, halo) -> outcomes of events start - halo:stop (halo clipped at event 0)
    # and (stop - start,) the position of events start:stop inside their units
    last_block: dict[tuple[int, int, int], tuple[np.ndarray, np.ndarray]] = {}

    def block(start: int, stop: int, halo: int) -> tuple[np.ndarray, np.ndarray]:
        if (start, stop, halo) not in last_block:
            last_block.clear()
            first_event = max(start - halo, 0)
            # Units first..last-1 have events in first_event:stop.
            first = int(np.searchsorted(event_offsets, first_event, side="right")) - 1
            last = int(np.searchsorted(event_offsets, stop, side="left"))
            starts = event_offsets[first:last] - first_event  # (units,) may be < 0 for first
            outcomes = np.empty(stop - first_event, dtype=np.int32)
            is_token = np.ones(len(outcomes), dtype=bool)
            ends = event_offsets[first + 1 : last + 1] - 1 - first_event
            ends = ends[ends < len(outcomes)]  # end markers inside the block
            is_token[ends] = False
            first_token = first_event - first  # events before first_event hold `first` ends
            outcomes[is_token] = tokens[first_token : first_token + len(outcomes) - len(ends)]
            outcomes[~is_token] = end
            # (stop - start,) position of events start:stop: event - its unit's first event
            inside = np.minimum(starts[1:], stop - first_event)
            counts = np.diff(np.concatenate([[0], inside, [stop - first_event]]))
            position = np.arange(stop - first_event) - np.repeat(starts, counts)
            last_block[start, stop, halo] = (outcomes, position[start - first_event :])
        return last_block[start, stop, halo]

    def symbol_at_lag(lag: int, start: int = 0, stop: int | None = None) -> np.ndarray:
        stop = n_events if stop is None else stop
        outcomes, position = block(start, stop, max(lag, _HALO))
        # Outcomes of events start - lag:stop - lag; before event 0, begin markers.
        offset = len(outcomes) - (stop - start) - lag
        symbols = np.empty(stop - start, dtype=np.int32)
        missing = min(max(-offset, 0), len(symbols))
        symbols[:missing] = begin
        symbols[missing:] = outcomes[offset + missing : offset + len(symbols)]
        if lag:
            np.copyto(symbols, begin, where=position < lag)
        return symbols

    return symbol_at_lag, n_events
