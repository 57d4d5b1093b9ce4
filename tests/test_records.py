"""Records with named fields: the ``records`` source, the ``fields`` order, per-unit spans,
span differences with intervals, and floors carried by the records (invented receipts)."""

from __future__ import annotations

import json
import math
import shutil
from importlib import resources
from pathlib import Path

import numpy as np
import pytest
import yaml
from hypothesis import given, settings
from hypothesis import strategies as st

from retrograde import SequenceSet, orders, sources, stats
from retrograde.config import compose
from retrograde.data import FIELD_SEPARATOR, Ragged, tokenizers
from retrograde.errors import ConfigError, DataError
from retrograde.stages import fit as fit_stage
from retrograde.stages import reorder as reorder_stage
from retrograde.stages import table as table_stage
from retrograde.stages import units as units_stage

#: an invented bakery's price list (item -> price in cents)
PRICES = {"bun": 120, "tart": 340, "loaf": 410, "scone": 230, "roll": 90, "pie": 560}
#: receipts are stamped between 08:00 and 19:59: 12 hours x 60 minutes
N_TIMES = 720
FIELDS = ["time", "item", "qty", "total"]


def receipts(n: int, seed: int) -> list[dict]:
    """Invented receipts: time, item and quantity (1..9) drawn uniformly, total = qty x price.

    The total is determined by the rest, so a receipt's exact probability is
    1/720 x 1/6 x 1/9 and its NLL is ln(720 * 6 * 9) nats.
    """
    rng = np.random.default_rng(seed)
    items = list(PRICES)
    rows = []
    for _ in range(n):
        minute = int(rng.integers(N_TIMES))
        item, qty = items[rng.integers(len(items))], int(rng.integers(1, 10))
        total = qty * PRICES[item]
        rows.append(
            {
                "time": f"{8 + minute // 60:02d}:{minute % 60:02d}",
                "item": item,
                "qty": qty,
                "total": f"{total // 100}.{total % 100:02d}",
                "nll": math.log(N_TIMES * len(PRICES) * 9),
            }
        )
    return rows


def write_jsonl(path: Path, rows: list[dict]) -> Path:
    path.write_text("".join(json.dumps(row) + "\n" for row in rows))
    return path


def bound(fields, natural, separator=0, reverse=()):
    return orders.make(
        "fields", fields=fields, reverse=list(reverse), natural=natural, separator=separator
    )


# ------------------------------------------------------------------------- the order
# Records of 1..4 fields; field tokens drawn from 1..5 (0 is the separator).
field_strategy = st.lists(st.integers(1, 5), min_size=0, max_size=6)
record_strategy = st.integers(1, 4).flatmap(
    lambda n: st.tuples(st.lists(field_strategy, min_size=n, max_size=n), st.permutations(range(n)))
)


def _join(fields: list[list[int]]) -> list[int]:
    out: list[int] = []
    for k, field in enumerate(fields):
        out += ([0] if k else []) + field
    return out


@settings(max_examples=80, deadline=None)
@given(record=record_strategy, reverse_mask=st.lists(st.booleans(), min_size=4, max_size=4))
def test_fields_order_matches_python_list_permutation_and_round_trips(record, reverse_mask):
    fields, permutation = record
    natural = [f"f{k}" for k in range(len(fields))]
    reverse = [name for name, r in zip(natural, reverse_mask, strict=False) if r]
    order = bound([natural[k] for k in permutation], natural, reverse=reverse)
    x = np.array(_join(fields), dtype=np.int32)
    # Reference: the same record rebuilt with Python list indexing and reversed().
    expected = _join(
        [list(reversed(fields[k])) if natural[k] in reverse else fields[k] for k in permutation]
    )
    assert order.apply(x).tolist() == expected
    p = order.positions(x)
    assert sorted(p.tolist()) == list(range(len(x)))  # a permutation of the positions
    assert np.array_equal(order.invert(order.apply(x)), x)


