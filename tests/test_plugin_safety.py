"""A config names code: only order, source, family and tokenizer classes may be built from it,
checked before anything is called; a broken third-party plug-in fails only when used."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from _host_fixtures import new_pipeline_host, snapshot
from retrograde import families, orders, sources
from retrograde.cli import main
from retrograde.data import SequenceSet, tokenizers
from retrograde.errors import ConfigError, PluginError
from retrograde.registry import Registry

REGISTRIES = [orders.registry, sources.registry, families.registry, tokenizers.registry]
BUILT_IN = {"order": "reverse", "source": "text", "family": "ngram", "tokenizer": "chars"}

#: callables a config must never reach: a function, a builtin, a class of another kind
NOT_PLUGINS = ["subprocess.run", "os.system", "builtins.eval", "collections.OrderedDict"]


@pytest.mark.parametrize("registry", REGISTRIES, ids=lambda r: r.kind)
@pytest.mark.parametrize("target", NOT_PLUGINS)
def test_a_dotted_path_to_anything_but_a_plugin_class_is_refused_uncalled(
    registry, target, monkeypatch
):
    calls = []
    module_name, _, attr = target.rpartition(".")
    module = __import__(module_name)
    monkeypatch.setattr(module, attr, _Spy(getattr(module, attr), calls), raising=True)
    with pytest.raises(ConfigError, match=r"not a subclass of retrograde\.") as info:
        registry.make(target, args="touch PWNED", shell=True)
    assert calls == [] and "\n" not in str(info.value)


class _Spy:
    """Records calls; a stand-in for a callable a config names."""

    def __init__(self, wrapped, calls):
        self.__qualname__ = getattr(wrapped, "__qualname__", "spy")
        self._calls = calls

    def __call__(self, *args, **kwargs):
        self._calls.append((args, kwargs))


def test_abstract_base_classes_are_refused_before_they_are_called():
    for target in ("retrograde.orders.Order", "retrograde.sources.FileSource"):
        registry = orders.registry if "orders" in target else sources.registry
        with pytest.raises(ConfigError, match="abstract class"):
            registry.get(target)


def test_a_registry_refuses_to_register_a_function():
    registry: Registry[orders.Order] = Registry("order", "retrograde.test_orders", orders.Order)
    with pytest.raises(TypeError, match="is not a retrograde.orders.Order"):
        registry.register("f")(print)


@pytest.mark.parametrize(
    ("command", "override"),
    [
        (
            ["run", "--dry"],
            "+study.orders.x={_target_: subprocess.run, args: 'touch PWNED', shell: true}",
        ),
        (["check"], "+study.orders.x={_target_: subprocess.run, args: 'touch PWNED', shell: true}"),
        (["run", "--dry"], "+study.models.x={_target_: os.system, command: 'touch PWNED'}"),
        (["run", "--dry"], "study.sources.corpus.name=subprocess.run"),
        (["check"], "study.sources.corpus.tokenizer.name=os.system"),
    ],
)
def test_run_dry_and_check_never_call_what_a_target_names(tmp_path, capsys, command, override):
    host = new_pipeline_host(tmp_path / "host")
    before = snapshot(host)
    status = main([*command, "--dir", str(host), override])
    _, err = capsys.readouterr()
    assert status == 2
    assert err.count("\n") == 1 and "not a subclass of retrograde." in err
    assert not list(tmp_path.rglob("PWNED")) and snapshot(host) == before


# ------------------------------------------------------------------------- entry points
@pytest.fixture
def broken_plugins(tmp_path, monkeypatch):
    """An installed distribution whose entry points are broken, one per plug-in group."""
    dist = tmp_path / "site" / "brokenplugin-0.1.dist-info"
    dist.mkdir(parents=True)
    (dist / "METADATA").write_text("Metadata-Version: 2.1\nName: brokenplugin\nVersion: 0.1\n")
    groups = ["orders", "sources", "families", "tokenizers"]
    (dist / "entry_points.txt").write_text(
        "".join(
            f"[retrograde.{group}]\nbroken = no_such_module_anywhere:Thing\n"
            f"function = subprocess:run\n"
            for group in groups
        )
    )
    monkeypatch.syspath_prepend(str(tmp_path / "site"))
    for registry in REGISTRIES:
        monkeypatch.setattr(registry, "_entry_points", None)  # look again, with the dist


def test_a_broken_entry_point_is_listed_but_fails_only_when_used(broken_plugins):
    for registry in REGISTRIES:
        assert {"broken", "function"} <= set(registry.names())
        registry.get(BUILT_IN[registry.kind])  # built-ins still work
        with pytest.raises(ConfigError, match="failed to load") as info:
            registry.get("broken")
        assert "no_such_module_anywhere:Thing" in str(info.value)
        with pytest.raises(ConfigError, match="not a subclass"):
            registry.get("function")


def test_a_broken_entry_point_does_not_break_a_built_in_only_run(tmp_path, capsys, broken_plugins):
    host = new_pipeline_host(tmp_path / "host")
    assert main(["run", "--dry", "--dir", str(host)]) == 0
    capsys.readouterr()
    status = main(["run", "--dry", "--dir", str(host), "study.orders.reverse.name=broken"])
    _, err = capsys.readouterr()
    assert status == 2 and err.count("\n") == 1
    assert "study.orders.reverse: order 'broken' from entry point" in err


# ------------------------------------------------------------- plug-in orders in `check`
class RaisingOrder(orders.Order):
    def positions_set(self, units):
        raise ValueError("my order has a bug")


class FloatOrder(orders.Order):
    def positions(self, x):
        return np.arange(len(x))[::-1] + 0.5  # not indices


class FloatSetOrder(orders.Order):
    def positions_set(self, units):
        return np.arange(len(units.tokens), dtype=np.float64)


class NotAnOrder:
    def __init__(self, **params):
        raise AssertionError("must never be called")


class RaisingConstructor(orders.Order):
    def __init__(self, **params):
        raise RuntimeError("cannot start")


@pytest.mark.parametrize(
    ("cls", "expected"),
    [
        ("RaisingOrder", "raised ValueError: my order has a bug"),
        ("FloatOrder", "returned float64 positions"),
        ("FloatSetOrder", "returned float64 positions"),
        ("NotAnOrder", "not a subclass of retrograde.orders.Order"),
        ("RaisingConstructor", "raised RuntimeError when built: cannot start"),
    ],
)
def test_check_with_a_broken_plugin_order_is_one_line_exit_two(tmp_path, capsys, cls, expected):
    host = new_pipeline_host(tmp_path / "host")
    before = snapshot(host)
    status = main(
        ["check", "--dir", str(host), f"+study.orders.mine={{_target_: {__name__}.{cls}}}"]
    )
    out, err = capsys.readouterr()
    assert status == 2 and out == ""
    assert err.count("\n") == 1 and expected in err and "study.orders.mine" in err
    assert snapshot(host) == before


def test_a_broken_plugin_order_in_the_library_is_a_plugin_error():
    data = SequenceSet.from_list([[1, 2, 3], [4, 5]])
    for order in (RaisingOrder(), FloatSetOrder()):
        with pytest.raises(PluginError) as info:
            orders.verify_bijection(order, data, order_name="mine")
        assert "order 'mine'" in str(info.value)


class RaisingSource(sources.FileSource):
    """A plug-in source whose reading code has a bug."""

    def __init__(self, *, files="data/corpus.txt", split="paragraph"):
        self.files, self.split = files, split

    def paths(self):
        return [Path(name) for name in self.files]

    def documents(self):
        raise KeyError("row 7")


class ListingFailsSource(RaisingSource):
    def paths(self):
        raise OSError("share not mounted")


def test_a_plugin_source_that_raises_listing_its_files_is_one_line(tmp_path, capsys):
    host = new_pipeline_host(tmp_path / "host")
    name = f"{__name__}.ListingFailsSource"
    status = main(["run", "--dry", "--dir", str(host), f"study.sources.corpus.name={name}"])
    err = capsys.readouterr().err
    assert status == 2 and err.count("\n") == 1
    assert "raised OSError listing its files: share not mounted" in err


def test_check_with_a_plugin_source_that_raises_is_one_line_exit_two(tmp_path, capsys):
    host = new_pipeline_host(tmp_path / "host")
    before = snapshot(host)
    status = main(
        ["check", "--dir", str(host), f"study.sources.corpus.name={__name__}.RaisingSource"]
    )
    out, err = capsys.readouterr()
    assert status == 2 and out == "" and err.count("\n") == 1
    assert "study.sources.corpus: source" in err and "raised KeyError while reading" in err
    assert snapshot(host) == before
