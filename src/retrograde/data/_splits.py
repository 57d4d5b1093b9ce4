"""The train / valid / test split: one rule for the fractions, one salted content hash.

Every default here is the only one in the package: the config schema, the ``check``
command and the stages take them from this module.
"""

from __future__ import annotations

import hashlib
from collections.abc import Sequence
from typing import Any

import numpy as np

from ..validation import check_float, invalid

__all__ = ["DEFAULT_FRACTIONS", "DEFAULT_SALT", "SPLITS", "assign_splits", "check_fractions"]

SPLITS = ("train", "valid", "test")
DEFAULT_FRACTIONS = (0.8, 0.1, 0.1)
DEFAULT_SALT = "retrograde"
_OWNER = "split"


def check_fractions(fractions: Any, owner: str = _OWNER) -> tuple[float, float, float]:
    """The one rule for split fractions; returns ``(train, valid, test)``.

    Three numbers ``>= 0`` that sum to 1, with train and test ``> 0`` (valid may be 0: no
    early stopping), or two ``(train, valid)`` whose sum is below 1 (test gets the rest).

    >>> check_fractions([0.8, 0.1])
    (0.8, 0.1, 0.1)
    >>> check_fractions([0.9, 0.0, 0.1])
    (0.9, 0.0, 0.1)
    """
    # Any sequence (a list, a tuple, an OmegaConf ListConfig, an array), but not a string.
    is_sequence = isinstance(fractions, (Sequence, np.ndarray)) and not isinstance(fractions, str)
    values = list(fractions) if is_sequence else [fractions]
    allowed = (
        "three numbers >= 0 (train, valid, test) summing to 1 with train and test > 0, "
        "or two (train, valid) summing to less than 1"
    )
    if len(values) not in (2, 3):
        raise invalid(owner, "fractions", fractions, allowed)
    parts = [check_float(owner, "fractions", v, 0.0, 1.0, high_open=True) for v in values]
    if len(parts) == 2:
        parts.append(round(1.0 - sum(parts), 12))
    if abs(sum(parts) - 1.0) > 1e-9 or parts[0] <= 0 or parts[2] <= 0:
        raise invalid(owner, "fractions", fractions, allowed)
    return parts[0], parts[1], parts[2]


def _salt_key(salt: str) -> bytes:
    return hashlib.blake2b(str(salt).encode("utf-8"), digest_size=32).digest()


def assign_splits(
    keys: Sequence[bytes],
    fractions: Sequence[float] = DEFAULT_FRACTIONS,
    salt: str = DEFAULT_SALT,
) -> np.ndarray:
    """(len(keys),) int8 split of each unit: 0 train, 1 valid, 2 test.

    A unit's split depends only on its content ``key``, the ``salt`` and the fractions:
    ``u = blake2b(key, key=blake2b(salt))`` read as a 53-bit fraction in [0, 1), then
    train if ``u < f_train``, valid if ``u < f_train + f_valid``, else test.

    >>> assign_splits([b"same", b"same"], salt="s").tolist() == [assign_splits([b"same"], salt="s")[0]] * 2
    True
    """
    train, valid, _ = check_fractions(fractions)
    base = hashlib.blake2b(digest_size=8, key=_salt_key(salt))

    def fraction_bits(key: bytes) -> int:
        hasher = base.copy()
        hasher.update(key)
        return int.from_bytes(hasher.digest(), "little") >> 11  # top 53 bits

    bits = np.fromiter((fraction_bits(k) for k in keys), dtype=np.uint64, count=len(keys))
    uniform = bits.astype(np.float64) * 2.0**-53  # exact: 53-bit integers fit a float64
    return np.where(uniform < train, 0, np.where(uniform < train + valid, 1, 2)).astype(np.int8)
