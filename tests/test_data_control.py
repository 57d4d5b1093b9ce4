"""Data control: a test split the user fixes (a file of unit ids, or a JSONL split field)
and a seeded cap on the units for quick studies."""

from __future__ import annotations

import hashlib
import json
import shutil
from importlib import resources
from pathlib import Path

import numpy as np
import pytest

from retrograde.config import compose
from retrograde.data import (
    Document,
    prepare_units,
    read_unit_ids,
    split_with_given,
    subsample,
    tokenizers,
)
from retrograde.errors import ConfigError, DataError
from retrograde.sources import make, source_units
from retrograde.stages import units as units_stage

LINES = [f"line number {i} of the invented log" for i in range(60)]


def _documents(path: str = "data/log.txt") -> list[Document]:
    # One document per line, as the text source with split="line" names them: "file:line".
    return [Document(i, f"{path}:{i + 1}", text=line) for i, line in enumerate(LINES)]


def _decoded(prepared, split: str) -> list[str]:
    tokenizer = prepared.tokenizer
    return [tokenizer.decode(unit) for unit in prepared.splits[split]]


# ----------------------------------------------------------------------------- the rules
def test_units_with_a_given_split_keep_it_and_the_rest_split_train_valid_by_the_hash():
    keys = [f"unit {i}".encode() for i in range(400)]
    given = np.full(400, -1)
    given[:50] = 2
    splits = split_with_given(keys, given, (0.6, 0.2, 0.2), salt="s")
    assert (splits[:50] == 2).all() and (splits[50:] != 2).all()
    # Reference: the salted blake2b of the docs, recomputed with hashlib: u < 0.6 / 0.8.
    salt_key = hashlib.blake2b(b"s", digest_size=32).digest()
    for key, split in zip(keys[50:], splits[50:], strict=True):
        digest = hashlib.blake2b(key, digest_size=8, key=salt_key).digest()
        uniform = (int.from_bytes(digest, "little") >> 11) * 2.0**-53
        assert split == (0 if uniform < 0.75 else 1)


def test_a_cap_keeps_a_seeded_sample_in_natural_order():
    kept = subsample(1000, 100, seed=3)
    assert len(kept) == 100 and len(set(kept.tolist())) == 100
    assert kept.tolist() == sorted(kept.tolist())
    # Reference: numpy's Generator.choice without replacement is the documented draw.
    expected = np.sort(np.random.default_rng(3).choice(1000, size=100, replace=False))
    assert kept.tolist() == expected.tolist()
    assert subsample(1000, 100, seed=4).tolist() != kept.tolist()
    assert subsample(50, 100) is None and subsample(50, None) is None


# ------------------------------------------------------------------ prepare_units / sources
def test_listed_unit_ids_are_exactly_the_test_split():
    listed = {f"data/log.txt:{n}": f"ids.txt:{k + 1}" for k, n in enumerate((3, 10, 11, 40))}
    prepared = prepare_units(
        _documents(), tokenizer=tokenizers.make("chars"), mode="line", test_ids=listed
    )
    assert sorted(_decoded(prepared, "test")) == sorted(LINES[n - 1] for n in (3, 10, 11, 40))
    rest = _decoded(prepared, "train") + _decoded(prepared, "valid")
    assert sorted(rest) == sorted(set(LINES) - {LINES[n - 1] for n in (3, 10, 11, 40)})
    assert prepared.summary()["fixed_splits"] is True


def test_an_unknown_unit_id_is_one_line_naming_where_it_was_listed():
    with pytest.raises(DataError) as info:
        prepare_units(
            _documents(),
            tokenizer=tokenizers.make("chars"),
            test_ids={"data/log.txt:3": "ids.txt:1", "data/log.txt:999": "ids.txt:2"},
        )
    message = str(info.value)
    assert message.startswith("ids.txt:2: unit id 'data/log.txt:999' matches no document")
    assert "'data/log.txt:1'" in message and "\n" not in message


