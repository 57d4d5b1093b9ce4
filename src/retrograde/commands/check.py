"""``retrograde check FILE [options]``: cut, split and tokenize a text file, then round-trip orders.

Prints unit counts per split, vocabulary size, duplicate count, tokens per unit and, for
each requested order, whether every unit survives ``invert(apply(x)) == x``. Exit status:
0 when every order round-trips, 1 when one does not (each failure is printed with the
unit), 2 for a usage or input error (one line, no traceback).

Orders are given as ``NAME`` or ``NAME:KEY=VALUE,KEY=VALUE`` with YAML values, e.g.
``block_reverse:size=4`` or ``segment_reverse:separators=[" "]``; a string separator is
looked up in the fitted vocabulary. Without ``--order`` every registered order that needs
no parameters is checked.

The file is decoded once: ``--errors strict`` (default) refuses invalid UTF-8 naming the
byte offset, ``--errors replace`` reads bad bytes as U+FFFD. The ``bytes`` tokenizer reads
the raw bytes unchanged (undecodable bytes are kept with Python's ``surrogateescape``).
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path
from typing import Any

import yaml

from .. import orders, tokenize
from .._document import Document
from .._validation import check_int
from ..errors import BijectionError, ConfigError, DataError
from ..units import MODES, PreparedUnits, check_fractions, prepare_units

__all__ = ["configure", "parse_order_spec", "read_text", "run"]


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "file",
        type=Path,
        nargs="?",
        help="a UTF-8 text file (one document); without it, check the host repository here",
    )
    # Host mode (retrograde.hostcheck): `check [--dir HOST] [OVERRIDES]` checks the composed
    # config of a host repository; positional words are then Hydra overrides.
    parser.add_argument(
        "--dir", default=None, metavar="HOST", help="check a host's composed config"
    )
    parser.add_argument("overrides", nargs="*", help="with --dir: Hydra overrides")
    parser.add_argument("--tokenizer", default="chars", choices=("bytes", "chars", "words"))
    parser.add_argument(
        "--max-vocab",
        type=int,
        default=None,
        metavar="N",
        help="vocabulary cap for chars/words (unknown token included)",
    )
    parser.add_argument("--unit", default="line", choices=MODES, help="how units are cut")
    parser.add_argument(
        "--window",
        type=int,
        default=None,
        metavar="L",
        help="tokens per unit with --unit window (>= 2)",
    )
    parser.add_argument(
        "--remainder",
        default="drop",
        choices=("drop", "keep"),
        help="a document's last partial window: drop it or keep it shorter",
    )
    parser.add_argument(
        "--fractions",
        type=float,
        nargs="+",
        default=[0.8, 0.1, 0.1],
        metavar="F",
        help="train valid [test] fractions (default 0.8 0.1 0.1)",
    )
    parser.add_argument("--salt", default="retrograde", help="salt of the split hash")
    parser.add_argument(
        "--order",
        action="append",
        default=[],
        metavar="SPEC",
        help="an order to round-trip, NAME or NAME:KEY=VALUE,... (repeatable)",
    )
    parser.add_argument(
        "--errors",
        default="strict",
        choices=("strict", "replace"),
        help="invalid UTF-8: refuse (strict) or read as U+FFFD (replace)",
    )
    parser.add_argument("--json", action="store_true", help="print the summary as JSON")


def read_text(path: Path, *, errors: str, raw_bytes: bool = False) -> str:
    """The file's text, decoded in one step; one-line DataError for every bad input."""
    if not path.exists():
        raise DataError(f"{path}: no such file; check the path")
    if not path.is_file():
        raise DataError(f"{path}: not a regular file; give a text file")
    data = path.read_bytes()
    if not data:
        raise DataError(f"{path}: the file is empty; give a file with at least one unit of text")
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


def _resolve_separators(spec: str, params: dict[str, Any], tokenizer: Any) -> dict[str, Any]:
    """Replace string separators by their token ids in the fitted vocabulary."""
    separators = params.get("separators")
    if tokenizer is None or separators is None:
        return params
    items = separators if isinstance(separators, list) else [separators]
    ids = []
    for item in items:
        if isinstance(item, str):
            token = tokenizer.token_id(item)
            if token == tokenizer.unknown_id:
                raise ConfigError(
                    f"--order {spec!r}: separator {item!r} is not in the {tokenizer.name} "
                    "vocabulary fitted on the train split; give a piece that occurs there"
                )
            item = token
        ids.append(item)
    return {**params, "separators": ids}


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
        # String separators are looked up once the vocabulary is fitted; until then a
        # stand-in id lets every other name and value be checked now.
        checked = {
            k: ([0] if k == "separators" and _has_strings(v) else v) for k, v in params.items()
        }
        orders.make(name, **checked)  # unknown names and bad values fail here, before reading
        requested.append((spec, name, params))
    return requested


def _has_strings(value: Any) -> bool:
    return isinstance(value, str) or (
        isinstance(value, list) and any(isinstance(v, str) for v in value)
    )


def _verdicts(
    prepared: PreparedUnits, requested: list[tuple[str, str, dict[str, Any]]]
) -> dict[str, str]:
    verdicts = {}
    tokenizer = prepared.tokenizer
    describe = None if tokenizer is None else tokenizer.decode
    for label, name, params in requested:
        order = orders.make(name, **_resolve_separators(label, params, tokenizer))
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


def run(args: argparse.Namespace) -> int:
    # Host mode without --dir too: plain `retrograde check [OVERRIDES]` inside a host repo
    # (a word with "=" that is not a file is a Hydra override, not a FILE).
    looks_like_override = args.file is not None and "=" in str(args.file) and not args.file.exists()
    if args.dir is not None or args.file is None or looks_like_override:
        from ..hostcheck import run_host_check

        words = [*([] if args.file is None else [str(args.file)]), *args.overrides]
        return run_host_check(args.dir or ".", words, as_json=args.json)
    if args.overrides:
        raise ConfigError("check: give one FILE, or --dir HOST [OVERRIDES] for a host repository")
    if args.max_vocab is not None:
        check_int(f"tokenizer {args.tokenizer!r}", "max_vocab", args.max_vocab, low=2)
    check_fractions(args.fractions)
    if args.unit == "window":
        check_int("units", "window", args.window, low=2)
    requested = _requested_orders(args.order)
    tokenizer_params = (
        {} if args.max_vocab is None or args.tokenizer == "bytes" else {"max_vocab": args.max_vocab}
    )
    tokenizer = tokenize.make(args.tokenizer, **tokenizer_params)

    text = read_text(args.file, errors=args.errors, raw_bytes=args.tokenizer == "bytes")
    document = Document(doc_id=0, where=str(args.file), text=text)
    prepared = prepare_units(
        [document],
        tokenizer=tokenizer,
        mode=args.unit,
        window=args.window if args.unit == "window" else None,
        fractions=args.fractions,
        salt=args.salt,
        remainder=args.remainder,
    )
    summary = prepared.summary()
    summary["file"] = str(args.file)
    summary["orders"] = _verdicts(prepared, requested)
    print(json.dumps(summary, indent=2, sort_keys=True) if args.json else _format(summary))
    return 0 if all(v == "ok" for v in summary["orders"].values()) else 1


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
