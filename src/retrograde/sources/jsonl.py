"""``jsonl``: JSON Lines files, one document per line, from one named field.

The field holds either a string (a text document, tokenized later) or a list of
non-negative integers (a token document whose ids are kept). All lines of a source must
agree on the kind. Blank lines are skipped; every error names ``file:line``.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from typing import Any

import numpy as np

from ..data import SPLITS, Document
from ..errors import DataError
from ..validation import invalid
from ._base import EncodedFileSource, iter_lines, json_object

__all__ = ["JsonlSource"]


class JsonlSource(EncodedFileSource):
    """JSON Lines files.

    Parameters
    ----------
    files : str or list of str
        Paths or glob patterns.
    field : str
        The key read from every line's object: a string, or a list of token ids.
    errors : {"strict", "replace"}
        Invalid UTF-8: refuse naming the file and byte offset, or read it as U+FFFD.
    split_field : str, optional
        A key whose value (``"train"``, ``"valid"`` or ``"test"``) fixes the split of every
        record's units, instead of the hash split; every record must have it.
    id_field : str, optional
        A key whose value (a string or an integer) is the record's unit id, as a file of
        test ids names it (``split.test_ids``); without it the id is ``file:line``.

    Examples
    --------
    >>> import pathlib, tempfile
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "d.jsonl"
    >>> _ = path.write_text('{"text": "héllo"}\\n{"text": "bye"}\\n')
    >>> [(d.text, d.n_bytes) for d in JsonlSource(files=str(path)).documents()]
    [('héllo', 6), ('bye', 3)]
    """

    name = "jsonl"

    def __init__(
        self,
        *,
        files: Any,
        field: str = "text",
        errors: str = "strict",
        split_field: str | None = None,
        id_field: str | None = None,
    ) -> None:
        self.files = files
        self.field = field
        self.errors = errors
        self.split_field = split_field
        self.id_field = id_field
        self._validate_params()

    def _validate_params(self) -> None:
        if not isinstance(self.field, str) or not self.field:
            raise invalid(self._owner, "field", self.field, "a non-empty key name")
        for key in ("split_field", "id_field"):
            value = getattr(self, key)
            if value is not None and (not isinstance(value, str) or not value):
                raise invalid(self._owner, key, value, "null or a non-empty key name")
        self._check_files()

    def documents(self) -> Iterator[Document]:
        doc_id = 0
        kind = ""  # "text" or "tokens", fixed by the first record
        for path in self.paths():
            for line_number, line, _ in iter_lines(path, self.errors):
                if not line.strip():
                    continue
                where = f"{path}:{line_number}"
                document = self._parse(line, where, doc_id)
                this_kind = "text" if document.text is not None else "tokens"
                if kind and this_kind != kind:
                    raise DataError(
                        f"{where}: field {self.field!r} holds {this_kind} but earlier lines hold "
                        f"{kind}; use one kind (a string or a list of token ids) in every line"
                    )
                kind = this_kind
                yield document
                doc_id += 1
        if doc_id == 0:
            raise self._no_records()

    def _parse(self, line: str, where: str, doc_id: int) -> Document:
        record = json_object(line, where)
        if self.field not in record:
            keys = ", ".join(sorted(record)) or "none"
            raise DataError(
                f"{where}: field {self.field!r} is missing (keys: {keys}); "
                "add it or set the source's field= to the right key"
            )
        value = record[self.field]
        key, split = self._unit_id(record, where), self._split(record, where)
        if isinstance(value, str):
            return Document(
                doc_id, where, text=value, n_bytes=len(value.encode("utf-8")), key=key, split=split
            )
        if isinstance(value, list) and all(
            isinstance(v, int) and not isinstance(v, bool) and v >= 0 for v in value
        ):
            tokens = np.asarray(value, dtype=np.int64).reshape(-1)
            return Document(doc_id, where, tokens=tokens, key=key, split=split)
        raise DataError(
            f"{where}: field {self.field!r} must be a string or a list of non-negative "
            f"integers, got {json.dumps(value)[:40]}"
        )

    def _split(self, record: dict[str, Any], where: str) -> str | None:
        if self.split_field is None:
            return None
        value = record.get(self.split_field)
        if value not in SPLITS:
            raise DataError(
                f"{where}: split field {self.split_field!r} is {json.dumps(value)[:40]}; "
                f"allowed: {', '.join(repr(s) for s in SPLITS)} in every record"
            )
        return str(value)

    def _unit_id(self, record: dict[str, Any], where: str) -> str | None:
        if self.id_field is None:
            return None
        value = record.get(self.id_field)
        if isinstance(value, bool) or not isinstance(value, (str, int)):
            raise DataError(
                f"{where}: id field {self.id_field!r} is {json.dumps(value)[:40]}; "
                "allowed: a string or an integer in every record"
            )
        return str(value)