def test_a_cap_samples_units_before_the_vocabulary_is_fitted():
    prepared = prepare_units(
        _documents(), tokenizer=tokenizers.make("chars"), max_units=20, subsample_seed=1
    )
    kept = [LINES[i] for i in subsample(len(LINES), 20, seed=1)]
    all_units = sum((_decoded(prepared, s) for s in ("train", "valid", "test")), [])
    assert sorted(all_units) == sorted(kept)
    assert prepared.summary()["units_before_cap"] == 60
    train_characters = set("".join(_decoded(prepared, "train")))
    assert prepared.vocab_size == len(train_characters) + 1  # fitted on the kept train units


def _jsonl(tmp_path: Path, records: list[dict]) -> Path:
    path = tmp_path / "records.jsonl"
    path.write_text("".join(json.dumps(r) + "\n" for r in records))
    return path


def test_a_jsonl_split_field_fixes_every_record_split(tmp_path):
    names = ["train", "valid", "test"]
    records = [{"text": f"record {i}", "split": names[i % 3], "id": f"r{i}"} for i in range(30)]
    source = make("jsonl", files=str(_jsonl(tmp_path, records)), split_field="split")
    made = source_units(
        source, fractions=(0.8, 0.1, 0.1), salt="x", tokenizer=tokenizers.make("chars")
    )
    for split in names:
        decoded = [made.tokenizer.decode(u) for u in made.splits[split]]
        assert sorted(decoded) == sorted(r["text"] for r in records if r["split"] == split)


def test_a_jsonl_id_field_names_units_for_a_file_of_test_ids(tmp_path):
    records = [{"text": f"record {i}", "id": i} for i in range(30)]
    source = make("jsonl", files=str(_jsonl(tmp_path, records)), id_field="id")
    made = source_units(
        source,
        fractions=(0.8, 0.1, 0.1),
        salt="x",
        tokenizer=tokenizers.make("chars"),
        test_ids={"4": "ids:1", "17": "ids:2"},
    )
    assert sorted(made.tokenizer.decode(u) for u in made.splits["test"]) == [
        "record 17",
        "record 4",
    ]


@pytest.mark.parametrize(
    ("record", "expected"),
    [
        ({"text": "a", "split": "tset"}, "split field 'split' is \"tset\"; allowed: 'train'"),
        ({"text": "a"}, "split field 'split' is null; allowed"),
    ],
)
def test_a_bad_split_value_is_one_line_naming_file_and_line(tmp_path, record, expected):
    path = _jsonl(tmp_path, [{"text": "ok", "split": "train"}, record])
    source = make("jsonl", files=str(path), split_field="split")
    with pytest.raises(DataError) as info:
        list(source.documents())
    assert str(info.value).startswith(f"{path}:2: ") and expected in str(info.value)


def test_a_calibration_source_refuses_test_ids_and_takes_a_cap():
    source = make("markov")
    with pytest.raises(DataError, match="a file of test ids needs a file source"):
        source_units(source, fractions=(0.8, 0.1, 0.1), salt="x", test_ids={"0": "ids:1"})
    made = source_units(source, fractions=(0.8, 0.1, 0.1), salt="x", n_units=200, max_units=50)
    assert sum(len(units) for units in made.splits.values()) == 50


# ---------------------------------------------------------------------- the ids file
@pytest.mark.parametrize(
    ("content", "expected"),
    [
        (None, "file of test unit ids not found"),
        (b"\n# only a comment\n\n", "lists no unit id"),
        (b"data/log.txt:1\n\xff\n", "invalid UTF-8 at byte offset 15"),
    ],
)
def test_a_bad_ids_file_is_one_line_naming_it(tmp_path, content, expected):
    path = tmp_path / "ids.txt"
    if content is not None:
        path.write_bytes(content)
    with pytest.raises(DataError) as info:
        read_unit_ids(path, "conf/ids.txt")
    assert str(info.value).startswith("conf/ids.txt: ") and expected in str(info.value)


def test_the_ids_file_skips_blank_and_comment_lines_and_names_each_line():
    path = Path(__file__).parent / "__ids_probe.txt"
    try:
        path.write_text("# held-out\n  a:1  \n\nb:2\na:1\n")
        assert read_unit_ids(path, "ids.txt") == {"a:1": "ids.txt:2", "b:2": "ids.txt:4"}
    finally:
        path.unlink()


