"""``retrograde rank`` in a real git + DVC host, on records whose best order is known.

Each record is ``(y, x)``: ``x`` uniform in {0,1}^12 and ``y = A x`` over GF(2) with ``A``
sparse (every row of the banded factor holds at most two ones, shuffled by random
permutations; the ``linear_gf2`` calibration source builds it) and its inverse dense. Read
as stored, a model must first pay for ``y`` and then recover ``x = A^-1 y``, a parity of
many bits; read with ``x`` first, each ``y`` bit is the parity of two earlier bits, which a
window MLP learns. So the orders that put ``x`` first (``rotate`` by 12, ``reverse``) must
beat the stored order, and those that keep ``y`` first (the block reversals) must not be
the recommendation. (Fact of the construction: the joint entropy is 12 bits in every
order; only learnability differs.)
"""

from __future__ import annotations

import json
import textwrap
from pathlib import Path

import numpy as np
import pytest

from _host_fixtures import new_host, new_pipeline_host, sh, snapshot
from retrograde.cli import main
from retrograde.host import rank_orders
from retrograde.sources import make

pytestmark = pytest.mark.dvc

N_BITS = 12
OVERRIDES = ["source=[records]", "+rank=search"]
X_FIRST = {f"rotate_shift{N_BITS}", "reverse"}


def _rank_yaml(extra: str = "") -> str:
    n = N_BITS
    return textwrap.dedent(f"""\
        # @package rank
        source: records
        model: mlp
        proxy:
          family: mlp
          params: {{window: {2 * n}, hidden: 32, epochs: 6, lr: 0.01, progress: false}}
        space:
          rotate: {{shift: [{n}]}}
          reverse: {{}}
          block_reverse: {{size: [2, {n}]}}
        {extra}
        top_k: 1
        screening: {{eta: 2, min_fraction: 0.5, seed: 0}}
        """)


def _records_host(root: Path) -> Path:
    host = new_host(root / "host")
    n = N_BITS
    source = make("linear_gf2", n_bits=n, nonzeros=1, structure="banded", matrix_seed=0)
    units = source.generate(1200, 0).tokens.reshape(1200, 2 * n)  # rows x ‖ y
    (host / "data").mkdir()
    np.save(host / "data" / "records.npy", np.concatenate([units[:, n:], units[:, :n]], axis=1))
    assert main(["init", "--dir", str(host)]) == 0
    conf = host / "conf" / "retrograde"
    (conf / "source" / "records.yaml").write_text(
        textwrap.dedent("""\
            # @package study.sources.records
            name: tokens
            params: {files: [data/records.npy], vocab_size: 2}
            deps: [data/records.npy]
            tokenizer: null
            units: {mode: document}
            """)
    )
    (conf / "study" / "default.yaml").write_text(
        textwrap.dedent(f"""\
            # @package study
            orders:
              forward: {{name: forward}}
            models:
              mlp: {{family: mlp, params: {{window: {2 * n}, hidden: 64, epochs: 12, lr: 0.01, progress: false}}}}
            seeds: [0]
            reference_order: forward
            sweeps: {{}}
            """)
    )
    (conf / "rank").mkdir()
    (conf / "rank" / "search.yaml").write_text(_rank_yaml())
    sh(["git", "add", "-A"], host)
    sh(["git", "commit", "-q", "-m", "records and a rank search"], host)
    return host


@pytest.mark.slow
def test_rank_recommends_an_x_first_order_and_widening_fits_only_new_candidates(tmp_path, capsys):
    host = _records_host(tmp_path)
    capsys.readouterr()  # init's report
    status = main(["rank", "--dir", str(host), "--format", "json", *OVERRIDES])
    out, err = capsys.readouterr()
    assert status == 0, err
    ranking = json.loads(out)
    assert [tuple(entry) for entry in ranking] == [
        ("order", "gap_pct", "gap_pct_low", "gap_pct_high", "significant")
    ]
    best = ranking[0]
    assert best["order"] in X_FIRST
    assert best["significant"] and best["gap_pct_high"] < 0 < -best["gap_pct"]
    assert f"Train in order `{best['order']}`" in err
    rank_dir = host / "pipelines" / "retrograde" / "rank"
    written = json.loads((rank_dir / "rank.json").read_text())
    assert written["ranking"] == ranking
    assert (
        written["screening"]["rounds"][0]["train_units"]
        < written["screening"]["rounds"][-1]["train_units"]
    )
    assert (rank_dir / "rank.png").read_bytes()[:4] == b"\x89PNG"
    # The study's own results and params are left as they were: no table, no candidates.
    pipeline = host / "pipelines" / "retrograde"
    assert not (pipeline / "metrics.json").exists()
    assert best["order"] not in (pipeline / "params.yaml").read_text()

    # Widen the space: earlier screening fits come from the cache, and no cell fitted
    # before is fitted again (only a new candidate's cells could run).
    (host / "conf" / "retrograde" / "rank" / "search.yaml").write_text(
        _rank_yaml("  stride: {step: [2]}")
    )
    cache = host / "pipelines" / "retrograde" / "screen"
    cached = set(cache.glob("*.json"))
    assert cached
    again = rank_orders(host, OVERRIDES)
    assert len(again.result["candidates"]) == 5
    assert cached < set(cache.glob("*.json"))  # the new candidate's fits were added
    fitted = [stage for stage in again.events["ran"] if stage.startswith("fit@")]
    assert all("stride_step2" in stage for stage in fitted), fitted
    assert again.result["ranking"][0]["order"] in X_FIRST


