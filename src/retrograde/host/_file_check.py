"""``retrograde check FILE``: cut, split and tokenize one text file; round-trip orders.

A first look at a corpus before it becomes a source: unit counts per split, vocabulary
size, duplicates, tokens per unit and, for each requested order, whether every unit
survives ``invert(apply(x)) == x``. Orders are given as ``NAME`` or
``NAME:KEY=VALUE,KEY=VALUE`` with YAML values (``block_reverse:size=4``,
``segment_reverse:separators=[" "]``); a string separator is looked up in the fitted
vocabulary. Without orders, every registered order that needs no parameters is checked.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import yaml

from .. import orders
from ..data import Document, PreparedUnits, check_fractions, check_units, prepare_units, tokenizers
from ..errors import BijectionError, ConfigError, DataError, HostRepoError
from ..sources import find_lone_carriage_return
from ..validation import check_int
from ._check import VOCABULARY_SHOWN, format_vocabulary, vocabulary_listing
from ._corpus_paths import missing_file_hint
from ._repo import find_host

__all__ = ["check_file", "format_file_check", "parse_order_spec", "read_text"]


def read_text(path: Path, *, errors: str, raw_bytes: bool = False) -> str:
    """The file's text, decoded in one step; one-line DataError for every bad input."""
    if not path.exists():
        raise DataError(f"{path}: no such file; check the path")
    if not path.is_file():
        raise DataError(f"{path}: not a regular file; give a text file")
    data = path.read_bytes()
    if not data:
        raise DataError(f"{path}: the file is empty; give a file with at least one unit of text")
    find_lone_carriage_return(path, data)  # lines would merge silently
    if raw_bytes:
        return data.decode("utf-8", "surrogateescape")  # lossless for the bytes tokenizer
    try:
        return data.decode("utf-8", errors)
    except UnicodeDecodeError as exc:
        line = data.count(b"\n", 0, exc.start) + 1
        raise DataError(
            f"{path}:{line}: invalid UTF-8 at byte offset {exc.start} "
            f"(byte 0x{data[exc.start]:02x}); convert the file to UTF-8, pass --errors replace "
            "to read bad bytes as U+FFFD, or use --tokenizer bytes"
        ) from None


def _split_params(text: str) -> list[str]:
    """Split ``a=1,b=[2,3]`` at commas outside brackets and quotes."""
    parts, depth, quote, current = [], 0, "", ""
    for char in text:
        if quote:
            quote = "" if char == quote else quote
        elif char in "\"'":
            quote = char
        elif char in "[{":
            depth += 1
        elif char in "]}":
            depth -= 1
        elif char == "," and depth == 0:
            parts.append(current)
            current = ""
            continue
        current += char
    return [*parts, current] if current or parts else []


def parse_order_spec(spec: str) -> tuple[str, dict[str, Any]]:
    """``"block_reverse:size=4"`` -> ``("block_reverse", {"size": 4})``.

    >>> parse_order_spec('segment_reverse:separators=[" ", 10]')
    ('segment_reverse', {'separators': [' ', 10]})
    """
    name, _, rest = spec.partition(":")
    params: dict[str, Any] = {}
    for item in _split_params(rest):
        key, sep, value = item.partition("=")
        if not sep or not key.strip():
            raise ConfigError(
                f"--order {spec!r}: {item!r} is not KEY=VALUE; write e.g. block_reverse:size=4"
            )
        try:
            params[key.strip()] = yaml.safe_load(value)
        except yaml.YAMLError:
            raise ConfigError(
                f"--order {spec!r}: value of {key.strip()!r} is not valid YAML"
            ) from None
    return name.strip(), params


def _requested_orders(specs: list[str]) -> list[tuple[str, str, dict[str, Any]]]:
    """(label, name, params) per order; every name and parameter is checked before any work."""
    if not specs:
        found: list[tuple[str, str, dict[str, Any]]] = []
        for name in orders.names():
            try:
                orders.make(name)
            except ConfigError:
                continue  # needs parameters (e.g. separators): only checked when requested
            found.append((name, name, {}))
        return found
    requested = []
    for spec in specs:
        name, params = parse_order_spec(spec)
        # Separators given as text are looked up once the vocabulary is fitted.
        orders.make(name, **params)  # unknown names and bad values fail here, before reading
        requested.append((spec, name, params))
    return requested


