"""The invented demo corpus: deterministic, labelled as invented, with real sequential structure."""

import re
from pathlib import Path

import pytest

from retrograde.errors import ConfigError
from retrograde.sources import demo, make

DOCS = Path(__file__).resolve().parents[1] / "docs" / "sources.md"
ENTRY = re.compile(
    r"#T(?P<ticket>\d{4,}) day (?P<day>\d{3}) \d\d:\d\d watch: (?P<crew>.+)\n"
    r"FAULT (?P<tag>\w+-\d) at [^:]+: (?P<symptom>[^.]+)\. reported by (?P<reporter>[^.]+)\.\n"
    r"(?P<work>(?:CHECK .+\nREPAIR .+\nTEST .+\n)+)"
    r"CLOSE #T(?P<ticket2>\d{4,}) by (?P<reporter2>[^.]+)\. parts (?P<parts>\d+)\. check (?P<check>\d)$"
)


def test_the_corpus_is_deterministic_for_a_seed():
    first = demo.corpus_text(size_bytes=50_000, seed=3)
    assert first == demo.corpus_text(size_bytes=50_000, seed=3)
    assert first != demo.corpus_text(size_bytes=50_000, seed=4)


def test_the_corpus_and_its_documentation_say_it_is_invented(tmp_path):
    path = tmp_path / "demo.txt"
    demo.write_corpus(path, size_bytes=5_000, seed=0)
    assert path.read_text(encoding="utf-8").startswith("INVENTED DEMO DATA — not real records.")
    assert "INVENTED DEMO DATA — not real records" in DOCS.read_text(encoding="utf-8")
    assert "INVENTED" in (demo.__doc__ or "")
    first = next(make("demo", size_bytes=1_000).documents())
    assert first.where.startswith("invented-demo:")


def test_the_size_parameter_scales_the_corpus_by_whole_entries():
    for size in (10_000, 200_000):
        text = demo.corpus_text(size_bytes=size, seed=0)
        assert size <= len(text.encode()) < size + 1_000  # at most one entry more


def test_default_size_corpus_reaches_two_megabytes():
    # Speed is measured in benchmarks/, never asserted in a test.
    text = demo.corpus_text(size_bytes=2_000_000, seed=1)
    assert len(text) >= 2_000_000


def test_entries_carry_causes_before_effects_and_agreeing_distant_parts():
    documents = list(make("demo", size_bytes=300_000, seed=2).documents())
    parts_by_cause = {
        cause: part
        for _, symptoms in demo.EQUIPMENT.values()
        for causes in symptoms.values()
        for cause, _, part in causes
    }
    failures = 0
    for document in documents:
        match = ENTRY.fullmatch(document.text)
        assert match, document.text
        assert match["ticket"] == match["ticket2"]  # ticket echoed at the end
        assert match["reporter"] == match["reporter2"] and match["reporter"] in match["crew"]
        # the check digit is the digit sum of ticket, day and part count, mod 10
        digits = match["ticket"] + str(int(match["day"])) + match["parts"]
        assert int(match["check"]) == sum(map(int, digits)) % 10
        work = match["work"].splitlines()
        quantities = 0
        for check, repair, test in zip(work[::3], work[1::3], work[2::3], strict=True):
            cause = check.split(": ", 1)[1].rstrip(".")
            assert f"(part {parts_by_cause[cause]} x" in repair  # the part fits the cause
            assert all(
                line.split()[1].rstrip(":") == match["tag"] for line in (check, repair, test)
            )
            quantities += int(re.search(r" x(\d)\)", repair)[1])
            if test.endswith("PASS."):
                cycles, readings, peak = re.search(
                    r" (\d) cycles, readings ([\d ]+), peak (\d+)\. PASS\.$", test
                ).groups()
                values = [int(v) for v in readings.split()]
                assert len(values) == int(cycles) and max(values) == int(peak)
        assert quantities == int(match["parts"])
        assert work[-1].endswith("PASS.") and all(t.endswith("FAIL.") for t in work[2:-1:3])
        failures += len(work) > 3
    assert 0.1 < failures / len(documents) < 0.3  # about one entry in five needs a second try


def test_the_source_yields_the_same_entries_the_written_file_holds(tmp_path):
    path = tmp_path / "demo.txt"
    demo.write_corpus(path, size_bytes=20_000, seed=5)
    from_file = [d.text for d in make("text", files=str(path), split="paragraph").documents()]
    from_source = [d.text for d in make("demo", size_bytes=20_000, seed=5).documents()]
    assert from_file[0].startswith("INVENTED DEMO DATA")
    assert from_file[1:] == from_source
    assert make("demo").paths() == []


def test_the_module_command_writes_the_corpus_and_refuses_a_bad_size(tmp_path, capsys):
    path = tmp_path / "out" / "demo.txt"
    assert demo.main(["--out", str(path), "--size-bytes", "3000", "--seed", "2"]) == 0
    assert path.read_text(encoding="utf-8") == demo.corpus_text(size_bytes=3000, seed=2)
    assert demo.main(["--out", str(path), "--size-bytes", "0"]) == 2
    assert "parameter size_bytes=0 is invalid" in capsys.readouterr().err


def test_invalid_parameters_are_refused():
    with pytest.raises(ConfigError, match="source 'demo': parameter seed=-1 is invalid"):
        make("demo", seed=-1)
