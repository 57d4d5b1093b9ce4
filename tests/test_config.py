"""Config: Hydra composition of the packaged groups, schema checks, sweeps, one-line errors."""

from __future__ import annotations

import importlib.util
import itertools
import os
import shutil
import stat
from importlib import resources
from pathlib import Path

import pytest
import yaml
from omegaconf import OmegaConf

from retrograde import __version__
from retrograde.config import (
    ModelConfig,
    RetrogradeConfig,
    StudyConfig,
    SweepConfig,
    compose,
    expand_sweeps,
    fitted_seed,
    ignores_seed,
    normalize,
    parse,
    register_configs,
)
from retrograde.errors import ConfigError, DataError, RetrogradeError

CORPUS = "first line of text\nsecond line of text\nthird one\n" * 20


@pytest.fixture
def host(tmp_path: Path) -> Path:
    """A folder laid out like a host after `retrograde init`: packaged conf + a corpus."""
    root = tmp_path / "host"
    conf = resources.files("retrograde") / "conf"
    with resources.as_file(conf) as conf_path:
        shutil.copytree(conf_path, root / "conf" / "retrograde")
    (root / "data").mkdir()
    (root / "data" / "corpus.txt").write_text(CORPUS)
    return root


def composed(host: Path, overrides=()) -> dict:
    """The composed config as the plain dict written to params.yaml."""
    return compose(host, list(overrides)).to_dict()


def _one_line_error(host: Path, overrides: list[str], kind: type[RetrogradeError] = ConfigError):
    with pytest.raises(kind) as info:
        compose(host, overrides)
    message = str(info.value)
    assert "\n" not in message
    return message


# ------------------------------------------------------------------------------ the shape
def test_default_config_composes_into_the_documented_shape(host):
    params = composed(host)
    study = params["study"]
    assert list(params) == ["study", "stats", "fits"]
    corpus = study["sources"]["corpus"]
    assert corpus["deps"] == ["data/corpus.txt"] and corpus["calibration"] is None
    assert corpus["tokenizer"] == {
        "name": "chars",
        "params": {"max_vocab": None, "min_count": 1},
        "library_version": None,  # a learned tokenizer's training library
    }
    assert corpus["units"]["mode"] == "line"
    assert corpus["package_version"] == __version__
    # Every entry holds its full parameters (defaults included) and the versions of the
    # code that computes with it, so a changed default or new code reruns its stages.
    assert study["orders"] == {
        "forward": {"name": "forward", "params": {}, "package_version": __version__},
        "reverse": {"name": "reverse", "params": {}, "package_version": __version__},
    }
    assert study["models"] == {
        "ngram": {
            "family": "ngram",
            "params": {"order": 3, "discount": None},
            "code": None,
            "seeds": None,
            "sources": None,
            # composed from auto: an n-gram has no randomness of its own, so the seed picks
            # half of the training units (changing how auto resolves reruns its cells)
            "train_sample": "half",
            "train_fraction": 1.0,
            "tune": None,
            "numerics_version": 2,
            "package_version": __version__,
            "trainer_sha256": None,
        }
    }
    # Each seed of the n-gram is its own half-sample, so a fit per (order, seed); with
    # train_sample none it would ignore the seed (test_a_family_that_ignores_the_seed_...).
    assert list(params["fits"]) == [
        f"corpus-ngram-{order}-{seed}" for order in ("forward", "reverse") for seed in (0, 1, 2)
    ]
    assert params["fits"]["corpus-ngram-reverse-0"] == {
        "source": "corpus",
        "model": "ngram",
        "order": "reverse",
        "seed": 0,
        "code": "data/corpus/units",
    }
    assert study["seeds"] == [0, 1, 2] and study["reference_order"] == "forward"
    assert params["stats"] == {
        "level": 0.95,
        "interval": "t",
        "n_boot": 2000,
        "seed": 0,
        "position_buckets": 50,
    }


