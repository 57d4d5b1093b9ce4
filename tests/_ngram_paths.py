"""The ways through the n-gram counting code (``families/_ngram_counts.py``), each forced by
patching that module's limits: tests run a fit down every one and compare the results."""

from __future__ import annotations

from typing import Any

#: the three ways a jump can be ranked: a dense table, a packed sort, the argsort fallback
JUMP_PATHS: dict[str, dict[str, Any]] = {
    "dense jumps": {"_WINDOW_LIMIT": 40},
    "packed jumps": {"_WINDOW_LIMIT": 40, "_DENSE_KEYS": 0, "_BITSET_KEYS_PER_EVENT": 0},
    "argsort jumps": {
        "_WINDOW_LIMIT": 40,
        "_DENSE_KEYS": 0,
        "_BITSET_KEYS_PER_EVENT": 0,
        "packed_fits": lambda space, n: False,
    },
}
