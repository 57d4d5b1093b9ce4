"""The ``fields`` order: permute the named fields of a record, and reverse inside some.

A unit of a ``records`` source is its fields in natural order with one separator token
between consecutive fields (``a SEP b SEP total``). ``fields(fields=[total, a, b],
reverse=[b])`` writes the fields in the order given, ``b`` reversed inside, with the
separators between them again (``total SEP a SEP b[::-1]``). The field names and the
separator id come from the source: the reorder stage (and ``retrograde check``) call
:meth:`Order.for_source` with the units' ``info.json``, which fills in ``natural`` (the
source's field names in natural order) and ``separator``; both may also be given directly.

The output has the same number of separators as the input and the fields keep their
lengths, so the inverse finds the fields in the output alone. A unit that does not hold
exactly one separator fewer than there are fields (a records source never makes one) is
left as it is, which keeps the order a bijection on every input.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any, ClassVar

import numpy as np

from ..data import SequenceSet, earlier_in_unit
from ..errors import ConfigError
from ..validation import check_int, invalid
from ._base import Order, _inverse_permutation

__all__ = ["Fields"]

_OWNER = "order 'fields'"


def _names(key: str, value: Any, *, allow_empty: bool) -> list[str]:
    allowed = "a list of distinct field names" + ("" if allow_empty else " (at least one)")
    if isinstance(value, (str, bytes)) or not hasattr(value, "__iter__"):
        raise invalid(_OWNER, key, value, allowed)
    names = list(value)  # a list, tuple or OmegaConf ListConfig
    if (
        (not names and not allow_empty)
        or not all(isinstance(n, str) and n for n in names)
        or len(set(names)) != len(names)
    ):
        raise invalid(_OWNER, key, value, allowed)
    return [str(n) for n in names]


class Fields(Order):
    """Permute whole fields of a record and reverse inside chosen fields.

    Parameters
    ----------
    fields : list of str
        Every field of the source, in the order to write them.
    reverse : list of str
        Fields whose tokens are written last to first.
    natural, separator
        The source's field names in natural order and its separator token id; filled in
        from the source by :meth:`for_source` when not given.

    Examples
    --------
    >>> order = Fields(fields=["c", "a", "b"], reverse=["a"], natural=["a", "b", "c"],
    ...                separator=0)
    >>> order.apply(np.array([1, 2, 0, 3, 0, 4, 5])).tolist()  # a=[1,2] b=[3] c=[4,5]
    [4, 5, 0, 2, 1, 0, 3]
    >>> order.invert(np.array([4, 5, 0, 2, 1, 0, 3])).tolist()
    [1, 2, 0, 3, 0, 4, 5]
    """

    name = "fields"
    example_params: ClassVar[dict[str, Any]] = {
        "fields": ["b", "a"],
        "reverse": ["a"],
        "natural": ["a", "b"],
        "separator": 0,
    }

    def __init__(
        self,
        *,
        fields: Sequence[str] | None = None,
        reverse: Sequence[str] = (),
        natural: Sequence[str] | None = None,
        separator: int | None = None,
    ) -> None:
        if fields is None:
            raise invalid(_OWNER, "fields", fields, "a list of the source's field names")
        self.fields = _names("fields", fields, allow_empty=False)
        self.reverse = _names("reverse", reverse, allow_empty=True)
        self.natural = None if natural is None else _names("natural", natural, allow_empty=False)
        self.separator = None if separator is None else check_int(_OWNER, "separator", separator, 0)
        if self.natural is not None:
            self._check_against(self.natural)
        super().__init__(
            fields=self.fields, reverse=self.reverse, natural=self.natural, separator=self.separator
        )

    def _check_against(self, natural: list[str]) -> None:
        if sorted(self.fields) != sorted(natural):
            raise ConfigError(
                f"{_OWNER}: parameter fields={self.fields!r} must name every field of the "
                f"source once, in any order; the source's fields are {natural!r}"
            )
        unknown = [name for name in self.reverse if name not in natural]
        if unknown:
            raise ConfigError(
                f"{_OWNER}: parameter reverse={self.reverse!r} names {unknown[0]!r}, not a "
                f"field of the source; its fields are {natural!r}"
            )

    def for_source(self, info: Mapping[str, Any]) -> Fields:
        """This order bound to a source's field names and separator (from its ``info.json``)."""
        records = info.get("records")
        if not isinstance(records, Mapping):
            source = info.get("source", "this source")
            raise ConfigError(
                f"{_OWNER}: source {source!r} has no named fields; the fields order applies to "
                "records sources only (give it its own study, or drop the order)"
            )
        natural = list(records["fields"])
        if self.natural is not None and self.natural != natural:
            raise ConfigError(
                f"{_OWNER}: parameter natural={self.natural!r} differs from the source's "
                f"fields {natural!r}; leave natural unset"
            )
        return Fields(
            fields=self.fields,
            reverse=self.reverse,
            natural=natural,
            separator=int(records["separator_id"]),
        )

    # ------------------------------------------------------------------ positions
    def _bound(self) -> tuple[list[str], int]:
        if self.natural is None or self.separator is None:
            raise ConfigError(
                f"{_OWNER}: the source's field names and separator are unknown; use it on a "
                "records source (the pipeline binds them), or give natural= and separator="
            )
        return self.natural, self.separator

    def _field_lengths(self, units: SequenceSet, n_fields: int) -> tuple[np.ndarray, np.ndarray]:
        """((n_units, n_fields) tokens per field, (n_units,) whether the unit is a record).

        Field ``k`` of a unit is the stretch between its ``k``-th and ``k+1``-th separator.
        """
        _, separator = self._bound()
        is_separator = np.asarray(units.tokens) == separator
        unit_of_token = units.row_ids()
        counts = np.bincount(unit_of_token, weights=is_separator, minlength=len(units))
        is_record = counts == n_fields - 1
        before = earlier_in_unit(units, is_separator)
        inside = ~is_separator & is_record[unit_of_token]
        cell = unit_of_token[inside] * n_fields + before[inside]
        lengths = np.bincount(cell, minlength=len(units) * n_fields)
        return lengths.reshape(len(units), n_fields).astype(np.int64), is_record

    def _positions(self, units: SequenceSet, lengths: np.ndarray, is_record: np.ndarray) -> Any:
        """Output flat index -> natural flat index, for natural per-field ``lengths``."""
        natural, _ = self._bound()
        n_units, n_fields = lengths.shape
        new_of_natural = np.array([self.fields.index(name) for name in natural])  # (n_fields,)
        natural_of_new = _inverse_permutation(new_of_natural)
        reversed_field = np.array([name in self.reverse for name in natural])
        starts = units.offsets[:-1][:, None]  # (n_units, 1)
        # Each field is followed by one separator, except the last: slot = length + 1.
        natural_start = starts + np.cumsum(lengths + 1, axis=1) - (lengths + 1)
        new_lengths = lengths[:, natural_of_new]
        new_start = starts + np.cumsum(new_lengths + 1, axis=1) - (new_lengths + 1)
        output_start = new_start[:, new_of_natural]  # (n_units, n_fields) by natural field
        positions = np.arange(len(units.tokens), dtype=np.int64)  # units left as they are
        for k in range(n_fields):
            width = lengths[is_record, k]
            offset = np.arange(int(width.sum())) - np.repeat(np.cumsum(width) - width, width)
            source = np.repeat(natural_start[is_record, k], width) + offset
            inner = np.repeat(width, width) - 1 - offset if reversed_field[k] else offset
            positions[np.repeat(output_start[is_record, k], width) + inner] = source
            if k < n_fields - 1:  # the separator after natural field k, after new field k
                positions[new_start[is_record, k] + new_lengths[is_record, k]] = (
                    natural_start[is_record, k] + lengths[is_record, k]
                )
        return positions

    def positions_set(self, units: SequenceSet) -> np.ndarray:
        natural, _ = self._bound()
        lengths, is_record = self._field_lengths(units, len(natural))
        return self._positions(units, lengths, is_record)

    def inverse_positions_set(self, reordered: SequenceSet) -> np.ndarray:
        natural, _ = self._bound()
        # The output's fields are the natural fields in the new order, same lengths.
        new_lengths, is_record = self._field_lengths(reordered, len(natural))
        new_of_natural = np.array([self.fields.index(name) for name in natural])
        lengths = new_lengths[:, new_of_natural]
        return _inverse_permutation(self._positions(reordered, lengths, is_record))
