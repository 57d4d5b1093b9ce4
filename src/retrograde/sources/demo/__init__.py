"""``demo``: an INVENTED corpus — the log book of an imaginary canal-lock and harbour-light crew.

INVENTED DEMO DATA — not real records. Every name, place, part and event is made up by a
seeded generator. The text has real sequential structure, so the order of tokens matters
for how easily a model learns it:

- causes come before effects: a FAULT names a symptom; the CHECK gives a cause that the
  symptom allows; the REPAIR replaces the part that cause needs; the TEST passes only when
  the repair matched the true cause (a wrong first diagnosis fails and is redone);
- distant parts agree: the ticket number, the equipment tag and the reporter's name
  reappear in later lines of the same entry;
- summaries follow what they summarize: a TEST line's ``peak`` is the largest of the
  readings just before it, and a check digit at the end is the digit sum of the ticket,
  day and part count, mod 10.

One entry is one paragraph (blank-line separated). :func:`write_corpus` writes the corpus
as a UTF-8 text file whose first paragraph says it is invented; the ``demo`` source yields
the entries directly, one :class:`Document` each. From a shell::

    python -m retrograde.sources.demo --out data/demo.txt --size-bytes 2000000 --seed 0
"""

from __future__ import annotations

import argparse
import random
import sys
from collections.abc import Iterator, Sequence
from pathlib import Path

from ...data import Document, atomic_write_text
from ...errors import RetrogradeError
from ...validation import check_int
from .._base import FileSource

__all__ = [
    "HEADER",
    "DemoSource",
    "corpus_text",
    "entries",
    "main",
    "sized_entries",
    "write_corpus",
]

#: the header alone is ~150 bytes; below this the corpus would hold no entry
MIN_SIZE = 1_000
MAX_SIZE = 500_000_000

HEADER = (
    "INVENTED DEMO DATA — not real records.\n"
    "Log book of the imaginary Tidewater Lock & Lamp crew, made up by retrograde's demo "
    "generator (seed {seed})."
)

CREW = ("Oda Pell", "Ruun Sarq", "Ilse Varro", "Tamsin Quell", "Bex Oroyo", "Joss Ferrin")
SITES = ("Heron Lock", "Gull Pier", "Saltreach Weir", "Old Basin", "Lantern Point", "Mudgate")

#: equipment -> (test wording, {symptom: [(cause, repair action, part code), ...]})
EQUIPMENT: dict[str, tuple[str, dict[str, list[tuple[str, str, str]]]]] = {
    "lamp": (
        "light steady for",
        {
            "flickers under load": [
                ("relay contacts worn", "relay replaced", "R-17"),
                ("loose terminal", "terminal tightened", "none"),
            ],
            "dark at dusk": [
                ("fuse blown", "fuse replaced", "F-02"),
                ("photocell fouled", "photocell cleaned", "none"),
            ],
        },
    ),
    "pump": (
        "flow steady for",
        {
            "hums but no flow": [
                ("impeller fouled with weed", "impeller cleared", "none"),
                ("shaft key sheared", "shaft key replaced", "K-40"),
            ],
            "leaks at the gland": [
                ("packing worn", "gland repacked", "P-11"),
                ("sleeve scored", "sleeve replaced", "S-08"),
            ],
        },
    ),
    "gate": (
        "seals dry for",
        {
            "will not close fully": [
                ("silt behind the mitre", "silt dredged", "none"),
                ("hinge pin worn", "hinge pin replaced", "H-23"),
            ],
            "weeps at the sill": [
                ("sill seal split", "sill seal replaced", "G-05"),
                ("timber swollen", "timber planed", "none"),
            ],
        },
    ),
    "winch": (
        "lifts clean for",
        {
            "slips under load": [
                ("pawl spring broken", "pawl spring replaced", "W-31"),
                ("drum greased by mistake", "drum degreased", "none"),
            ],
            "grinds on the turn": [
                ("bearing dry", "bearing greased", "none"),
                ("gear tooth chipped", "gear replaced", "W-09"),
            ],
        },
    ),
    "horn": (
        "sounds clear for",
        {
            "sounds weak": [
                ("reed cracked", "reed replaced", "N-14"),
                ("air line kinked", "air line rerouted", "none"),
            ],
            "silent on the timer": [
                ("timer cam slipped", "timer cam reset", "none"),
                ("solenoid burnt", "solenoid replaced", "N-30"),
            ],
        },
    ),
}


def _check_digit(*numbers: int) -> int:
    """Sum of all decimal digits of ``numbers``, mod 10."""
    return sum(int(digit) for number in numbers for digit in str(number)) % 10


