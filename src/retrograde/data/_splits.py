"""The train / valid / test split: one rule for the fractions, one salted content hash.

Every default here is the only one in the package: the config schema, the ``check``
command and the stages take them from this module.
"""

from __future__ import annotations

import hashlib
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import DataError
from ..validation import check_float, invalid

__all__ = [
    "DEFAULT_FRACTIONS",
    "DEFAULT_SALT",
    "SPLITS",
    "assign_splits",
    "check_fractions",
    "hash_uniform",
    "read_unit_ids",
    "split_with_given",
    "subsample",
]

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
    uniform = hash_uniform(keys, salt)
    return np.where(uniform < train, 0, np.where(uniform < train + valid, 1, 2)).astype(np.int8)


def hash_uniform(keys: Sequence[bytes], salt: str = DEFAULT_SALT) -> np.ndarray:
    """(len(keys),) float64 in [0, 1): ``blake2b(key, key=blake2b(salt))``'s top 53 bits."""
    base = hashlib.blake2b(digest_size=8, key=_salt_key(salt))

    def fraction_bits(key: bytes) -> int:
        hasher = base.copy()
        hasher.update(key)
        return int.from_bytes(hasher.digest(), "little") >> 11  # top 53 bits

    bits = np.fromiter((fraction_bits(k) for k in keys), dtype=np.uint64, count=len(keys))
    return bits.astype(np.float64) * 2.0**-53  # exact: 53-bit integers fit a float64


def split_with_given(
    keys: Sequence[bytes],
    given: np.ndarray,
    fractions: Sequence[float] = DEFAULT_FRACTIONS,
    salt: str = DEFAULT_SALT,
) -> np.ndarray:
    """(len(keys),) int8 splits when the data fixes some: ``given`` is -1 (not fixed), 0, 1 or 2.

    A unit with a given split keeps it. When none is given this is :func:`assign_splits`.
    Otherwise the test split is the one given, and every other unit goes to train or valid
    by the same salted hash, in the ratio of the train and valid fractions
    (``u < f_train / (f_train + f_valid)``: train).

    >>> split_with_given([b"a", b"b"], np.array([2, 2])).tolist()
    [2, 2]
    """
    given = np.asarray(given, dtype=np.int64)
    if not (given >= 0).any():
        return assign_splits(keys, fractions, salt)
    train, valid, _ = check_fractions(fractions)
    hashed = np.where(hash_uniform(keys, salt) < train / (train + valid), 0, 1)
    return np.where(given >= 0, given, hashed).astype(np.int8)


def subsample(n_units: int, max_units: int | None, seed: int = 0) -> np.ndarray | None:
    """Sorted indices of the units a cap keeps, or None when all are kept.

    ``max_units`` of the ``n_units`` units, drawn uniformly without replacement with
    ``numpy.random.default_rng(seed).choice`` and sorted, so the kept units stay in their
    natural order. The same ``(n_units, max_units, seed)`` always keeps the same units.

    >>> subsample(5, 10) is None, subsample(5, 3, seed=1).tolist() == sorted(subsample(5, 3, seed=1))
    (True, True)
    """
    if max_units is None or n_units <= max_units:
        return None
    chosen = np.random.default_rng(seed).choice(n_units, size=max_units, replace=False)
    return np.sort(chosen).astype(np.int64)


def read_unit_ids(path: Path, shown: str | None = None) -> dict[str, str]:
    """The unit ids a file lists, one a line: ``{id: "file:line"}`` (first listing kept).

    Leading and trailing whitespace is dropped; blank lines and lines starting with ``#``
    are skipped. A missing, unreadable or non-UTF-8 file, or one that lists no id, is a
    one-line :class:`~retrograde.errors.DataError` naming it (``shown``: the name to print).
    """
    shown = shown or str(path)
    try:
        text = Path(path).read_bytes().decode("utf-8")
    except FileNotFoundError:
        raise DataError(f"{shown}: file of test unit ids not found; check the path") from None
    except IsADirectoryError:
        raise DataError(f"{shown}: is a folder; give a file of unit ids, one a line") from None
    except OSError as exc:
        raise DataError(
            f"{shown}: cannot read the file of test unit ids ({exc.strerror})"
        ) from None
    except UnicodeDecodeError as exc:
        raise DataError(
            f"{shown}: invalid UTF-8 at byte offset {exc.start}; write the ids as UTF-8 text"
        ) from None
    ids: dict[str, str] = {}
    for number, line in enumerate(text.splitlines(), start=1):
        unit_id = line.strip()
        if unit_id and not unit_id.startswith("#"):
            ids.setdefault(unit_id, f"{shown}:{number}")
    if not ids:
        raise DataError(
            f"{shown}: lists no unit id; write one id a line (blank lines and # skipped)"
        )
    return ids