@pytest.mark.parametrize(
    ("block", "expected"),
    [
        ("space: {bogus: {}}\ntop_k: 1", "rank.space.bogus: unknown order 'bogus'"),
        ("space: {reverse: {}, stride: {step: [2]}}\ntop_k: 3", "rank.top_k=3 is more than"),
        ("space: {reverse: {}}\nmodel: nope", "rank.model='nope'"),
        ("space: {reverse: {}}\ntop_kk: 1", "unknown config key 'rank.top_kk'"),
    ],
)
def test_a_bad_rank_block_is_one_line_exit_2_and_writes_nothing(tmp_path, capsys, block, expected):
    host = new_pipeline_host(tmp_path / "host")
    (host / "conf" / "retrograde" / "rank").mkdir()
    text = "# @package rank\nsource: corpus\nmodel: ngram\n" + block + "\n"
    if "model: nope" in block:
        text = text.replace("model: ngram\n", "")
    (host / "conf" / "retrograde" / "rank" / "search.yaml").write_text(text)
    capsys.readouterr()
    before = snapshot(host)
    status = main(["rank", "--dir", str(host), "+rank=search"])
    out, err = capsys.readouterr()
    assert status == 2
    assert out == ""
    assert len(err.strip().splitlines()) == 1, err
    assert expected in err
    assert snapshot(host) == before


@pytest.mark.parametrize(
    ("block", "expected"),
    [
        ("space: {reverse: {}, stride: {step: [2]}}\ntop_k: 3", "rank.top_k=3 is more than"),
        ("space: {reverse: {}}\ntop_kk: 1", "unknown config key 'rank.top_kk'"),
    ],
)
def test_check_validates_the_rank_block_as_rank_would(tmp_path, capsys, block, expected):
    host = new_pipeline_host(tmp_path / "host")
    (host / "conf" / "retrograde" / "rank").mkdir()
    text = "# @package rank\nsource: corpus\nmodel: ngram\n" + block + "\n"
    (host / "conf" / "retrograde" / "rank" / "search.yaml").write_text(text)
    capsys.readouterr()
    before = snapshot(host)
    status = main(["check", "--dir", str(host), "+rank=search"])
    out, err = capsys.readouterr()
    assert (status, out) == (2, "")
    assert len(err.strip().splitlines()) == 1 and expected in err, err
    assert snapshot(host) == before  # refused before check writes params.yaml
    # a good block: one line naming the candidates, and the same list as rank --dry
    (host / "conf" / "retrograde" / "rank" / "search.yaml").write_text(
        "# @package rank\nsource: corpus\nmodel: ngram\nspace: {reverse: {}, rotate: {shift: [1, 2]}}\ntop_k: 2\n"
    )
    assert main(["check", "--dir", str(host), "--json", "+rank=search"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["rank"]["candidates"] == ["reverse", "rotate_shift1", "rotate_shift2"]
    assert report["rank"]["top_k"] == 2
    assert main(["check", "--dir", str(host), "+rank=search"]) == 0
    assert "rank: 3 candidate orders for source 'corpus'" in capsys.readouterr().out


def test_rank_without_a_rank_block_says_how_to_add_one(tmp_path, capsys):
    host = new_pipeline_host(tmp_path / "host")
    capsys.readouterr()
    assert main(["rank", "--dir", str(host)]) == 2
    assert "+rank=NAME" in capsys.readouterr().err


@pytest.mark.slow
def test_rank_on_a_symmetric_truth_says_no_order_is_distinguishable(tmp_path, capsys):
    # A stationary Markov chain read backwards is again a Markov chain of the same order
    # and entropy rate (time reversal of a stationary chain; fact of the trade, no source),
    # so an n-gram model of that order fits both directions alike.
    host = new_host(tmp_path / "host")
    assert main(["init", "--dir", str(host)]) == 0
    (host / "conf" / "retrograde" / "rank").mkdir()
    (host / "conf" / "retrograde" / "rank" / "symmetric.yaml").write_text(
        textwrap.dedent("""\
            # @package rank
            source: markov
            model: ngram
            proxy: {family: ngram, params: {order: 2}}
            space: {reverse: {}}
            top_k: 1
            """)
    )
    capsys.readouterr()
    argv = ["rank", "--dir", str(host), "--format", "json", "source=[markov]", "+rank=symmetric"]
    assert main(argv) == 0
    out, err = capsys.readouterr()
    ranking = json.loads(out)
    assert [entry["order"] for entry in ranking] == ["reverse"]
    assert not any(entry["significant"] for entry in ranking)
    assert "no order is distinguishable from the reference" in err


def test_rank_dry_lists_the_candidates_and_writes_nothing(tmp_path, capsys):
    host = new_pipeline_host(tmp_path / "host")
    (host / "conf" / "retrograde" / "rank").mkdir()
    (host / "conf" / "retrograde" / "rank" / "search.yaml").write_text(
        "# @package rank\nsource: corpus\nmodel: ngram\n"
        "space: {reverse: {}, block_reverse: {size: [2, 4]}}\ntop_k: 2\n"
    )
    capsys.readouterr()
    before = snapshot(host)
    assert main(["rank", "--dir", str(host), "--dry", "+rank=search"]) == 0
    out = capsys.readouterr().out
    assert out.startswith("3 candidates for source 'corpus'; the best 2 by ngram")
    assert "  block_reverse_size4: block_reverse {'size': 4}" in out
    assert snapshot(host) == before