def test_composed_params_read_back_identically_with_pyyaml_and_omegaconf(host):
    # DVC reads params.yaml with its own YAML parser: the dict must survive plain YAML.
    params = composed(host, ["study.seeds=[4,5]"])
    text = yaml.safe_dump(params, sort_keys=False)
    assert yaml.safe_load(text) == params
    assert OmegaConf.to_container(OmegaConf.create(text)) == params


def test_overrides_use_hydra_grammar_and_compose_is_deterministic(host):
    overrides = ["study.seeds=[7,8]", "+study.orders.blocks={name: block_reverse}"]
    first, second = composed(host, overrides), composed(host, overrides)
    assert first == second
    assert first["study"]["seeds"] == [7, 8]
    assert first["study"]["orders"]["blocks"]["params"] == {"size": 4}


def test_several_sources_including_a_calibration_source(host):
    params = composed(host, ["source=[corpus,markov]"])
    markov = params["study"]["sources"]["markov"]
    assert markov["units"] is None and markov["deps"] == []
    assert markov["tokenizer"] is None and markov["calibration"] == {"n_units": 1000, "seed": 0}
    assert list(params["study"]["sources"]) == ["corpus", "markov"]


def test_grid_has_one_cell_per_source_model_order_seed(host):
    # an mlp (it draws from the seed) replaces the n-gram, which is fitted once (below)
    overrides = [
        "source=[corpus,markov]",
        "study.seeds=[0,1]",
        "~study.models.ngram",
        "+study.models.mlp={family: mlp, params: {window: 2}}",
    ]
    params = composed(host, overrides)
    study = params["study"]
    expected = list(
        itertools.product(study["sources"], study["models"], study["orders"], study["seeds"])
    )
    assert compose(host, overrides).cells() == expected
    assert len(expected) == 2 * 1 * 2 * 2


# ------------------------------------------------------------------------------- sweeps
def test_sweep_expands_into_named_models_with_only_the_swept_value_changed(host):
    params = composed(
        host, ["+study.sweeps.context={model: ngram, parameter: order, values: [1, 2, 4]}"]
    )
    models = params["study"]["models"]
    assert sorted(models) == ["ngram", "ngram_order1", "ngram_order2", "ngram_order4"]
    assert models["ngram_order4"]["params"] == {"order": 4, "discount": None}
    assert params["study"]["sweeps"]["context"]["models"] == {
        "ngram_order1": 1,
        "ngram_order2": 2,
        "ngram_order4": 4,
    }


def _torch_sweep(host, *extra: str):
    model = (
        "+study.models.tf={family: transformer, params: {width: 8, heads: 2, layers: 1, "
        "context: 4, progress: false}}"
    )
    sweep = "+study.sweeps.ctx={model: tf, parameter: context, values: [4, 16]}"
    return compose(host, [model, sweep, *extra])


@pytest.mark.skipif(importlib.util.find_spec("torch") is None, reason="torch not installed")
def test_a_context_sweep_holds_optimizer_steps_and_needs_the_step_budget(host):
    with pytest.raises(ConfigError) as info:
        _torch_sweep(host)
    message = str(info.value)
    assert "\n" not in message
    assert message.startswith("study.sweeps.ctx holds steps equal across its context values")
    assert "study.models.tf.params.step_budget is null" in message
    config = _torch_sweep(host, "+study.models.tf.params.step_budget=50")
    assert config.study.sweeps["ctx"].hold == "steps"  # said in params.yaml
    from retrograde.stages import table as table_stage

    sweep = table_stage._sweeps(config.study, host)["ctx"]
    assert sweep["held"] == "optimizer steps (step_budget=50)"  # the figure title says it
    assert any(
        "every value trained with the same optimizer steps" in line
        for line in table_stage._sweep_notes(config.study)
    )
    assert {
        config.study.models[m].params["step_budget"] for m in ("tf_context4", "tf_context16")
    } == {50}
    # hold: tokens keeps the token budget instead (and must have one)
    with pytest.raises(ConfigError, match="params.token_budget is null"):
        _torch_sweep(host, "+study.sweeps.ctx.hold=tokens")
    config = _torch_sweep(
        host, "+study.sweeps.ctx.hold=tokens", "+study.models.tf.params.token_budget=900"
    )
    assert config.study.sweeps["ctx"].hold == "tokens"