def _verdicts(
    prepared: PreparedUnits, requested: list[tuple[str, str, dict[str, Any]]]
) -> dict[str, str]:
    verdicts = {}
    tokenizer = prepared.tokenizer
    describe = None if tokenizer is None else tokenizer.decode
    for label, name, params in requested:
        order = orders.make(name, **params).with_tokenizer(tokenizer, where=f"--order {label!r}")
        try:
            for split, units in prepared.splits.items():
                try:
                    orders.verify_bijection(order, units, order_name=label, describe=describe)
                except BijectionError as exc:
                    raise BijectionError(f"{split} split: {exc}") from exc
        except BijectionError as exc:
            verdicts[label] = f"FAILED: {exc}"
        else:
            verdicts[label] = "ok"
    return verdicts


def _explain_missing(path: Path) -> None:
    """Raise a one-line DataError when a DVC stage of the host around ``path`` makes it."""
    try:
        host = find_host(Path.cwd(), require_dvc=True)
    except HostRepoError:
        return
    hint = missing_file_hint(host, path)
    if hint:
        raise DataError(hint)


def check_file(
    path: Path,
    *,
    tokenizer: str,
    max_vocab: int | None,
    unit: str,
    window: int | None,
    remainder: str,
    fractions: Sequence[float],
    salt: str,
    order_specs: Sequence[str],
    errors: str,
) -> dict[str, Any]:
    """The summary of one file: counts, vocabulary and a verdict per order (JSON-able)."""
    if max_vocab is not None:
        check_int(f"tokenizer {tokenizer!r}", "max_vocab", max_vocab, low=2)
    check_fractions(fractions)
    check_units(unit, window if unit == "window" else None, remainder)
    requested = _requested_orders(list(order_specs))
    if not path.exists():
        _explain_missing(path)
    params = {} if max_vocab is None or tokenizer == "bytes" else {"max_vocab": max_vocab}
    text = read_text(path, errors=errors, raw_bytes=tokenizer == "bytes")
    prepared = prepare_units(
        [Document(doc_id=0, where=str(path), text=text)],
        tokenizer=tokenizers.make(tokenizer, **params),
        mode=unit,
        window=window if unit == "window" else None,
        fractions=fractions,
        salt=salt,
        remainder=remainder,
    )
    summary = prepared.summary()
    summary["file"] = str(path)
    summary["orders"] = _verdicts(prepared, requested)
    summary["vocabulary"] = vocabulary_listing(prepared.tokenizer, prepared.vocab_size)
    return summary


def format_file_check(
    summary: dict[str, Any],
    *,
    as_json: bool = False,
    vocabulary_limit: int | None = VOCABULARY_SHOWN,
) -> str:
    """The summary as a few aligned lines (the vocabulary's first ``vocabulary_limit``
    entries; None: all), or as JSON (all of it)."""
    if as_json:
        return json.dumps(summary, indent=2, sort_keys=True)
    lines = [_format(summary)]
    if "vocabulary" in summary:
        lines += format_vocabulary(summary["file"], summary["vocabulary"], vocabulary_limit)
    return "\n".join(lines)


def _format(summary: dict[str, Any]) -> str:
    lines = [
        f"retrograde check: {summary['file']}",
        f"tokenizer {summary['tokenizer']}: vocab_size {summary['vocab_size']} "
        "(unknown token included; fitted on the train split)",
        f"units: {summary['mode']} mode; duplicates: {summary['duplicates']} units share "
        f"their content with another ({summary['duplicated_contents']} distinct contents); "
        f"dropped tokens: {summary['dropped_tokens']}",
        f"{'split':<6} {'units':>8} {'tokens':>10} {'mean/unit':>10} {'min':>6} {'max':>6} "
        f"{'unknown':>8}",
    ]
    for name, info in summary["splits"].items():
        per_unit = info["tokens_per_unit"]
        lines.append(
            f"{name:<6} {info['units']:>8} {info['tokens']:>10} {per_unit['mean']:>10.2f} "
            f"{per_unit['min']:>6} {per_unit['max']:>6} {info.get('unknown_tokens', 0):>8}"
        )
    lines.append("orders (invert(apply(x)) == x on every unit of every split):")
    width = max((len(label) for label in summary["orders"]), default=0)
    lines += [f"  {label:<{width}}  {verdict}" for label, verdict in summary["orders"].items()]
    return "\n".join(lines)
