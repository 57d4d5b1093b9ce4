"""The PyTorch families ``gru``, ``lstm`` and ``transformer`` and their shared machinery.

Window and schedule helpers need no torch; everything else skips only when torch is absent.
"""

from __future__ import annotations

import itertools
import math
import subprocess
import sys
import zipfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import retrograde.families as families
from retrograde.data import SequenceSet
from retrograde.errors import ConfigError, MissingDependencyError
from retrograde.families import _torch_common
from retrograde.families._torch_common import (
    TRAINING_DEFAULTS,
    learning_rate,
    make_stream,
    make_windows,
    prediction_windows,
)

TORCH_FAMILIES = ["gru", "lstm", "transformer"]

try:
    import torch
except ImportError:  # pragma: no cover - CI installs the CPU wheel
    torch = None

needs_torch = pytest.mark.skipif(torch is None, reason="torch extra not installed")


def _small(name: str, **overrides: object) -> families.Family:
    params = dict(families.registry.get(name).example_params)  # type: ignore[attr-defined]
    params.update({"progress": False, **overrides})
    return families.make(name, **params)


def _units(n_units: int, vocab_size: int, max_len: int, seed: int) -> SequenceSet:
    rng = np.random.default_rng(seed)
    rows = [rng.integers(0, vocab_size, rng.integers(0, max_len + 1)) for _ in range(n_units)]
    return SequenceSet.from_list(rows, vocab_size=vocab_size)


# ----------------------------------------------------------------------------- windows
def _scoring_start(p: int, context: int, stride: int) -> int:
    """s(p) as the docs/torch.md formula states it, written independently."""
    return 0 if p < context else stride * math.ceil((p - context + 1) / stride)


@settings(max_examples=60, deadline=None)
@given(
    lengths=st.lists(st.integers(1, 40), min_size=1, max_size=6),
    context=st.integers(1, 12),
    stride_fraction=st.floats(0.01, 1.0),
)
def test_scoring_windows_own_every_position_once_from_the_documented_start(
    lengths, context, stride_fraction
):
    stride = max(1, min(context, round(stride_fraction * context)))
    windows = make_windows(np.array(lengths), context=context, stride=stride)
    owner_start = {}
    for unit, start, length, owned_from in zip(
        windows.unit, windows.start, windows.length, windows.owned_from, strict=True
    ):
        assert 1 <= length <= context
        for p in range(start + owned_from, start + length):
            assert (unit, p) not in owner_start
            owner_start[unit, p] = start
    expected = {
        (u, p): _scoring_start(p, context, stride) for u, n in enumerate(lengths) for p in range(n)
    }
    assert owner_start == expected


def test_training_windows_are_consecutive_non_overlapping_chunks_of_context():
    windows = make_windows(np.array([10, 3]), context=4, stride=4)
    assert windows.start.tolist() == [0, 4, 8, 0]
    assert windows.length.tolist() == [4, 4, 2, 3]
    assert windows.owned_from.tolist() == [0, 0, 0, 0]


def test_prediction_window_for_a_prefix_matches_the_scoring_window_of_that_position():
    context, stride = 5, 2
    p = np.arange(30)
    windows = prediction_windows(p, context=context, stride=stride)
    assert windows.start.tolist() == [_scoring_start(int(q), context, stride) for q in p]
    assert np.all(windows.start + windows.owned_from == p)  # owns exactly position p


def test_stream_shifts_inputs_by_one_behind_a_begin_id_and_ends_targets_with_the_end_marker():
    units = SequenceSet.from_list([[1, 0, 2]], vocab_size=3)
    stream = make_stream(units, vocab_size=3)
    assert stream.inputs.tolist() == [4, 1, 0, 2]  # BEGIN = vocab_size + 1
    assert stream.targets.tolist() == [1, 0, 2, 3]  # END = vocab_size