def _entry(rng: random.Random, ticket: int, day: int) -> str:
    """One log entry (several lines, no trailing newline)."""
    crew = rng.sample(CREW, 2)
    reporter = rng.choice(crew)
    kind = rng.choice(sorted(EQUIPMENT))
    test_words, symptoms = EQUIPMENT[kind]
    tag = f"{kind}-{rng.randint(1, 9)}"
    symptom = rng.choice(sorted(symptoms))
    causes = symptoms[symptom]
    true_cause = rng.randrange(len(causes))
    # 1 in 5 entries the crew first blames the other cause; its test fails and is redone
    attempts = [1 - true_cause, true_cause] if rng.random() < 0.2 else [true_cause]
    lines = [
        f"#T{ticket:04d} day {day:03d} {rng.randint(5, 21):02d}:{rng.choice((0, 15, 30, 45)):02d}"
        f" watch: {crew[0]} & {crew[1]}",
        f"FAULT {tag} at {rng.choice(SITES)}: {symptom}. reported by {reporter}.",
    ]
    parts_used = 0
    for cause_index in attempts:
        cause, action, part = causes[cause_index]
        quantity = 0 if part == "none" else rng.randint(1, 3)
        parts_used += quantity
        lines.append(f"CHECK {tag}: {cause}.")
        lines.append(f"REPAIR {tag}: {action} (part {part} x{quantity}).")
        if cause_index == true_cause:
            # the peak is a many-to-one summary of the readings written just before it
            readings = [rng.randint(20, 79) for _ in range(rng.randint(2, 6))]
            lines.append(
                f"TEST {tag}: {test_words} {len(readings)} cycles, readings "
                f"{' '.join(map(str, readings))}, peak {max(readings)}. PASS."
            )
        else:
            lines.append(f"TEST {tag}: {symptom} again. FAIL.")
    lines.append(
        f"CLOSE #T{ticket:04d} by {reporter}. parts {parts_used}. "
        f"check {_check_digit(ticket, day, parts_used)}"
    )
    return "\n".join(lines)


def entries(seed: int) -> Iterator[str]:
    """The endless, deterministic sequence of entries for ``seed``."""
    rng = random.Random(seed)  # Python's Mersenne Twister: same stream on every platform
    ticket, day = 0, 1
    while True:
        ticket += 1
        day += rng.random() < 0.3  # about three entries a day
        yield _entry(rng, ticket, day)


def sized_entries(*, size_bytes: int, seed: int) -> Iterator[str]:
    """The entries :func:`corpus_text` holds: added whole until the corpus (header, entries
    and blank-line separators) has at least ``size_bytes`` UTF-8 bytes."""
    total = len(HEADER.format(seed=seed).encode("utf-8")) + 2
    for entry in entries(seed):
        if total >= size_bytes:
            return
        yield entry
        total += len(entry.encode("utf-8")) + 2  # 2 for the blank-line separator


def corpus_text(*, size_bytes: int, seed: int) -> str:
    """The header paragraph, then whole entries, one paragraph each; ends with a newline."""
    pieces = [HEADER.format(seed=seed), *sized_entries(size_bytes=size_bytes, seed=seed)]
    return "\n\n".join(pieces) + "\n"


def write_corpus(path: str | Path, *, size_bytes: int = 2_000_000, seed: int = 0) -> None:
    """Write the invented corpus to ``path`` atomically (UTF-8, LF line endings)."""
    check_int("source 'demo'", "size_bytes", size_bytes, MIN_SIZE, MAX_SIZE)
    check_int("source 'demo'", "seed", seed, 0)
    atomic_write_text(path, corpus_text(size_bytes=size_bytes, seed=seed))


class DemoSource(FileSource):
    """The invented log-book corpus, generated in memory, one document per entry.

    Parameters
    ----------
    size_bytes : int, 1000 <= size_bytes <= 500_000_000
        Approximate corpus size (whole entries are added until it is reached).
    seed : int >= 0
        Fixes the corpus.

    Examples
    --------
    >>> first = next(DemoSource(size_bytes=1000, seed=0).documents())
    >>> first.where, first.text.splitlines()[0][:6]
    ('invented-demo:entry 0', '#T0001')
    """

    name = "demo"

    def __init__(self, *, size_bytes: int = 2_000_000, seed: int = 0) -> None:
        self.size_bytes = size_bytes
        self.seed = seed
        self._validate_params()

    def _validate_params(self) -> None:
        check_int(self._owner, "size_bytes", self.size_bytes, MIN_SIZE, MAX_SIZE)
        check_int(self._owner, "seed", self.seed, 0)

    def paths(self) -> list[Path]:
        """No files: the corpus is generated from the parameters."""
        return []

    def documents(self) -> Iterator[Document]:
        """One document per entry: the same entries :func:`write_corpus` writes."""
        sized = sized_entries(size_bytes=self.size_bytes, seed=self.seed)
        for doc_id, entry in enumerate(sized):
            n_bytes = len(entry.encode("utf-8"))
            yield Document(doc_id, f"invented-demo:entry {doc_id}", text=entry, n_bytes=n_bytes)


def main(argv: Sequence[str] | None = None) -> int:
    """``python -m retrograde.sources.demo --out PATH [--size-bytes N] [--seed S]``."""
    parser = argparse.ArgumentParser(
        prog="python -m retrograde.sources.demo",
        description="Write the INVENTED demo corpus (not real records) as UTF-8 text.",
    )
    parser.add_argument("--out", required=True, help="file to write (replaced atomically)")
    parser.add_argument("--size-bytes", type=int, default=2_000_000, help="about this many bytes")
    parser.add_argument("--seed", type=int, default=0, help="fixes the corpus")
    args = parser.parse_args(argv)
    try:
        write_corpus(args.out, size_bytes=args.size_bytes, seed=args.seed)
    except RetrogradeError as exc:
        print(f"retrograde: error: {exc}", file=sys.stderr)
        return exc.exit_status
    return 0