@pytest.mark.parametrize(
    ("hold", "expected"),
    [
        ("steps", "family 'ngram' of model 'ngram' has no steps budget; allowed: null"),
        ("epochs", "hold='epochs' is invalid; allowed: steps, tokens or null"),
    ],
)
def test_a_hold_the_family_cannot_keep_is_one_line(host, hold, expected):
    sweep = f"+study.sweeps.ctx={{model: ngram, parameter: order, values: [2, 3], hold: {hold}}}"
    with pytest.raises(ConfigError) as info:
        compose(host, [sweep])
    assert expected in str(info.value) and "\n" not in str(info.value)


def test_sweep_value_names_stay_safe_for_dvc_stage_names():
    study = StudyConfig(
        models={"mlp": ModelConfig(family="mlp")},
        sweeps={"lr": SweepConfig(model="mlp", parameter="rate", values=[0.5, "a-b"])},
    )
    expand_sweeps(study)
    assert sorted(study.models) == ["mlp", "mlp_rate0p5", "mlp_ratea_b"]


def test_sweep_over_an_unknown_model_names_the_sweep_and_the_models(host):
    message = _one_line_error(
        host, ["+study.sweeps.width={model: ngarm, parameter: order, values: [1]}"]
    )
    assert "study.sweeps.width.model='ngarm'" in message and "did you mean 'ngram'" in message


# --------------------------------------------------------------------- _target_ entries
def test_target_entries_become_name_and_params():
    raw = {
        "study": {
            "orders": {"mine": {"_target_": "pkg.Mine", "size": 3}},
            "models": {"net": {"_target_": "pkg.Net", "params": {"a": 1}, "b": 2}},
            "sources": {"s": {"_target_": "pkg.Src", "files": ["x"], "deps": ["x"]}},
        }
    }
    study = normalize(raw)["study"]
    assert study["orders"]["mine"] == {"name": "pkg.Mine", "params": {"size": 3}}
    assert study["models"]["net"] == {"family": "pkg.Net", "params": {"a": 1, "b": 2}}
    assert study["sources"]["s"] == {"deps": ["x"], "name": "pkg.Src", "params": {"files": ["x"]}}


def test_an_order_given_by_target_is_built_and_checked_at_compose_time(host):
    params = composed(
        host, ["+study.orders.blocks={_target_: retrograde.orders.BlockReverse, size: 2}"]
    )
    assert params["study"]["orders"]["blocks"]["name"] == "retrograde.orders.BlockReverse"
    assert params["study"]["orders"]["blocks"]["params"] == {"size": 2}
    message = _one_line_error(
        host, ["+study.orders.blocks={_target_: retrograde.orders.BlockReverse, size: 0}"]
    )
    assert message.startswith("study.orders.blocks: ") and "size=0" in message


# ---------------------------------------------------------------------- one-line errors
def test_unknown_override_key_fails_with_did_you_mean_and_the_keys_allowed(host):
    message = _one_line_error(host, ["study.sedes=[1]"])
    assert "'study.sedes'" in message and "did you mean 'seeds'" in message
    assert "orders" in message and "reference_order" in message
    assert "+study" not in message  # a new key under study is never right


def test_unknown_key_added_in_a_config_file_names_its_key_path(host):
    path = host / "conf/retrograde/source/corpus.yaml"
    path.write_text(path.read_text() + "tokeniser: {name: words}\n")
    message = _one_line_error(host, [])
    assert "'study.sources.corpus.tokeniser'" in message
    assert "did you mean 'tokenizer'" in message and "allowed keys" in message