def test_learning_rate_warms_up_linearly_then_follows_torch_cosine_annealing():
    pytest.importorskip("torch")
    peak, min_ratio, warmup_steps, total_steps = 0.5, 0.1, 5, 25
    warm = [
        learning_rate(
            s, total_steps=total_steps, peak=peak, warmup_steps=warmup_steps, min_ratio=min_ratio
        )
        for s in range(1, warmup_steps + 1)
    ]
    assert warm == pytest.approx([peak * s / warmup_steps for s in range(1, warmup_steps + 1)])
    # Reference: torch's CosineAnnealingLR, i.e. SGDR without restarts (Loshchilov and
    # Hutter 2017, eq. 5): eta_min + (eta_max - eta_min) * (1 + cos(pi * t / T)) / 2.
    parameter = torch.nn.Parameter(torch.zeros(1))
    optimizer = torch.optim.SGD([parameter], lr=peak)
    scheduler = torch.optim.lr_scheduler.CosineAnnealingLR(
        optimizer, T_max=total_steps - warmup_steps, eta_min=peak * min_ratio
    )
    reference = []
    for _ in range(total_steps - warmup_steps):
        optimizer.step()
        scheduler.step()
        reference.append(optimizer.param_groups[0]["lr"])
    ours = [
        learning_rate(
            s, total_steps=total_steps, peak=peak, warmup_steps=warmup_steps, min_ratio=min_ratio
        )
        for s in range(warmup_steps + 1, total_steps + 1)
    ]
    assert ours == pytest.approx(reference, rel=1e-9)


# ------------------------------------------------------------------------ the contract
@needs_torch
@pytest.mark.parametrize("name", TORCH_FAMILIES)
def test_logprobs_equal_next_token_probs_at_observed_tokens_for_units_longer_than_context(name):
    train = _units(40, vocab_size=4, max_len=20, seed=0)
    model = _small(name, context=6, stride=2).fit(train, seed=3)
    units = _units(5, vocab_size=4, max_len=20, seed=1)
    scored = model.logprobs(units)
    for i, unit in enumerate(units):
        probs = model.next_token_probs([unit[:k] for k in range(len(unit) + 1)])
        assert probs.shape == (len(unit) + 1, 5)
        np.testing.assert_allclose(probs.sum(axis=1), 1.0, rtol=0, atol=1e-12)
        observed = np.append(unit, 4)  # the end marker is outcome vocab_size
        # float32 networks: batches of other shapes round the last bits differently.
        np.testing.assert_allclose(
            np.log(probs[np.arange(len(unit) + 1), observed]), scored[i], rtol=0, atol=1e-6
        )


@needs_torch
@pytest.mark.parametrize("name", TORCH_FAMILIES)
def test_unit_probabilities_with_their_lengths_sum_to_one_despite_sliding_windows(name):
    # Law of total probability (common practice, no source): for every L, the units of
    # length <= L (end marker scored) and the length-(L+1) prefixes partition all outcomes,
    # so their probabilities add up to exactly 1. Context 3 < L makes windows slide.
    train = _units(30, vocab_size=2, max_len=8, seed=0)
    model = _small(name, context=3, stride=1).fit(train, seed=0)
    longest = 5
    complete = [
        np.array(t) for n in range(longest + 1) for t in itertools.product([0, 1], repeat=n)
    ]
    ends = [np.array(t) for t in itertools.product([0, 1], repeat=longest + 1)]
    units = SequenceSet.from_list(complete + ends, vocab_size=2)
    rows = model.logprobs(units)
    total = sum(math.exp(rows[i].sum()) for i in range(len(complete)))
    total += sum(math.exp(rows[len(complete) + j][:-1].sum()) for j in range(len(ends)))
    assert total == pytest.approx(1.0, abs=1e-6)  # float32 networks


@needs_torch
@pytest.mark.parametrize("name", TORCH_FAMILIES)
def test_a_score_depends_only_on_earlier_tokens_inside_its_window(name):
    context, stride = 4, 2
    model = _small(name, context=context, stride=stride).fit(_units(30, 3, 12, 0), seed=0)
    base = np.array([0, 1, 2, 0, 1, 2, 0, 1, 2, 0])
    changed_late = base.copy()
    changed_late[7] = 1  # position 7 is a target; inputs of positions >= 8 change
    changed_early = base.copy()
    changed_early[0] = 2  # only an input of positions <= 1 in stream terms, and target 0
    rows = model.logprobs(SequenceSet.from_list([base, changed_late, changed_early], vocab_size=3))
    np.testing.assert_array_equal(rows[0][:7], rows[1][:7])  # earlier positions untouched
    # Position 9's window starts at s(9) = 6 > 1, so token 0 is outside what it sees.
    assert _scoring_start(9, context, stride) == 6
    np.testing.assert_array_equal(rows[0][9:], rows[2][9:])
    assert not np.array_equal(rows[0][1:4], rows[2][1:4])  # but nearby positions do see it