def test_fields_order_passes_the_round_trip_check_on_a_set_and_leaves_non_records_alone():
    order = bound(["c", "a", "b"], ["a", "b", "c"], reverse=["a"])
    units = SequenceSet.from_list([[1, 2, 0, 3, 0, 4, 5], [0, 0], [7, 0, 8], [9]])
    orders.verify_bijection(order, units, order_name="fields")
    out = order.apply_set(units)
    assert out[0].tolist() == [4, 5, 0, 2, 1, 0, 3]
    assert out[1].tolist() == [0, 0]  # three empty fields: still a record
    assert out[2].tolist() == [7, 0, 8]  # two fields, not three: left as it is


def test_spans_of_a_field_permutation_map_back_to_the_natural_fields():
    # Span labels of the natural units, read through the order's positions, give the
    # labels in the model's reading order: total first, then item, then qty.
    units = SequenceSet.from_list([[1, 2, 0, 3, 0, 4, 5, 6], [7, 0, 8, 8, 0, 9]])
    labels = sources.field_span_ids(units, 0, 3, "test")
    order = bound(["total", "item", "qty"], ["item", "qty", "total"])
    read = labels[order.positions_set(units)]
    assert read.tolist() == [2, 2, 2, 3, 0, 0, 3, 1] + [2, 3, 0, 3, 1, 1]


def test_fields_order_refuses_unknown_names_and_unbound_use():
    with pytest.raises(ConfigError, match="must name every field"):
        bound(["a", "x"], ["a", "b"])
    with pytest.raises(ConfigError, match="reverse=.*'x'"):
        bound(["a", "b"], ["a", "b"], reverse=["x"])
    with pytest.raises(ConfigError, match="records sources only"):
        orders.make("fields", fields=["a"]).for_source({"source": "corpus"})
    with pytest.raises(ConfigError, match="natural= and separator="):
        orders.make("fields", fields=["a"]).apply(np.array([1, 2]))


# ------------------------------------------------------------------------ the source
def test_records_source_joins_fields_with_one_separator_token_for_every_tokenizer(tmp_path):
    path = write_jsonl(tmp_path / "r.jsonl", receipts(40, seed=0))
    for name in ("chars", "bytes", "words"):
        source = sources.make("records", files=str(path), fields=FIELDS)
        made = sources.source_units(
            source, fractions=[0.5, 0.0, 0.5], salt="s", tokenizer=tokenizers.make(name)
        )
        separator = made.info["records"]["separator_id"]
        assert made.tokenizer.decode([separator]) == FIELD_SEPARATOR
        test = made.splits["test"]
        # Reference: each unit decodes to its record's fields joined as str.join would.
        counts = np.bincount(test.row_ids(), weights=test.tokens == separator)
        assert counts.tolist() == [3.0] * len(test)
        labels = made.span_ids["test"]
        assert labels.shape == test.tokens.shape
        assert set(labels[test.tokens == separator].tolist()) == {4}


@pytest.mark.parametrize(
    ("line", "message"),
    [
        ('{"item": "bun", "qty": 1}', r"r\.jsonl:2: field 'total' is missing \(keys: item, qty\)"),
        ('{"item": "bun", "qty": [1], "total": "1"}', r"r\.jsonl:2: field 'qty' must be a string"),
        ('{"item": "b\\u001fn", "qty": 1, "total": "1"}', r"r\.jsonl:2: field 'item' holds"),
        ('["bun"]', r"r\.jsonl:2: expected a JSON object"),
    ],
)
def test_a_bad_record_is_one_line_naming_file_and_line(tmp_path, line, message):
    path = tmp_path / "r.jsonl"
    path.write_text('{"item": "tea", "qty": 2, "total": "4.00"}\n' + line + "\n")
    source = sources.make("records", files=str(path), fields=["item", "qty", "total"])
    with pytest.raises(DataError, match=message):
        list(source.documents())


@pytest.mark.parametrize(
    ("name", "params"), [("records", {"fields": ["a"]}), ("jsonl", {"field": "a"})]
)
def test_a_file_without_records_is_one_line_naming_it(tmp_path, name, params):
    path = tmp_path / "empty.jsonl"
    path.write_text("\n  \n")  # blank lines only
    source = sources.make(name, files=str(path), **params)
    with pytest.raises(DataError) as info:
        list(source.documents())
    message = str(info.value)
    assert "\n" not in message and f"no records in {path}" in message