def test_unknown_config_group_option_lists_what_exists(host):
    message = _one_line_error(host, ["source=[corpsu]"])
    assert "unknown source config 'corpsu'" in message and "did you mean 'corpus'" in message


@pytest.mark.parametrize(
    ("override", "expected"),
    [
        ("study.orders.reverse.name=revrese", "unknown order 'revrese' (did you mean 'reverse'?)"),
        ("study.models.ngram.family=ngarm", "unknown family 'ngarm' (did you mean 'ngram'?)"),
        ("study.sources.corpus.name=txt", "unknown source 'txt'"),
        ("study.sources.corpus.tokenizer.name=word", "unknown tokenizer"),
    ],
)
def test_unknown_plugin_names_fail_with_did_you_mean(host, override, expected):
    assert expected in _one_line_error(host, [override])


@pytest.mark.parametrize(
    ("override", "expected"),
    [
        ("study.models.ngram.params.order=0", "parameter order=0 is invalid"),
        ("+study.models.ngram.params.ordr=2", "no parameter 'ordr' (did you mean 'order'?)"),
        ("study.models.ngram.params.ordr=2", "(did you mean 'order'?); keys under"),
        ("+study.orders.reverse.params.size=2", "order 'reverse' has no parameter 'size'"),
        ("study.seeds=[1,1]", "seeds=[1, 1] is invalid"),
        ("study.seeds=[]", "seeds=[] is invalid"),
        ("study.seeds=[-1]", "seeds=-1 is invalid"),
        ("study.reference_order=forwad", "did you mean 'forward'"),
        ("stats.level=1.5", "parameter level=1.5 is invalid"),
        ("stats.n_boot=many", "'stats.n_boot'"),
        ("stats.interval=normal", "parameter interval='normal' is invalid; allowed: one of 't'"),
        (
            "+study.models.ngram.train_sample=halves",
            "study.models.ngram: parameter train_sample='halves' is invalid",
        ),
        ("study.sources.corpus.split.fractions=[0.5,0.1,0.1]", "summing to 1"),
        ("study.sources.corpus.units.mode=paragraph", "mode='paragraph' is invalid"),
        ("study.sources.corpus.units.mode=window", "window=None is invalid"),
        ("+study.orders.bad-name={name: reverse}", "the name 'bad-name' is invalid"),
        ("~study.models.ngram", "study.models is empty"),
    ],
)
def test_bad_values_fail_before_any_work_naming_key_value_and_what_is_allowed(
    host, override, expected
):
    assert expected in _one_line_error(host, [override])


@pytest.mark.parametrize(
    ("override", "where"),
    [
        ("+study.models.ngram.params.ordr=2", "study.models.ngram"),
        ("+study.orders.reverse.params.size=2", "study.orders.reverse"),
        ("+study.sources.corpus.params.foo=1", "study.sources.corpus"),
        ("+study.sources.corpus.tokenizer.params.foo=1", "study.sources.corpus.tokenizer"),
        ("study.models.ngram.params.order=0", "study.models.ngram"),
    ],
)
def test_an_error_names_its_config_key_once(host, override, where):
    message = _one_line_error(host, [override])
    assert message.startswith(f"{where}: ") and message.count(f"{where}:") == 1


def test_source_file_outside_the_host_repository_is_refused(host):
    (host.parent / "outside.txt").write_text(CORPUS)
    message = _one_line_error(
        host,
        [
            "study.sources.corpus.params.files=[../outside.txt]",
            "study.sources.corpus.deps=[../outside.txt]",
        ],
    )
    assert "'../outside.txt' lies outside the host repository" in message


@pytest.mark.parametrize(
    ("deps", "expected"),
    [
        ("[data/*.txt]", "holds '*', a glob character"),
        ("[.git/config]", "lies inside .git/"),
        ("[data/../.dvc/config]", "lies inside .dvc/"),
    ],
)
def test_declared_deps_follow_the_same_path_rules_as_found_files(host, deps, expected):
    assert expected in _one_line_error(host, [f"study.sources.corpus.deps={deps}"])