@needs_torch
@pytest.mark.parametrize("name", TORCH_FAMILIES)
def test_logprobs_match_a_scipy_log_softmax_of_the_raw_network_outputs(name):
    from scipy.special import log_softmax

    units = _units(6, vocab_size=5, max_len=7, seed=2)
    model = _small(name, context=8).fit(_units(30, 5, 7, 0), seed=0)
    rows = model.logprobs(units)
    model.network_.eval()
    for i, unit in enumerate(units):
        inputs = torch.tensor([[6, *unit.tolist()]])  # BEGIN = vocab_size + 1
        with torch.no_grad():
            logits = model.network_(inputs)[0].double().numpy()  # (len + 1, vocab_size + 1)
        expected = log_softmax(logits, axis=1)[np.arange(len(unit) + 1), [*unit.tolist(), 5]]
        np.testing.assert_allclose(rows[i], expected, rtol=0, atol=1e-6)


@needs_torch
def test_sinusoidal_positions_follow_the_published_formula():
    from retrograde.families._torch_nets import sinusoidal_table

    # Vaswani et al. (2017) section 3.5: PE(pos, 2i) = sin(pos / 10000^(2i/d)),
    # PE(pos, 2i+1) = cos(pos / 10000^(2i/d)).
    width = 6
    table = sinusoidal_table(5, width).numpy()
    pos = np.arange(5)[:, None]
    angle = pos / 10000 ** (np.arange(0, width, 2) / width)
    np.testing.assert_allclose(table[:, 0::2], np.sin(angle), atol=1e-6)
    np.testing.assert_allclose(table[:, 1::2], np.cos(angle), atol=1e-6)


# ---------------------------------------------------------------------------- training
@needs_torch
@pytest.mark.parametrize("name", TORCH_FAMILIES)
def test_two_fits_with_the_same_seed_and_threads_give_identical_scores_and_files(name, tmp_path):
    train, test = _units(40, 4, 12, 0), _units(10, 4, 12, 1)
    models = [_small(name, dropout=0.1, threads=2).fit(train, test, seed=s) for s in (7, 7, 8)]
    first, second, other_seed = (model.logprobs(test) for model in models)
    np.testing.assert_array_equal(first.values, second.values)
    assert not np.array_equal(first.values, other_seed.values)
    for index in (0, 1):
        models[index].save(tmp_path / str(index))
    for file_name in ("weights.pt", "family.json"):  # DVC sees an unchanged output
        assert (tmp_path / "0" / file_name).read_bytes() == (
            tmp_path / "1" / file_name
        ).read_bytes()


@needs_torch
def test_a_fit_leaves_the_global_torch_rng_and_thread_count_unchanged():
    threads_before = torch.get_num_threads()
    torch.manual_seed(123)
    expected = torch.rand(3)
    torch.manual_seed(123)
    _small("gru", threads=2, dropout=0.2).fit(_units(20, 3, 8, 0), seed=5)
    np.testing.assert_array_equal(torch.rand(3).numpy(), expected.numpy())
    assert torch.get_num_threads() == threads_before


@needs_torch
@pytest.mark.parametrize("name", TORCH_FAMILIES)
def test_token_budget_trains_on_exactly_that_many_positions_in_every_order(name):
    train = _units(30, 4, 10, 0)
    reversed_train = SequenceSet.from_list([unit[::-1] for unit in train], vocab_size=4)
    positions = len(train.tokens) + len(train)  # every token and every end marker is a target
    budget = 2 * positions + 17  # two epochs and a partial third
    forward = _small(name, token_budget=budget, epochs=1).fit(train, train, seed=0)
    backward = _small(name, token_budget=budget, epochs=1).fit(
        reversed_train, reversed_train, seed=0
    )
    for model in (forward, backward):
        assert model.tokens_seen_ == budget
        assert [r["tokens_seen"] for r in model.learning_curve_][-1] == budget
        assert len(model.learning_curve_) == 3  # epochs ignored; the budget sets the length
    assert [r["lr"] for r in forward.learning_curve_] == [r["lr"] for r in backward.learning_curve_]


