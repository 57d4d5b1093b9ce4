"""The two contracts sources follow, and the file helpers the file sources share.

A *file source* streams :class:`~retrograde.data.Document` records from files
(``paths()`` lists the files, for DVC dependencies; ``documents()`` yields records one at a
time, so memory stays bounded by the largest record, not the corpus).

A *calibration source* generates fixed-length units from a known distribution and gives the
exact negative log-likelihood of every unit (its *floor*). Floor convention: nats per unit,
end-of-unit marker **included**; because every unit has the same length, the true
probability of the end marker after the last token is 1, so it adds 0 nats. A family scores
the end marker too, so ``model NLL - floor`` is the excess of the model over the truth.

Parameters are keyword-only, stored unchanged in ``__init__`` and checked by
``_validate_params`` (called at the end of ``__init__``), so an invalid value fails before
any work with ``source '<name>': parameter <key>=<value> is invalid; allowed: ...``.
"""

from __future__ import annotations

import contextlib
import glob
import inspect
import json
import os
import re
import stat
from abc import ABC, abstractmethod
from collections.abc import Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any, BinaryIO, ClassVar

import numpy as np

from ..data import Document, SequenceSet
from ..errors import DataError, MissingFileError
from ..validation import check_choice, check_int, invalid

__all__ = [
    "CalibrationSource",
    "FileSource",
    "Source",
    "check_regular_file",
    "expand_files",
    "find_lone_carriage_return",
    "iter_lines",
    "open_regular",
]

#: how undecodable bytes are handled: refuse (naming file and byte offset) or U+FFFD
DECODE_ERRORS = ("strict", "replace")


class Source(ABC):  # noqa: B024 (abstract methods live in the two sub-contracts)
    """Base of every source: keyword parameters stored as given, checked in one place."""

    #: registry name, set by each subclass
    name: ClassVar[str] = ""
    is_calibration: ClassVar[bool] = False

    @property
    def _owner(self) -> str:
        return f"source {self.name!r}"

    def _validate_params(self) -> None:  # noqa: B027 (optional hook)
        """Raise ConfigError naming the parameter, the value and what is allowed."""

    def get_params(self) -> dict[str, Any]:
        """The keyword parameters of ``__init__`` with their current values."""
        signature = inspect.signature(type(self).__init__)
        return {
            key: getattr(self, key)
            for key, parameter in signature.parameters.items()
            if parameter.kind is inspect.Parameter.KEYWORD_ONLY
        }

    def __repr__(self) -> str:
        params = ", ".join(f"{k}={v!r}" for k, v in self.get_params().items())
        return f"{type(self).__name__}({params})"


class FileSource(Source):
    """A source that streams documents from files."""

    is_calibration: ClassVar[bool] = False

    @abstractmethod
    def paths(self) -> list[Path]:
        """The files read, after glob expansion, in reading order (DVC dependencies)."""

    @abstractmethod
    def documents(self) -> Iterator[Document]:
        """Yield the documents one at a time; ``doc_id`` numbers them from 0 (pieces of one
        document, such as the units of one folder document for ``tokens``, share one)."""

    def declared_vocab_size(self) -> int | None:
        """The vocabulary size token documents declare (None: the largest id + 1)."""
        return None


class EncodedFileSource(FileSource):
    """Shared by the sources that read UTF-8 files named by ``files`` (paths or globs) with
    an ``errors`` policy for invalid bytes (``text``, ``jsonl``, ``fasta``)."""

    files: Any
    errors: str

    def _check_files(self) -> None:
        check_decode_errors(self._owner, self.errors)
        expand_files(self._owner, "files", self.files)

    def paths(self) -> list[Path]:
        return expand_files(self._owner, "files", self.files)

    def _no_records(self) -> DataError:
        """The error of a JSONL source whose files hold no record at all."""
        return DataError(
            f"{self._owner}: no records in {', '.join(map(str, self.paths()))}; the files are empty"
        )