def test_a_device_as_a_source_is_refused(host):
    device = host / "data" / "zero.txt"
    try:  # the device /dev/zero is (1, 5) on Linux; making one needs CAP_MKNOD
        os.mknod(device, 0o600 | stat.S_IFCHR, os.makedev(1, 5))
    except PermissionError:
        pytest.skip("making a device node needs CAP_MKNOD")
    message = _one_line_error(
        host,
        ["study.sources.corpus.params.files=[data/zero.txt]", "~study.sources.corpus.deps"],
        DataError,
    )
    assert "'data/zero.txt' is a character device, not a regular file" in message


def test_missing_corpus_is_fine_when_deps_name_it_but_not_otherwise(host):
    # A host stage may write the corpus later: declared deps are enough to compose.
    (host / "data" / "corpus.txt").unlink()
    params = composed(host)
    assert params["study"]["sources"]["corpus"]["deps"] == ["data/corpus.txt"]
    message = _one_line_error(host, ["study.sources.corpus.deps=null"], DataError)
    assert "list them under study.sources.corpus.deps" in message


def test_files_read_but_not_listed_as_deps_are_refused(host):
    (host / "data" / "more.txt").write_text(CORPUS)
    message = _one_line_error(host, ["study.sources.corpus.params.files=[data/*.txt]"])
    assert "reads 'data/more.txt'" in message and "deps does not list it" in message
    params = composed(
        host, ["study.sources.corpus.params.files=[data/*.txt]", "~study.sources.corpus.deps"]
    )
    assert params["study"]["sources"]["corpus"]["deps"] == ["data/corpus.txt", "data/more.txt"]


def test_missing_config_folder_says_to_run_init(tmp_path):
    with pytest.raises(ConfigError, match="run `retrograde init`"):
        compose(tmp_path)


# ------------------------------------------------------------------------------ schemas
def test_schema_fills_defaults_for_keys_a_config_leaves_out():
    checked = parse({"study": {"orders": {"r": {"name": "reverse"}}}})
    assert checked.study.orders["r"].name == "reverse" and checked.study.orders["r"].params == {}
    assert checked.stats.n_boot == 2000


def test_register_configs_stores_the_schema_in_hydra_config_store():
    from hydra.core.config_store import ConfigStore

    register_configs()
    repo = ConfigStore.instance().repo
    assert "retrograde_schema.yaml" in repo and "study_schema.yaml" in repo["study"]
    node = repo["retrograde_schema.yaml"].node
    assert OmegaConf.get_type(node) is RetrogradeConfig


def test_docstring_examples_of_the_pipeline_modules_run():
    import doctest

    import retrograde.config._grid
    import retrograde.config._schema
    import retrograde.host._driver
    import retrograde.host._plan
    import retrograde.stages.reorder

    for module in (
        retrograde.config._grid,
        retrograde.config._schema,
        retrograde.stages.reorder,
        retrograde.host._driver,
        retrograde.host._plan,
    ):
        failures, _ = doctest.testmod(module, optionflags=doctest.ELLIPSIS)
        assert failures == 0, module.__name__


SHIPPED_SOURCES = sorted(
    p.name.removesuffix(".yaml")
    for p in (resources.files("retrograde") / "conf" / "source").iterdir()
    if p.name.endswith(".yaml")
)


@pytest.mark.parametrize("source", SHIPPED_SOURCES)
def test_every_shipped_source_config_composes_and_builds(host, source):
    params = composed(host, [f"source=[{source}]"])
    spec = params["study"]["sources"][source]
    # A calibration source reads no files and cuts no units (it generates them).
    assert (spec["calibration"] is not None) == (spec["deps"] == [])
    assert (spec["calibration"] is None) == (spec["units"] is not None)