@needs_torch
def test_early_stopping_restores_the_weights_of_the_best_validation_epoch():
    train, valid = _units(40, 6, 10, 0), _units(15, 6, 10, 1)
    model = _small("transformer", epochs=12, patience=2, lr=0.05).fit(train, valid, seed=0)
    curve = [r["valid_bits_per_token"] for r in model.learning_curve_]
    best = int(np.argmin(curve))
    assert len(curve) == 12 or len(curve) - 1 - best == 2  # stopped after 2 stale epochs
    assert model._bits_per_token(valid) == pytest.approx(min(curve), rel=1e-12)


@needs_torch
@pytest.mark.parametrize("name", TORCH_FAMILIES)
def test_saved_model_is_a_state_dict_that_loads_with_weights_only_and_scores_identically(
    name, tmp_path
):
    train, test = _units(30, 4, 10, 0), _units(8, 4, 10, 1)
    model = _small(name).fit(train, test, seed=0)
    model.save(tmp_path / "model")
    assert sorted(p.name for p in (tmp_path / "model").iterdir()) == ["family.json", "weights.pt"]
    assert zipfile.is_zipfile(tmp_path / "model" / "weights.pt")  # torch's zip format
    state = torch.load(tmp_path / "model" / "weights.pt", weights_only=True)
    assert all(isinstance(value, torch.Tensor) for value in state.values())
    loaded = families.load(tmp_path / "model")
    np.testing.assert_array_equal(loaded.logprobs(test).values, model.logprobs(test).values)
    assert loaded.learning_curve_ == model.learning_curve_


@needs_torch
def test_bf16_autocast_trains_a_proper_model_whose_scores_differ_slightly_from_float32():
    if not _torch_common.bf16_supported(torch):
        pytest.skip("this CPU has no native bfloat16")
    train, test = _units(40, 4, 12, 0), _units(10, 4, 12, 1)
    plain = _small("transformer").fit(train, seed=0)
    mixed = _small("transformer", bf16=True).fit(train, seed=0)
    probs = mixed.next_token_probs([test[0][:k] for k in range(len(test[0]) + 1)])
    np.testing.assert_allclose(probs.sum(axis=1), 1.0, atol=1e-12)  # scoring stays float32
    difference = np.abs(plain.logprobs(test).values - mixed.logprobs(test).values)
    assert 0 < difference.max() < 0.5


@needs_torch
def test_bf16_is_refused_in_one_line_on_a_cpu_without_bfloat16(monkeypatch):
    monkeypatch.setattr(_torch_common, "bf16_supported", lambda torch: False)
    with pytest.raises(ConfigError, match=r"family 'gru': parameter bf16=True is invalid"):
        _small("gru", bf16=True).fit(_units(5, 3, 4, 0))


# -------------------------------------------------------------------- params, packaging
@needs_torch
@pytest.mark.parametrize(
    ("name", "key", "value", "allowed"),
    [
        ("gru", "hidden", 0, "an integer >= 1"),
        ("lstm", "dropout", 1.0, "a number >= 0.0 and < 1.0"),
        ("transformer", "width", 10, "a multiple of heads=4"),
        ("transformer", "positional", "rotary", "one of 'learned', 'sinusoidal'"),
        ("transformer", "stride", 9, "an integer >= 1 and <= 8"),
        ("gru", "token_budget", 0, "an integer >= 1"),
        ("gru", "bf16", "yes", "True or False"),
        ("lstm", "device", "gpu", "cpu, auto, cuda, cuda:N or mps"),
        ("transformer", "device", "cuda:x", "cpu, auto, cuda, cuda:N or mps"),
    ],
)
def test_invalid_parameters_fail_before_training_naming_key_value_and_allowed(
    name, key, value, allowed
):
    overrides = {key: value, "heads": 4} if name == "transformer" else {key: value}
    model = _small(name, **overrides)
    with pytest.raises(ConfigError) as caught:
        model.fit(_units(5, 3, 4, 0))
    assert str(caught.value) == (
        f"family {name!r}: parameter {key}={value!r} is invalid; allowed: {allowed}"
    )