class CalibrationSource(Source):
    """A synthetic source with an exact per-unit negative log-likelihood (the floor)."""

    is_calibration: ClassVar[bool] = True
    #: token ids lie in [0, vocab_size)
    vocab_size: int

    @property
    @abstractmethod
    def unit_length(self) -> int:
        """Tokens per unit (every unit has this length)."""

    @abstractmethod
    def generate(self, n_units: int, seed: int) -> SequenceSet:
        """``n_units`` units drawn from the source; deterministic for ``seed``."""

    @abstractmethod
    def nll(self, units: SequenceSet) -> np.ndarray:
        """(n_units,) float64 exact nats per unit, end marker included (it costs 0)."""

    @abstractmethod
    def spans(self, length: int) -> dict[str, tuple[int, int]]:
        """Named natural-order position ranges ``[start, stop)`` of a unit of ``length``."""

    @abstractmethod
    def metadata(self) -> dict[str, Any]:
        """JSON-able facts about the source (entropy, matrix density, ...)."""

    # ------------------------------------------------------------------ helpers
    def _check_length(self, length: int) -> None:
        if int(length) != self.unit_length:
            raise DataError(
                f"{self._owner}: units have {self.unit_length} tokens, not {length}; "
                "spans exist only for the source's own unit length"
            )

    def _check_n_units(self, n_units: int, seed: int) -> None:
        check_int(self._owner, "n_units", n_units, 0)
        check_int(self._owner, "seed", seed, 0)

    def _as_matrix(self, units: SequenceSet) -> np.ndarray:
        """(n_units, unit_length) int64 view of ``units``; refuses other lengths or ids."""
        lengths = units.lengths
        wrong = np.flatnonzero(lengths != self.unit_length)
        if len(wrong):
            raise DataError(
                f"{self._owner}: unit {int(wrong[0])} has {int(lengths[wrong[0]])} tokens, "
                f"expected {self.unit_length}; floors exist only for units this source generates"
            )
        tokens = np.asarray(units.tokens, dtype=np.int64)
        if len(tokens) and (tokens.min() < 0 or tokens.max() >= self.vocab_size):
            bad = int(np.flatnonzero((tokens < 0) | (tokens >= self.vocab_size))[0])
            raise DataError(
                f"{self._owner}: unit {bad // self.unit_length} holds token id {int(tokens[bad])} "
                f"outside [0, {self.vocab_size}); floors exist only for units this source generates"
            )
        return tokens.reshape(len(units), self.unit_length)

    def _impossible(self, unit_index: int, why: str) -> DataError:
        return DataError(
            f"{self._owner}: unit {unit_index} has probability 0 under this source ({why}); "
            "floors exist only for units generated with the same parameters"
        )


# ---------------------------------------------------------------------- file helpers
_GLOB_CHARS = set("*?[")


def _as_path_list(owner: str, key: str, value: Any) -> list[str]:
    """A single path or a list of paths (Hydra gives a ListConfig) as a list of strings."""
    if isinstance(value, (str, os.PathLike)):
        items: list[Any] = [value]
    elif isinstance(value, Mapping):
        items = []
    elif isinstance(value, Sequence) or hasattr(value, "__iter__"):  # list, tuple, ListConfig
        items = list(value)
    else:
        items = []
    if not items or not all(isinstance(item, (str, os.PathLike)) for item in items):
        raise invalid(owner, key, value, "a path or glob, or a non-empty list of them")
    return [os.fspath(item) for item in items]


def expand_files(owner: str, key: str, value: Any) -> list[Path]:
    """Expand paths and globs into existing files, in the given order, sorted within a glob.

    A glob matching nothing, a missing file and a folder are refused with a one-line
    :class:`DataError`, and so is anything that is not a regular file (a FIFO, socket or
    device, named or matched: reading one could block forever); a file named twice is read
    once.
    """
    found: list[Path] = []
    for pattern in _as_path_list(owner, key, value):
        if _GLOB_CHARS & set(pattern):
            matches = sorted(Path(m) for m in glob.glob(pattern, recursive=True))
            matches = [m for m in matches if not m.is_dir()]
            for match in matches:
                check_regular_file(owner, match)
            if not matches:
                raise MissingFileError(
                    f"{owner}: {key} pattern {pattern!r} matches no file "
                    f"(relative to {Path.cwd()}); check the pattern"
                )
        else:
            path = Path(pattern)
            if path.is_dir():
                raise DataError(
                    f"{owner}: {key} {pattern!r} is a folder; name its files, e.g. '{pattern}/*.txt'"
                )
            if not path.exists():
                raise MissingFileError(
                    f"{owner}: {key} file {pattern!r} not found (relative to {Path.cwd()})"
                )
            check_regular_file(owner, path)
            matches = [path]
        found.extend(m for m in matches if m not in found)
    return found


def check_regular_file(owner: str, path: Path) -> None:
    """Refuse ``path`` unless it is a regular file (or a link to one)."""
    try:
        mode = path.stat().st_mode
    except OSError as exc:
        raise DataError(f"{owner}: cannot read {str(path)!r} ({exc.strerror})") from None
    if not stat.S_ISREG(mode):
        raise DataError(
            f"{owner}: {str(path)!r} is a {_file_kind(mode)}, not a regular file; reading it "
            "could block or never end; point the source at regular files"
        )