def test_a_bad_floor_field_names_file_and_line(tmp_path):
    path = tmp_path / "r.jsonl"
    path.write_text('{"a": "x", "p": 1.5}\n{"a": "y", "p": -2}\n')
    source = sources.make("records", files=str(path), fields=["a"], nll="p")
    with pytest.raises(DataError, match=r"r\.jsonl:2: field 'p' must be the record's negative"):
        list(source.documents())


def test_records_source_refuses_bad_field_lists(tmp_path):
    path = write_jsonl(tmp_path / "r.jsonl", receipts(3, seed=0))
    for fields in ([], "item", ["item", "item"], ["separators"], [""]):
        with pytest.raises(ConfigError, match="fields="):
            sources.make("records", files=str(path), fields=fields)


# ------------------------------------------------------------------------- span stats
def test_span_differences_and_their_interval_match_a_hand_computation_and_scipy():
    from scipy.stats import bootstrap

    rng = np.random.default_rng(3)
    natural = [rng.exponential(1.0, size=5) for _ in range(60)]  # 4 tokens + end marker
    reference = Ragged.from_list(natural)
    harder = Ragged.from_list([row * np.array([1, 1, 1.5, 1.5, 1]) for row in natural])
    labels = np.tile([0, 0, 1, 1], 60)
    out = stats.span_breakdown(
        {"forward": reference, "other": harder},
        stats.span_masks(labels, ["a", "b"]),
        reference_order="forward",
        n_boot=4000,
    )
    per_unit = np.array([row[2:4].sum() * 0.5 / math.log(2) for row in natural])  # bits
    assert out["other"]["a"]["diff_bits_per_unit"] == 0.0
    assert "diff_bits_per_unit" not in out["forward"]["a"]
    assert out["other"]["b"]["diff_bits_per_unit"] == pytest.approx(per_unit.mean(), rel=1e-5)
    # Reference: scipy.stats.bootstrap, percentile method, of the mean per-unit difference.
    reference_ci = bootstrap((per_unit,), np.mean, n_resamples=4000, method="percentile", rng=1)
    low, high = reference_ci.confidence_interval
    assert out["other"]["b"]["diff_bits_per_unit_low"] == pytest.approx(low, abs=0.03)
    assert out["other"]["b"]["diff_bits_per_unit_high"] == pytest.approx(high, abs=0.03)


# ------------------------------------------------------------------- whole pipeline
def _host(root: Path, rows: list[dict]) -> Path:
    with resources.as_file(resources.files("retrograde") / "conf") as conf:
        shutil.copytree(conf, root / "conf" / "retrograde")
    (root / "data").mkdir()
    write_jsonl(root / "data" / "receipts.jsonl", rows)
    (root / "conf/retrograde/source/receipts.yaml").write_text(
        "# @package study.sources.receipts\n"
        "defaults:\n  - /tokenizer@tokenizer: chars\n"
        "name: records\n"
        "params: {files: [data/receipts.jsonl], fields: [time, item, qty, total], nll: nll}\n"
        "deps: [data/receipts.jsonl]\n"
    )
    overrides = [
        "source=[receipts]",
        "study=smoke",
        "study.seeds=[0]",
        "stats.n_boot=200",
        "study.models.ngram.params.order=4",
        "+study.orders.total_first={name: fields, params: {fields: [total, time, item, qty]}}",
    ]
    wdir = root / "pipelines" / "retrograde"
    wdir.mkdir(parents=True)
    plain = compose(root, overrides).to_dict()
    (wdir / "params.yaml").write_text(yaml.safe_dump(plain, sort_keys=False))
    return wdir