@needs_torch
@pytest.mark.parametrize("name", TORCH_FAMILIES)
def test_device_auto_falls_back_to_the_cpu_and_gives_the_same_numbers(name, tmp_path):
    if torch.cuda.is_available() or torch.backends.mps.is_available():
        pytest.skip("this machine has an accelerator: auto would not mean the CPU")
    train, valid, test = _units(40, 3, 10, 0), _units(8, 3, 10, 1), _units(8, 3, 10, 2)
    on_cpu = _small(name, device="cpu").fit(train, valid, seed=3)
    automatic = _small(name, device="auto").fit(train, valid, seed=3)
    assert on_cpu.device_ == automatic.device_ == "cpu"
    # the device choice must not change what a CPU computes (bit for bit)
    assert np.array_equal(on_cpu.logprobs(test).values, automatic.logprobs(test).values)
    automatic.save(tmp_path / "model")
    loaded = families.load(tmp_path / "model")
    assert loaded.device_ == "cpu"
    assert np.array_equal(loaded.logprobs(test).values, on_cpu.logprobs(test).values)


@needs_torch
@pytest.mark.parametrize("device", ["cuda", "cuda:1", "mps"])
def test_an_accelerator_this_machine_lacks_is_refused_in_one_line(device):
    present = {
        "cuda": torch.cuda.device_count() >= 1,
        "cuda:1": torch.cuda.device_count() >= 2,
        "mps": torch.backends.mps.is_available(),
    }
    if present[device]:
        pytest.skip(f"this machine has {device}")
    model = _small("gru", device=device)
    with pytest.raises(ConfigError) as caught:
        model.fit(_units(5, 3, 4, 0))
    message = str(caught.value)
    assert message.startswith(f"family 'gru': parameter device={device!r} is invalid on this")
    assert message.endswith("allowed: cpu or auto")


@needs_torch
def test_every_torch_family_shares_the_documented_training_defaults():
    import inspect

    for name in TORCH_FAMILIES:
        signature = inspect.signature(families.registry.get(name))
        defaults = {key: signature.parameters[key].default for key in TRAINING_DEFAULTS}
        assert defaults == TRAINING_DEFAULTS


def test_without_torch_the_package_imports_and_torch_families_fail_in_one_line():
    script = (
        "import sys\n"
        "class NoTorch:\n"  # a finder that makes every torch import fail, as if not installed
        "    def find_spec(self, name, path=None, target=None):\n"
        "        if name.split('.')[0] == 'torch':\n"
        "            raise ImportError('No module named torch')\n"
        "sys.meta_path.insert(0, NoTorch())\n"
        "import retrograde.families as f\n"
        "assert {'gru', 'lstm', 'transformer'} <= set(f.names())\n"
        "try:\n"
        "    f.make('lstm')\n"
        "except Exception as exc:\n"
        "    print(type(exc).__name__, '|', exc)\n"
    )
    result = subprocess.run(
        [sys.executable, "-c", script], capture_output=True, text=True, check=True
    )
    kind, _, message = result.stdout.strip().partition(" | ")
    assert kind == MissingDependencyError.__name__
    assert "\n" not in message
    assert "family 'lstm' needs PyTorch" in message
    assert "pip install torch==2.13.0" in message


# ------------------------------------------------------------------- calibration source
# linear_gf2 with structure="banded", n_bits=10, nonzeros=1, matrix_seed=298: every y bit is
# the parity of at most two x bits, while read backwards three x bits need the parity of 7,
# 4 and 4 earlier bits (parity_weights). The recipe of docs/torch.md; measured by
# benchmarks/bench_torch_calibration.py (2026-12-02, 3 model seeds x 2 data seeds, this test
# is data seed 0, model seed 0): forward 0.07-0.28 % above the floor, reverse 10-50 %;
# this cell gave forward 0.07 %, reverse 40 %, heavy positions 0.67 bits, light 0.29.
GF2_SOURCE = dict(n_bits=10, nonzeros=1, structure="banded", matrix_seed=298)
GF2_TRANSFORMER = dict(
    width=128,
    layers=2,
    heads=8,
    context=21,
    batch_size=64,
    lr=1e-3,
    min_lr_ratio=1.0,
    epochs=40,
    patience=5,
    progress=False,
)
GF2_FORWARD_EXCESS_AT_MOST = 0.05
GF2_GAP_AT_LEAST = 0.10