def _file_kind(mode: int) -> str:
    for test, kind in (
        (stat.S_ISFIFO, "FIFO (named pipe)"),
        (stat.S_ISCHR, "character device"),
        (stat.S_ISBLK, "block device"),
        (stat.S_ISSOCK, "socket"),
        (stat.S_ISDIR, "folder"),
    ):
        if test(mode):
            return kind
    return "special file"


@contextlib.contextmanager
def open_regular(path: Path) -> Iterator[BinaryIO]:
    """``path`` opened for reading bytes, refused unless it is a regular file.

    Opened without blocking and checked on the open file itself, so a FIFO put in the
    file's place after the sources were checked cannot hang a stage.
    """
    fd = os.open(path, os.O_RDONLY | os.O_NONBLOCK | os.O_CLOEXEC)
    try:
        mode = os.fstat(fd).st_mode
        if not stat.S_ISREG(mode):
            raise DataError(
                f"{path}: is a {_file_kind(mode)}, not a regular file; point the source at "
                "regular files"
            )
        os.set_blocking(fd, True)
        handle = os.fdopen(fd, "rb")
    except BaseException:
        os.close(fd)
        raise
    with handle:
        yield handle


def check_decode_errors(owner: str, value: Any) -> str:
    return check_choice(owner, "errors", value, DECODE_ERRORS)


def lone_carriage_return(path: Path | str, line_number: int, offset: int) -> DataError:
    """The error for a CR not followed by LF at byte ``offset`` (on line ``line_number``)."""
    return DataError(
        f"{path}:{line_number}: carriage return without a line feed at byte offset {offset} "
        "of the file (old Mac line ends, or a stray CR); lines would silently merge; convert "
        "the line ends to LF (e.g. tr '\\r' '\\n') or remove the stray CR"
    )


def find_lone_carriage_return(path: Path | str, data: bytes) -> None:
    """Raise :func:`lone_carriage_return` for the first CR in ``data`` not followed by LF.

    A CR as the very last byte counts as a line end (as :func:`iter_lines` reads it).
    """
    match = _LONE_CR.search(data)
    if match is not None and match.start() != len(data) - 1:
        offset = match.start()
        raise lone_carriage_return(path, data.count(b"\n", 0, offset) + 1, offset)


_LONE_CR = re.compile(rb"\r(?!\n)")


def json_object(line: str, where: str) -> dict[str, Any]:
    """One line of a JSONL file as the JSON object it must hold; else one line naming
    ``where`` (``file:line``)."""
    try:
        record = json.loads(line)
    except json.JSONDecodeError as exc:
        raise DataError(
            f"{where}: invalid JSON at column {exc.colno} ({exc.msg}); "
            "each line must be one JSON object"
        ) from None
    if not isinstance(record, dict):
        raise DataError(f"{where}: expected a JSON object, got {type(record).__name__}")
    return record


def iter_lines(path: Path, errors: str) -> Iterator[tuple[int, str, int]]:
    """Stream ``(line_number, text, n_bytes)`` for each line of a UTF-8 file.

    The line ending (LF or CRLF) is removed, so CRLF files read exactly like LF files; a
    UTF-8 byte-order mark at the start is dropped. ``n_bytes`` counts the UTF-8 bytes of
    ``text``. Memory is bounded by the longest line. With ``errors="strict"`` invalid UTF-8
    raises a :class:`DataError` naming the file, line and byte offset. A carriage return
    not followed by a line feed (old Mac line ends) raises one too, whatever ``errors``
    says: read as LF files, such lines would silently merge into one.
    """
    line_start = 0  # byte offset of the current line in the file
    with open_regular(path) as handle:
        for line_number, raw in enumerate(handle, start=1):
            body = raw[:-1] if raw.endswith(b"\n") else raw
            if body.endswith(b"\r"):
                body = body[:-1]
            body_start = line_start
            if line_number == 1 and body.startswith(b"\xef\xbb\xbf"):
                body, body_start = body[3:], 3
            if b"\r" in body:
                raise lone_carriage_return(path, line_number, body_start + body.index(b"\r"))
            try:
                text = body.decode("utf-8", errors=errors)
            except UnicodeDecodeError as exc:
                raise DataError(
                    f"{path}:{line_number}: invalid UTF-8 at byte offset {body_start + exc.start} "
                    "of the file; convert the file to UTF-8 or set the source's errors='replace'"
                ) from None
            n_bytes = len(body) if errors == "strict" else len(text.encode("utf-8"))
            yield line_number, text, n_bytes
            line_start += len(raw)
