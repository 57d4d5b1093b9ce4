"""``text``: UTF-8 text files, one document per file, blank-line paragraph or line.

``split`` decides what one :class:`Document` is; the unit mode of
:func:`retrograde.units.prepare_units` then cuts units from each document, and units cut from
one document share its ``doc_id`` (the bootstrap resamples documents as a whole):

- ``split="file"``: the whole file is one document (read whole: memory ~ file size).
- ``split="paragraph"``: runs of non-blank lines separated by blank lines (streamed).
- ``split="line"``: every non-blank line is one document (streamed).

Line endings are normalized: CRLF reads as LF, and a UTF-8 byte-order mark is dropped. A
carriage return without a line feed is refused naming file, line and byte offset (lines
would silently merge).
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

from ..data import Document
from ..errors import DataError
from ..validation import check_choice
from ._base import EncodedFileSource, find_lone_carriage_return, iter_lines, open_regular

__all__ = ["TextSource"]

SPLITS = ("file", "paragraph", "line")


class TextSource(EncodedFileSource):
    """UTF-8 text files.

    Parameters
    ----------
    files : str or list of str
        Paths or glob patterns (``**`` recursive), relative to the working folder.
    split : {"file", "paragraph", "line"}
        What one document is (see the module docstring).
    errors : {"strict", "replace"}
        Invalid UTF-8: refuse naming the file and byte offset, or read it as U+FFFD.

    Examples
    --------
    >>> import pathlib, tempfile
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> _ = (folder / "a.txt").write_bytes(b"one\\r\\ntwo\\r\\n\\r\\nthree\\r\\n")
    >>> [d.text for d in TextSource(files=str(folder / "*.txt"), split="paragraph").documents()]
    ['one\\ntwo', 'three']
    """

    name = "text"

    def __init__(self, *, files: Any, split: str = "paragraph", errors: str = "strict") -> None:
        self.files = files
        self.split = split
        self.errors = errors
        self._validate_params()

    def _validate_params(self) -> None:
        check_choice(self._owner, "split", self.split, SPLITS)
        self._check_files()

    def documents(self) -> Iterator[Document]:
        doc_id = 0
        for path in self.paths():
            if self.split == "file":
                pieces: Iterator[tuple[int, str, int]] = iter([_read_whole(path, self.errors)])
            elif self.split == "paragraph":
                pieces = _paragraphs(path, self.errors)
            else:
                pieces = iter_lines(path, self.errors)
            for line_number, text, n_bytes in pieces:
                if not text.strip():
                    continue  # blank lines and blank files make no document
                where = str(path) if self.split == "file" else f"{path}:{line_number}"
                yield Document(
                    doc_id,
                    where,
                    text=text,
                    n_bytes=n_bytes,
                    file=str(path),
                    first_line=line_number,
                )
                doc_id += 1
        if doc_id == 0:
            raise DataError(
                f"{self._owner}: no text in {', '.join(map(str, self.paths()))}; "
                "the files are empty or blank"
            )


def _paragraphs(path: Path, errors: str) -> Iterator[tuple[int, str, int]]:
    """``(first_line_number, text, n_bytes)`` per paragraph; lines joined with LF."""
    lines: list[str] = []
    first = 0
    n_bytes = 0
    for number, text, line_bytes in iter_lines(path, errors):
        if text.strip():
            if not lines:
                first, n_bytes = number, -1  # -1: the first line adds no joining LF
            lines.append(text)
            n_bytes += line_bytes + 1
        elif lines:
            yield first, "\n".join(lines), n_bytes
            lines = []
    if lines:
        yield first, "\n".join(lines), n_bytes


def _read_whole(path: Path, errors: str) -> tuple[int, str, int]:
    """The whole file as one text, CRLF normalized to LF (memory ~ file size)."""
    with open_regular(path) as handle:
        data = handle.read()
    find_lone_carriage_return(path, data)
    start = 3 if data.startswith(b"\xef\xbb\xbf") else 0
    try:
        text = data[start:].decode("utf-8", errors=errors)
    except UnicodeDecodeError as exc:
        offset = start + exc.start
        line_number = data.count(b"\n", 0, offset) + 1
        raise DataError(
            f"{path}:{line_number}: invalid UTF-8 at byte offset {offset} of the file; "
            "convert the file to UTF-8 or set the source's errors='replace'"
        ) from None
    text = text.replace("\r\n", "\n")
    if text.endswith("\r"):  # a CR as the last byte ends the last line, as in iter_lines
        text = text[:-1] + "\n"
    return 1, text, len(text.encode("utf-8"))