@needs_torch
@pytest.mark.slow
def test_on_banded_linear_gf2_forward_reaches_the_floor_and_reverse_stays_10_points_above():
    import sympy

    from retrograde import orders, sources

    n_bits = GF2_SOURCE["n_bits"]
    source = sources.make("linear_gf2", **GF2_SOURCE)
    # Outside check (sympy): A is invertible over GF(2); its rows hold at most two ones and
    # its inverse is much denser.
    inverse = np.array(sympy.Matrix(source.matrix_.astype(int)).inv_mod(2), dtype=np.int64)
    np.testing.assert_array_equal(inverse, source.inverse_)
    assert source.matrix_.sum(axis=1).max() == 2 and inverse.sum(axis=1).max() == n_bits
    train, valid, test = (source.generate(n, seed=s) for n, s in ((4000, 1), (300, 2), (500, 3)))
    floor = source.nll(test)
    # The floor is the entropy of n uniform bits, n ln 2 nats (Cover and Thomas, Elements
    # of Information Theory, 2nd ed., section 2.1; from memory): y and the length are fixed.
    np.testing.assert_allclose(floor, n_bits * math.log(2))
    excess, position_bits = {}, {}
    for name in ("forward", "reverse"):
        order = orders.make(name)
        model = families.make("transformer", **GF2_TRANSFORMER).fit(
            order.apply_set(train), order.apply_set(valid), seed=0
        )
        rows = model.logprobs(order.apply_set(test))
        excess[name] = -rows.sums().mean() / floor.mean() - 1
        position_bits[name] = -rows.values.reshape(len(test), -1).mean(axis=0) / math.log(2)
    assert excess["forward"] < GF2_FORWARD_EXCESS_AT_MOST, excess
    assert excess["reverse"] > excess["forward"] + GF2_GAP_AT_LEAST, excess
    # The reverse loss sits where parity_weights says the parities are heavy.
    weights = np.array(source.parity_weights(np.arange(2 * n_bits)[::-1]))
    heavy, light = weights >= 4, (weights >= 1) & (weights <= 2)
    assert heavy.sum() == 3
    reverse_bits = position_bits["reverse"][: 2 * n_bits]
    assert reverse_bits[heavy].mean() > reverse_bits[light].mean() + 0.2, reverse_bits


@needs_torch
def test_context_and_capacity_sweeps_expand_into_valid_torch_models_that_fit():
    from retrograde.config import ModelConfig, StudyConfig, SweepConfig, expand_sweeps
    from retrograde.config._plugins import resolve_plugins

    small = {"epochs": 1, "batch_size": 8, "progress": False, "step_budget": 2}
    study = StudyConfig(
        models={
            "tf": ModelConfig(family="transformer", params={"width": 8, "heads": 2, **small}),
            "rnn": ModelConfig(family="gru", params={"embedding": 4, **small}),
        },
        sweeps={
            "context": SweepConfig(model="tf", parameter="context", values=[2, 6]),
            "capacity": SweepConfig(model="rnn", parameter="hidden", values=[4, 16]),
        },
    )
    expand_sweeps(study)
    resolve_plugins(study, Path.cwd())  # the compose-time checks of every expanded model
    train = _units(20, 3, 9, 0)
    for name, value, attribute in (("tf_context2", 2, "context"), ("rnn_hidden16", 16, "hidden")):
        entry = study.models[name]
        model = families.make(entry.family, **entry.params).fit(train, seed=0)
        assert getattr(model, attribute) == value
        assert len(model.logprobs(train)[0]) == len(train[0]) + 1


@needs_torch
def test_every_step_clips_the_global_gradient_norm_to_grad_clip(monkeypatch):
    original = torch.nn.utils.clip_grad_norm_
    norms_after = []

    def clip_and_measure(parameters, max_norm, *args, **kwargs):
        parameters = list(parameters)
        original(parameters, max_norm, *args, **kwargs)
        norms_after.append(
            float(torch.linalg.vector_norm(torch.cat([p.grad.flatten() for p in parameters])))
        )

    monkeypatch.setattr(torch.nn.utils, "clip_grad_norm_", clip_and_measure)
    train = _units(24, 4, 10, 0)
    model = _small("lstm", grad_clip=1e-3, batch_size=8, epochs=2).fit(train, seed=0)
    n_windows = len(make_windows(train.lengths + 1, context=model.context, stride=model.context))
    assert len(norms_after) == 2 * math.ceil(n_windows / 8)  # one clip per optimizer step
    assert max(norms_after) <= 1e-3 * (1 + 1e-5)
    assert model.learning_curve_[-1]["tokens_seen"] == 2 * (len(train.tokens) + len(train))