# ----------------------------------------------------------- per-model seeds and sources
def test_a_model_may_name_its_own_seeds_and_sources(host):
    config = compose(
        host,
        [
            "source=[corpus,markov]",
            "study.seeds=[0]",
            "+study.models.big={family: mlp, params: {window: 2}, seeds: [1, 2, 3], sources: [markov]}",
        ],
    )
    cells = config.cells()
    # ngram everywhere with the study's one seed; big on markov only, with its three.
    assert [c for c in cells if c[1] == "ngram"] == [
        (s, "ngram", o, 0) for s in ("corpus", "markov") for o in ("forward", "reverse")
    ]
    assert [c for c in cells if c[1] == "big"] == [
        ("markov", "big", o, seed) for o in ("forward", "reverse") for seed in (1, 2, 3)
    ]
    assert config.study.models_on("corpus") == ["ngram"]


def test_a_family_that_ignores_the_seed_is_fitted_once_per_source_model_and_order(host):
    config = compose(
        host,
        [
            "study.seeds=[3,4,5]",
            "++study.models.ngram.train_sample=none",
            "+study.models.mlp={family: mlp, params: {window: 2}}",
            "+study.models.few={family: ngram, params: {order: 2}, seeds: [7, 8]}",
        ],
    )
    study = config.study
    # the n-gram with train_sample none ignores the seed; 'few' (auto) trains each seed on
    # its own half-sample of the units, and the mlp draws its weights from the seed
    assert [ignores_seed(study.models[m]) for m in ("ngram", "mlp", "few")] == [True, False, False]
    cells = config.cells()
    # fitted with the model's first seed
    assert [c for c in cells if c[1] == "ngram"] == [
        ("corpus", "ngram", o, 3) for o in ("forward", "reverse")
    ]
    assert [c for c in cells if c[1] == "few"] == [
        ("corpus", "few", o, s) for o in ("forward", "reverse") for s in (7, 8)
    ]
    assert [c for c in cells if c[1] == "mlp"] == [
        ("corpus", "mlp", o, s) for o in ("forward", "reverse") for s in (3, 4, 5)
    ]
    # every seed's results are read from the cell that was fitted
    assert [fitted_seed(study, "ngram", s) for s in (3, 4, 5)] == [3, 3, 3]
    assert [fitted_seed(study, "few", s) for s in (7, 8)] == [7, 8]
    assert [fitted_seed(study, "mlp", s) for s in (3, 4, 5)] == [3, 4, 5]


@pytest.mark.parametrize(
    ("override", "expected"),
    [
        (
            "+study.models.big={family: ngram, sources: [markof]}",
            "names 'markof', which is not a source (did you mean 'markov'?)",
        ),
        (
            "+study.models.big={family: ngram, seeds: [1, 1]}",
            "study.models.big: parameter seeds=[1, 1] is invalid",
        ),
        ("+study.models.big={family: ngram, sources: []}", "sources=[] is invalid"),
    ],
)
def test_bad_model_seeds_or_sources_fail_in_one_line(host, override, expected):
    assert expected in _one_line_error(host, ["source=[corpus,markov]", override])


def test_a_source_no_model_fits_is_refused(host):
    message = _one_line_error(
        host, ["source=[corpus,markov]", "+study.models.ngram.sources=[corpus]"]
    )
    assert "study.sources.markov is fitted by no model" in message


def test_a_target_model_keeps_train_sample_beside_its_params():
    from retrograde.config import normalize

    raw = {
        "study": {
            "models": {
                "m": {"_target_": "pkg.Model", "order": 2, "train_sample": "none", "code": None}
            }
        }
    }
    assert normalize(raw)["study"]["models"]["m"] == {
        "family": "pkg.Model",
        "params": {"order": 2},
        "train_sample": "none",
        "code": None,
    }


def test_a_text_separator_order_with_a_token_id_source_is_refused_at_compose(host):
    words = "+study.orders.words={name: segment_reverse, params: {separators: ' '}}"
    assert compose(host, [words]).study.orders["words"].params == {"separators": " "}
    message = _one_line_error(host, [words, "source=[corpus,markov]"])
    assert message.startswith("study.orders.words on source 'markov': its separators are text")
