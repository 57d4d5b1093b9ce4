"""Learned tokenizers (bpe, unigram): lossless, deterministic, fitted on training units only,
shared or per order, with results compared in bits per byte (invented receipts)."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
import yaml
from hypothesis import given, settings
from hypothesis import strategies as st

from retrograde.config import compose
from retrograde.data import Document, SequenceSet, prepare_units, tokenizers
from retrograde.errors import ConfigError
from retrograde.stages import fit as fit_stage
from retrograde.stages import reorder as reorder_stage
from retrograde.stages import table as table_stage
from retrograde.stages import units as units_stage

pytest.importorskip("sentencepiece")

from test_records import _host, receipts  # noqa: E402  (shared invented receipts)

LEARNED = ["bpe", "unigram"]
WORDS = ["crumb", "butter", "flour", "sugar", "oven", "batch", "glaze", "proof"]


def corpus(n: int, seed: int) -> str:
    rng = np.random.default_rng(seed)
    return "\n".join(" ".join(rng.choice(WORDS, size=6)) for _ in range(n))


@pytest.fixture(scope="module", params=LEARNED)
def fitted(request):
    return tokenizers.make(request.param, vocab_size=300).fit(corpus(300, 0).split("\n"))


@settings(max_examples=60, deadline=None)
@given(text=st.text(max_size=80).filter(lambda t: "\u2581" not in t))
def test_learned_tokenizers_decode_every_text_back_exactly(fitted, text):
    # Byte fallback: any text, seen characters or not, decodes back to itself.
    ids = fitted.encode(text)
    assert ids.dtype == np.int32 and ((ids >= 0) & (ids < fitted.vocab_size)).all()
    assert fitted.decode(ids) == text
    assert not np.any(ids == fitted.unknown_id)


@pytest.mark.parametrize("name", LEARNED)
def test_learned_tokenizers_are_deterministic_and_survive_save_and_load(name, tmp_path):
    texts = corpus(300, 1).split("\n")
    first = tokenizers.make(name, vocab_size=300).fit(texts)
    second = tokenizers.make(name, vocab_size=300).fit(texts)
    first.save(tmp_path / "a.json")
    second.save(tmp_path / "b.json")
    assert (tmp_path / "a.json").read_bytes() == (tmp_path / "b.json").read_bytes()
    loaded = tokenizers.load(tmp_path / "a.json")
    text = "butter glaze, sugar!"
    assert loaded.encode(text).tolist() == first.encode(text).tolist()
    # Merging works: a frequent word is fewer tokens than its characters.
    assert len(first.encode("butter")) < len("butter")


def test_the_tokenizer_is_fitted_on_the_training_units_only(monkeypatch):
    seen: list[str] = []
    learned = tokenizers.make("bpe", vocab_size=300)
    original = type(learned).fit

    def spy(self, piece_lists):
        texts = [p if isinstance(p, str) else "".join(p) for p in piece_lists]
        seen.extend(texts)
        return original(self, texts)

    monkeypatch.setattr(type(learned), "fit", spy)
    text = corpus(200, 2) + "\nzanzibarzanzibar zanzibarzanzibar"
    prepared = prepare_units([Document(0, "bakery.txt", text=text)], tokenizer=learned, mode="line")
    decoded = [prepared.tokenizer.decode(unit) for unit in prepared.splits["train"]]
    assert sorted(seen) == sorted(decoded)  # exactly the training units' text
    # A word seen only outside train is never learned as a piece: it stays in bytes/pieces.
    if "zanzibarzanzibar zanzibarzanzibar" not in decoded:
        assert len(prepared.tokenizer.encode("zanzibarzanzibar")) > 4


def test_learned_tokenizer_settings_are_checked_before_any_work():
    with pytest.raises(ConfigError, match="per_order.*reorder='characters'"):
        tokenizers.make("bpe", fit="per_order")
    with pytest.raises(ConfigError, match="vocab_size"):
        tokenizers.make("unigram", vocab_size=10)
    with pytest.raises(ConfigError, match="mode 'window'"):
        prepare_units(
            [Document(0, "x.txt", text="abc")],
            tokenizer=tokenizers.make("bpe"),
            mode="window",
            window=4,
        )


# ------------------------------------------------------------------ whole pipeline
def _learned_host(root: Path, fit: str, reorder: str, vocab_size: int = 320) -> Path:
    wdir = _host(root, receipts(300, seed=5))
    (root / "conf/retrograde/source/receipts.yaml").write_text(
        "# @package study.sources.receipts\n"
        "name: records\n"
        f"tokenizer: {{name: bpe, params: {{vocab_size: {vocab_size}, fit: {fit}, "
        f"reorder: {reorder}}}}}\n"
        "params: {files: [data/receipts.jsonl], fields: [time, item, qty, total], nll: nll}\n"
        "deps: [data/receipts.jsonl]\n"
    )
    overrides = ["source=[receipts]", "study=smoke", "study.seeds=[0]", "stats.n_boot=200"]
    plain = compose(root, overrides).to_dict()
    (wdir / "params.yaml").write_text(yaml.safe_dump(plain, sort_keys=False))
    return wdir


def test_tokenizer_settings_are_part_of_the_units_stage_params(tmp_path):
    # The units stage reads study.sources.NAME (dvc.yaml), so a changed setting reruns it
    # and, through its outputs, every cell downstream.
    small = _learned_host(tmp_path / "a", "shared", "tokens", vocab_size=320)
    large = _learned_host(tmp_path / "b", "per_order", "characters", vocab_size=330)
    entries = [
        yaml.safe_load((w / "params.yaml").read_text())["study"]["sources"]["receipts"]
        for w in (small, large)
    ]
    assert entries[0]["tokenizer"]["params"] == {
        "vocab_size": 320,
        "fit": "shared",
        "reorder": "tokens",
    }
    assert entries[1]["tokenizer"]["params"]["fit"] == "per_order"
    assert entries[0]["tokenizer"]["library_version"].startswith("sentencepiece ")


@pytest.mark.slow
def test_per_order_tokenizers_compare_in_bits_per_byte_checked_by_hand(tmp_path):
    wdir = _learned_host(tmp_path / "host", "per_order", "characters")
    assert units_stage.main(["--params", str(wdir), "--source", "receipts"]) == 0
    for order in ("forward", "reverse"):
        argv = ["--params", str(wdir), "--source", "receipts", "--order", order]
        assert reorder_stage.main(argv) == 0
        argv = ["--source", "receipts", "--model", "ngram", "--order", order, "--seed", "0"]
        assert fit_stage.main(["--params", str(wdir), *argv]) == 0
    assert table_stage.main(["--params", str(wdir)]) == 0

    folder = wdir / "data/receipts"
    natural = SequenceSet.load(folder / "units/test")  # code points
    texts = [u.astype("<u4").tobytes().decode("utf-32-le") for u in natural]
    # The reverse order's tokenizer was fitted on the reversed training text only.
    train = SequenceSet.load(folder / "units/train")
    reversed_train = [u[::-1].astype("<u4").tobytes().decode("utf-32-le") for u in train]
    by_hand = tokenizers.make("bpe", vocab_size=320, fit="per_order", reorder="characters")
    by_hand.fit(reversed_train)
    own = tokenizers.load(folder / "orders/reverse/tokenizer.json")
    assert own._get_vocab() == by_hand._get_vocab()

    metrics = json.loads((wdir / "metrics.json").read_text())["receipts"]["ngram"]
    for order in ("forward", "reverse"):
        logprobs = np.load(wdir / f"cells/receipts/ngram/{order}/seed0/test_logprobs.npy")
        # Bits per byte by hand: total NLL in bits over the UTF-8 bytes of the natural text
        # (Python's str.encode counts them), whatever the order's tokenization.
        n_bytes = sum(len(t.encode("utf-8")) for t in texts)
        bits = -logprobs.sum() / math.log(2)
        assert metrics[order]["bits_per_byte"] == pytest.approx(bits / n_bytes, rel=1e-5)
        tokens = SequenceSet.load(folder / f"orders/{order}/test")
        assert metrics[order]["tokens"] == len(tokens.tokens)
        assert metrics[order]["characters"] == sum(len(t) for t in texts)
    report = (wdir / "report.md").read_text()
    assert "compare bits per byte" in report and "fitted on each order's own text" in report


@pytest.mark.dvc
@pytest.mark.slow
def test_a_changed_tokenizer_setting_reruns_the_cells_of_its_source(tmp_path):
    # DVC's own "Running stage" lines are the outside reference for what ran.
    import contextlib
    import io

    from _host_fixtures import dvc_events, new_pipeline_host
    from retrograde.cli import main

    host = new_pipeline_host(tmp_path / "host")
    base = [
        "study=smoke",
        "study.seeds=[0]",
        "study.sources.corpus.tokenizer.name=bpe",
        "+study.sources.corpus.tokenizer.params.vocab_size=400",
    ]

    def run(*extra: str) -> set[str]:
        with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()):
            assert main(["run", "--dir", str(host), *base, *extra]) == 0
        return {s for s in dvc_events(host)["ran"] if s.startswith(("fit@", "units"))}

    cells = {"fit@corpus-ngram-forward-0", "fit@corpus-ngram-reverse-0"}
    assert cells <= run()
    assert run() == set()  # nothing changed: everything cached
    assert cells <= run(
        "+study.sources.corpus.tokenizer.params.fit=per_order",
        "+study.sources.corpus.tokenizer.params.reorder=characters",
    )