@needs_torch
def test_the_fit_stage_accepts_a_torch_model_and_returns_its_test_logprobs():
    from retrograde.config import ModelConfig
    from retrograde.stages.fit import fit_cell

    splits = {"train": _units(30, 4, 9, 0), "valid": _units(8, 4, 9, 1), "test": _units(8, 4, 9, 2)}
    params = {**families.registry.get("gru").example_params, "progress": False}
    model, values, curve = fit_cell(ModelConfig(family="gru", params=params), splits, seed=0)
    assert values.shape == (len(splits["test"].tokens) + len(splits["test"]),)
    np.testing.assert_array_equal(values, model.logprobs(splits["test"]).values)
    assert [record["epoch"] for record in curve] == [1, 2]


@needs_torch
@pytest.mark.parametrize(("progress", "disable"), [(True, None), (False, True)])
def test_the_progress_bar_counts_tokens_and_shows_only_when_asked_on_a_terminal(
    monkeypatch, progress, disable
):
    from retrograde.families import _progress

    bars = []

    class RecordingBar:
        def __init__(self, **kwargs):
            self.kwargs, self.counted = kwargs, 0
            bars.append(self)

        def update(self, n):
            self.counted += n

        def set_postfix(self, **kwargs):
            pass

        def close(self):
            pass

    monkeypatch.setattr(_progress, "tqdm", RecordingBar)  # every family's bar goes through it
    train = _units(10, 3, 6, 0)
    _small("gru", progress=progress, epochs=1).fit(train, seed=0)
    (bar,) = bars
    assert bar.kwargs["unit"] == "tok"  # tqdm then reports tok/s
    assert bar.kwargs["disable"] is disable  # None: tqdm hides itself off a terminal
    assert bar.counted == len(train.tokens) + len(train)


# ------------------------------------------------------------- context sweeps, equal steps
def _context_sweep_budgets(**budget: int) -> dict[int, dict]:
    """budget.json of a transformer fitted at contexts 4 and 16 with the given budget (and
    its learning curve's last record under ``curve``)."""
    from retrograde.config import ModelConfig
    from retrograde.stages.fit import cell_budget, fit_cell

    splits = {
        "train": _units(40, 4, 30, 0),
        "valid": _units(6, 4, 30, 1),
        "test": _units(6, 4, 30, 2),
    }
    budgets = {}
    for context in (4, 16):
        params = {"width": 8, "heads": 2, "layers": 1, "batch_size": 4, "progress": False}
        entry = ModelConfig(family="transformer", params={**params, "context": context, **budget})
        model, _, curve = fit_cell(entry, splits, seed=0)
        budgets[context] = cell_budget(model, splits["train"], curve, cpu_s=0.0, wall_s=0.0)
        budgets[context]["curve"] = curve[-1]
    return budgets


@needs_torch
def test_a_step_budget_gives_every_context_the_same_optimizer_steps_in_budget_json():
    budgets = _context_sweep_budgets(step_budget=7)
    assert budgets[4]["steps"] == budgets[16]["steps"] == 7
    assert budgets[4]["curve"]["steps"] == budgets[16]["curve"]["steps"] == 7  # the curve too
    # More positions per window: the longer context saw more tokens in the same steps.
    assert budgets[16]["train_tokens"] > budgets[4]["train_tokens"]


@needs_torch
def test_a_token_budget_gives_a_longer_context_fewer_steps_the_confound_steps_remove():
    budgets = _context_sweep_budgets(token_budget=400)
    assert budgets[4]["train_tokens"] == budgets[16]["train_tokens"] == 400
    # Windows per step are fixed (batch_size), so positions per step grow with the context
    # (arithmetic of the window scheme in docs/torch.md; common practice, no source).
    assert budgets[4]["steps"] > budgets[16]["steps"]


@needs_torch
def test_step_budget_and_token_budget_together_are_refused():
    with pytest.raises(
        ConfigError, match="step_budget=3 is invalid; allowed: null when token_budget"
    ):
        _small("transformer", step_budget=3, token_budget=10)._validate_params()