# ----------------------------------------------------------------- config and the stage
@pytest.fixture
def host(tmp_path: Path) -> Path:
    root = tmp_path / "host"
    with resources.as_file(resources.files("retrograde") / "conf") as conf:
        shutil.copytree(conf, root / "conf" / "retrograde")
    (root / "data").mkdir()
    (root / "data" / "corpus.txt").write_text("\n".join(LINES) + "\n")
    (root / "data" / "test_ids.txt").write_text("data/corpus.txt:2\ndata/corpus.txt:7\n")
    return root


def test_test_ids_and_the_cap_are_in_the_composed_params_and_the_ids_file_is_a_dep(host):
    split = "study.sources.corpus.split.test_ids=data/test_ids.txt"
    config = compose(host, [split, "study.sources.corpus.subsample.max_units=30"])
    spec = config.study.sources["corpus"]
    assert spec.split.test_ids == "data/test_ids.txt"
    assert spec.deps == ["data/corpus.txt", "data/test_ids.txt"]  # DVC reruns units on edit
    plain = config.to_dict()["study"]["sources"]["corpus"]
    assert plain["subsample"] == {"max_units": 30, "seed": 0}
    # A different cap or seed changes the units stage's params: DVC reruns it (a params
    # change reruns a stage; DVC's documented behaviour).
    other = compose(host, [split, "study.sources.corpus.subsample.seed=1"])
    assert other.to_dict()["study"]["sources"]["corpus"] != plain


@pytest.mark.parametrize(
    ("overrides", "expected"),
    [
        (["study.sources.corpus.subsample.max_units=0"], "subsample: parameter max_units=0"),
        (["study.sources.corpus.subsample.seed=-1"], "subsample: parameter seed=-1"),
        (
            ["source=[markov]", "+study.sources.markov.split.test_ids=data/test_ids.txt"],
            "study.sources.markov.split.test_ids: a calibration source generates its units",
        ),
        (
            ["study.sources.corpus.split.test_ids=../outside.txt"],
            "lies outside the host repository",
        ),
    ],
)
def test_bad_data_control_values_are_one_line(host, overrides, expected):
    with pytest.raises((ConfigError, DataError)) as info:
        compose(host, overrides)
    assert expected in str(info.value) and "\n" not in str(info.value)


def test_the_units_stage_puts_the_listed_lines_in_test_and_refuses_an_unknown_id(host, capsys):
    wdir = host / "pipelines" / "retrograde"
    wdir.mkdir(parents=True)
    import yaml

    config = compose(host, ["study.sources.corpus.split.test_ids=data/test_ids.txt"])
    (wdir / "params.yaml").write_text(yaml.safe_dump(config.to_dict(), sort_keys=False))
    assert units_stage.main(["--params", str(wdir), "--source", "corpus"]) == 0
    folder = wdir / "data/corpus/units"
    tokenizer = tokenizers.load(folder / "tokenizer.json")
    from retrograde.data import SequenceSet

    test = [tokenizer.decode(u) for u in SequenceSet.load(folder / "test")]
    assert sorted(test) == sorted([LINES[1], LINES[6]])
    (host / "data" / "test_ids.txt").write_text("data/corpus.txt:2\ndata/corpus.txt:700\n")
    shutil.rmtree(folder)
    assert units_stage.main(["--params", str(wdir), "--source", "corpus"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1
    assert "data/test_ids.txt:2: unit id 'data/corpus.txt:700' matches no document" in err
    assert not folder.exists()  # nothing half-written


def test_a_line_unit_is_named_by_its_own_file_line_even_inside_a_paragraph(tmp_path):
    path = tmp_path / "log.txt"
    path.write_text("alpha one\nalpha noe\n\nbeta one\r\nbeta noe\n")
    source = make("text", files=str(path), split="paragraph")
    # Reference: Python's enumerate over the file's lines numbers them from 1.
    lines = path.read_text().splitlines()
    wanted = {f"{path}:{n}": "ids:1" for n, line in enumerate(lines, 1) if "noe" in line}
    made = source_units(
        source,
        fractions=(0.8, 0.1, 0.1),
        salt="x",
        tokenizer=tokenizers.make("chars"),
        mode="line",
        test_ids=wanted,
    )
    assert sorted(made.tokenizer.decode(u) for u in made.splits["test"]) == [
        "alpha noe",
        "beta noe",
    ]
