"""What the end of a unit costs a model that cannot tell where the unit ends."""

from __future__ import annotations

import math

from ..validation import check_int

__all__ = ["end_marker_cost"]


def end_marker_cost(length: int, known_positions: int = 0) -> tuple[float, float]:
    """Bits per token a model that cannot tell the position pays for the end of a unit.

    Units all have ``length`` tokens, so the true end-marker probability is 1 after the last
    token and 0 before. A model that can tell where it is at only ``known_positions`` of the
    ``length + 1`` events of a unit (an ``N``-gram sees the begin marker at the first
    ``N - 1``; a model with no context at none) sees the other ``m = length + 1 -
    known_positions`` events alike, ``m - 1`` tokens then the end marker, so its best single
    end probability there is ``q = 1/m`` (the maximum-likelihood rate of a geometric
    length). A unit then costs ``log2 m`` bits for the end marker and ``(m - 1) log2(m / (m -
    1))`` bits spread over its tokens (each token's probability is scaled by ``1 - q``).
    Derived here; with ``known_positions = 0`` the sum is ``log2(L+1)/L + log2((L+1)/L)``
    per token.

    Returns
    -------
    (end_bits_per_token, content_bits_per_token)
        Both divided by ``length``; their sum is the whole cost above the exact floor.

    Examples
    --------
    >>> end, content = end_marker_cost(64)
    >>> round(end, 4), round(content, 4), round(end + content, 3)
    (0.0941, 0.0224, 0.116)
    """
    length = check_int("stats 'end_marker_cost'", "length", length, 1)
    known_positions = check_int(
        "stats 'end_marker_cost'", "known_positions", known_positions, 0, length
    )
    m = length + 1 - known_positions
    end_bits = math.log2(m)
    content_bits = (m - 1) * math.log2(m / (m - 1)) if m > 1 else 0.0
    return end_bits / length, content_bits / length
