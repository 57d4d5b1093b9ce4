"""``retrograde check FILE [options]`` or ``retrograde check [--dir HOST] [OVERRIDES]``.

With a FILE: cut, split and tokenize one text file and round-trip orders
(:func:`retrograde.host.check_file`). Without one (or with ``--dir``): check a host's
composed config, round-trip every order on its real data and say which fit cells DVC would
run (:func:`retrograde.host.check_host`). Exit status 0 when every order round-trips, 1
when one does not, 2 for a usage or input error (one line).
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from ..data import DEFAULT_FRACTIONS, DEFAULT_SALT, DEFAULT_UNIT_MODE, UNIT_MODES
from ..errors import BijectionError, ConfigError
from ..host import (
    VOCABULARY_SHOWN,
    check_file,
    check_host,
    format_file_check,
    format_host_check,
)

__all__ = ["configure", "run"]


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "file",
        type=Path,
        nargs="?",
        help="a UTF-8 text file (one document); without it, check the host repository here",
    )
    # Host mode (retrograde.host.check_host): `check [--dir HOST] [OVERRIDES]` checks the composed
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
    parser.add_argument(
        "--unit", default=DEFAULT_UNIT_MODE, choices=UNIT_MODES, help="how units are cut"
    )
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
        default=list(DEFAULT_FRACTIONS),
        metavar="F",
        help="train valid [test] fractions (default %(default)s)",
    )
    parser.add_argument("--salt", default=DEFAULT_SALT, help="salt of the split hash")
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
    parser.add_argument(
        "--vocab",
        action="store_true",
        help="list every vocabulary entry (the text report shows the first 40)",
    )


def run(args: argparse.Namespace) -> int:
    # Host mode without --dir too: plain `retrograde check [OVERRIDES]` inside a host repo
    # (a word with "=" that is not a file is a Hydra override, not a FILE).
    looks_like_override = args.file is not None and "=" in str(args.file) and not args.file.exists()
    if args.dir is not None or args.file is None or looks_like_override:
        words = [*([] if args.file is None else [str(args.file)]), *args.overrides]
        try:
            report = check_host(args.dir or ".", words)
        except BijectionError as exc:
            print(f"retrograde check: round trip failed: {exc}", file=sys.stderr)
            return 1
        print(
            json.dumps(report, indent=2, sort_keys=True)
            if args.json
            else format_host_check(
                report, vocabulary_limit=None if args.vocab else VOCABULARY_SHOWN
            )
        )
        return 0
    if args.overrides:
        raise ConfigError("check: give one FILE, or --dir HOST [OVERRIDES] for a host repository")
    summary = check_file(
        Path(args.file),
        tokenizer=args.tokenizer,
        max_vocab=args.max_vocab,
        unit=args.unit,
        window=args.window,
        remainder=args.remainder,
        fractions=args.fractions,
        salt=args.salt,
        order_specs=args.order,
        errors=args.errors,
    )
    limit = None if args.vocab else VOCABULARY_SHOWN
    print(format_file_check(summary, as_json=args.json, vocabulary_limit=limit))
    return 0 if all(v == "ok" for v in summary["orders"].values()) else 1