@pytest.mark.slow
def test_records_run_through_every_stage_with_floors_and_span_differences(tmp_path):
    wdir = _host(tmp_path / "host", receipts(400, seed=1))
    assert units_stage.main(["--params", str(wdir), "--source", "receipts"]) == 0
    for order in ("forward", "reverse", "total_first"):
        argv = ["--params", str(wdir), "--source", "receipts", "--order", order]
        assert reorder_stage.main(argv) == 0
        argv = ["--source", "receipts", "--model", "ngram", "--order", order, "--seed", "0"]
        assert fit_stage.main(["--params", str(wdir), *argv]) == 0
    assert table_stage.main(["--params", str(wdir)]) == 0
    leaf = json.loads((wdir / "metrics.json").read_text())["receipts"]["ngram"]["forward"]
    test = SequenceSet.load(wdir / "data/receipts/units/test")
    # The floor by hand: ln(720 * 6 * 9) nats per receipt, in bits, over the test tokens.
    floor = len(test) * math.log2(720 * 6 * 9) / len(test.tokens)
    assert leaf["floor_bits_per_token"] == pytest.approx(floor, rel=1e-5)
    assert leaf["excess_bits_per_token"] == pytest.approx(leaf["bits_per_token"] - floor, abs=2e-5)
    report = (wdir / "report.md").read_text()
    assert "### Spans of `receipts`" in report and "`total_first` | `total`" in report
    labels = np.load(wdir / "data/receipts/units/test/span_ids.npy")
    assert labels.shape == test.tokens.shape


def test_the_fields_order_on_a_source_without_fields_is_one_line_exit_2(tmp_path, capsys):
    wdir = _host(tmp_path / "host", receipts(60, seed=2))
    assert units_stage.main(["--params", str(wdir), "--source", "receipts"]) == 0
    info_path = wdir / "data/receipts/units/info.json"
    info = json.loads(info_path.read_text())
    del info["records"]
    info_path.write_text(json.dumps(info))
    argv = ["--params", str(wdir), "--source", "receipts", "--order", "total_first"]
    assert reorder_stage.main(argv) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "study.orders.total_first on source 'receipts'" in err[0]


def test_a_missing_field_in_the_units_stage_is_one_line_exit_2_naming_file_and_line(
    tmp_path, capsys
):
    rows = receipts(30, seed=4)
    del rows[6]["qty"]  # line 7 of the file
    wdir = _host(tmp_path / "host", rows)
    assert units_stage.main(["--params", str(wdir), "--source", "receipts"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "receipts.jsonl:7: field 'qty' is missing" in err[0]
    assert not (wdir / "data/receipts/units").exists()  # nothing half-written


def test_a_fields_order_naming_an_unknown_field_fails_at_compose_time(tmp_path):
    root = tmp_path / "host"
    _host(root, receipts(20, seed=6))
    with pytest.raises(ConfigError, match=r"study\.orders\.bad on source 'receipts'.*fields="):
        compose(
            root,
            [
                "source=[receipts]",
                "study=smoke",
                "+study.orders.bad={name: fields, params: {fields: [total, item]}}",
            ],
        )
    with pytest.raises(ConfigError, match=r"study\.orders\.bad on source 'markov'.*records"):
        compose(
            root,
            [
                "source=[receipts,markov]",
                "study=smoke",
                "+study.orders.bad={name: fields, params: {fields: [time, item, qty, total]}}",
            ],
        )


def test_the_span_figure_draws_one_series_per_order_with_intervals():
    from retrograde.report._plots import span_figure

    leaf = {"bits_per_unit": 2.0, "diff_bits_per_unit": 0.5}
    bounds = {"diff_bits_per_unit_low": 0.2, "diff_bits_per_unit_high": 0.9}
    spans = {
        "receipts": {
            "ngram": {
                "forward": {"item": {"bits_per_unit": 1.0}, "total": {"bits_per_unit": 3.0}},
                "total_first": {"item": {**leaf, **bounds}, "total": {**leaf, **bounds}},
            }
        }
    }
    figure = span_figure(spans, level=0.95)
    (ax,) = [a for a in figure.axes if a.get_visible()]
    assert [t.get_text() for t in ax.get_xticklabels()] == ["item", "total"]
    assert ax.get_ylabel() == "bits per unit minus forward"
