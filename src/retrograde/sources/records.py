"""``records``: JSON Lines records with named fields, one unit per record, fields as spans.

Each line is a JSON object; the source reads the fields named in ``fields``, in that order
(the record's *natural* order), and joins their text with :data:`FIELD_SEPARATOR`
(U+001F, the ASCII "unit separator"), so after tokenization every field boundary is one
separator token of its own. A field holds a string, or a number or boolean (written as
JSON writes it: ``12.5``, ``true``); other keys of the object are ignored.

Every record is one unit (unit mode ``document``) and one document. After the units are
tokenized, :func:`retrograde.sources.source_units` labels every token with its field (or
``separators``): the per-unit *spans* that the ``fields`` order permutes and the table
stage breaks losses down by.

``nll`` names an optional field holding the record's exact negative log-likelihood in nats
under the generator that made it (the probability of the whole record, so of its tokens
and their number): it becomes the unit's *floor*, and the table then shows floor and
excess columns as for the calibration sources.

Errors name ``file:line``: a line that is not an object, a missing field, a value of the
wrong kind, a value holding the separator character, a floor that is not a finite number
>= 0.
"""

from __future__ import annotations

import json
import math
import numbers
from collections.abc import Iterator, Sequence
from typing import Any

from ..data import FIELD_SEPARATOR, Document
from ..errors import DataError
from ..validation import invalid
from ._base import EncodedFileSource, iter_lines, json_object

__all__ = ["SEPARATOR_SPAN", "RecordsSource"]

#: the span name of the separator tokens between fields
SEPARATOR_SPAN = "separators"


class RecordsSource(EncodedFileSource):
    """JSON Lines records whose named fields become spans.

    Parameters
    ----------
    files : str or list of str
        Paths or glob patterns.
    fields : list of str
        The fields read from every record, in their natural order (at least one).
    nll : str, optional
        A field holding the record's exact negative log-likelihood in nats (its floor).
    errors : {"strict", "replace"}
        Invalid UTF-8: refuse naming the file and byte offset, or read it as U+FFFD.

    Examples
    --------
    >>> import pathlib, tempfile
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "r.jsonl"
    >>> _ = path.write_text('{"item": "tea", "qty": 2, "total": "4.00"}\\n')
    >>> source = RecordsSource(files=str(path), fields=["item", "qty", "total"])
    >>> [d.text.split(FIELD_SEPARATOR) for d in source.documents()]
    [['tea', '2', '4.00']]
    """

    name = "records"

    def __init__(
        self,
        *,
        files: Any,
        fields: Sequence[str] = (),
        nll: str | None = None,
        errors: str = "strict",
    ) -> None:
        self.files = files
        self.fields = fields
        self.nll = nll
        self.errors = errors
        self._validate_params()

    def _validate_params(self) -> None:
        allowed = "a non-empty list of distinct, non-empty field names"
        fields = self.fields
        if isinstance(fields, (str, bytes)) or not hasattr(fields, "__iter__"):
            raise invalid(self._owner, "fields", self.fields, allowed)
        fields = list(fields)  # a list, tuple or OmegaConf ListConfig
        if (
            not fields
            or not all(isinstance(f, str) and f for f in fields)
            or len(set(fields)) != len(fields)
        ):
            raise invalid(self._owner, "fields", self.fields, allowed)
        if SEPARATOR_SPAN in fields:
            raise invalid(
                self._owner, "fields", self.fields, f"names other than {SEPARATOR_SPAN!r}"
            )
        self.fields = [str(f) for f in fields]
        if self.nll is not None and (not isinstance(self.nll, str) or not self.nll):
            raise invalid(self._owner, "nll", self.nll, "null or a field name")
        if self.nll in self.fields:
            raise invalid(self._owner, "nll", self.nll, "a field not among fields")
        self._check_files()

    def span_names(self) -> list[str]:
        """The names of the spans every unit has: its fields, then the separators."""
        return [*self.fields, SEPARATOR_SPAN]

    def documents(self) -> Iterator[Document]:
        doc_id = 0
        for path in self.paths():
            for line_number, line, _ in iter_lines(path, self.errors):
                if not line.strip():
                    continue
                yield self._parse(line, f"{path}:{line_number}", doc_id)
                doc_id += 1
        if doc_id == 0:
            raise self._no_records()

    def _parse(self, line: str, where: str, doc_id: int) -> Document:
        record = json_object(line, where)
        values = [self._field_text(record, key, where) for key in self.fields]
        text = FIELD_SEPARATOR.join(values)
        return Document(
            doc_id,
            where,
            text=text,
            n_bytes=len(text.encode("utf-8", "surrogateescape")),
            nll=None if self.nll is None else self._floor(record, where),
        )

    def _missing(self, record: dict[str, Any], key: str, where: str, what: str) -> DataError:
        keys = ", ".join(sorted(record)) or "none"
        return DataError(
            f"{where}: field {key!r} is missing (keys: {keys}); add it or fix the source's {what}"
        )

    def _field_text(self, record: dict[str, Any], key: str, where: str) -> str:
        if key not in record:
            raise self._missing(record, key, where, "fields=")
        value = record[key]
        if isinstance(value, str):
            text = value
        elif isinstance(value, (bool, numbers.Real)) and not (
            isinstance(value, float) and not math.isfinite(value)
        ):
            text = json.dumps(value)
        else:
            raise DataError(
                f"{where}: field {key!r} must be a string, number or boolean, got "
                f"{json.dumps(value)[:40]}"
            )
        if FIELD_SEPARATOR in text:
            raise DataError(
                f"{where}: field {key!r} holds the character U+001F, which separates fields; "
                "remove it from the data"
            )
        return text

    def _floor(self, record: dict[str, Any], where: str) -> float:
        assert self.nll is not None
        if self.nll not in record:
            raise self._missing(record, self.nll, where, "nll=")
        value = record[self.nll]
        if (
            isinstance(value, bool)
            or not isinstance(value, numbers.Real)
            or not math.isfinite(value)
            or value < 0
        ):
            raise DataError(
                f"{where}: field {self.nll!r} must be the record's negative log-likelihood in "
                f"nats, a finite number >= 0, got {json.dumps(value)[:40]}"
            )
        return float(value)
