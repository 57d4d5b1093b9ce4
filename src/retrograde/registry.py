"""One registry per kind of plug-in (orders, sources, families, tokenizers).

Built-ins register with the :meth:`Registry.register` decorator. Third-party plug-ins are
found through the entry-point group ``retrograde.<kind>s`` or named by a dotted import path
(Hydra's ``_target_`` convention: ``package.module.ClassName``).

A config names code, so :meth:`Registry.get` is the one gate every name goes through: what
it returns is always a **class derived from the registry's base class** (``Order``,
``Source``, ``Family``, ``Tokenizer``), checked with ``issubclass`` before anything calls
it. A dotted path to any other callable (``subprocess.run``, ``os.system``, a function of
the user's) is refused without being called. Entry points are loaded one at a time, only
when their name is asked for, so one broken third-party package never breaks a run that
uses only built-ins.
"""

from __future__ import annotations

import importlib
import inspect
from collections.abc import Callable
from importlib.metadata import EntryPoint, entry_points
from typing import Any, Generic, TypeVar

from .errors import ConfigError, PluginError, RetrogradeError
from .validation import did_you_mean

__all__ = ["Registry"]

T = TypeVar("T")


class Registry(Generic[T]):
    """Maps names to the classes of one kind of plug-in, all subclasses of ``base``."""

    def __init__(self, kind: str, group: str, base: type, plural: str | None = None) -> None:
        self.kind = kind  # "order", "source", "family", "tokenizer"
        self.plural = plural or f"{kind}s"
        self.group = group  # entry-point group, e.g. "retrograde.orders"
        self.base = base  # every factory is a subclass of this class
        self._factories: dict[str, Callable[..., T]] = {}
        #: entry points found (not loaded) by name; None until first asked for
        self._entry_points: dict[str, EntryPoint] | None = None

    def register(self, name: str) -> Callable[[Callable[..., T]], Callable[..., T]]:
        def decorator(factory: Callable[..., T]) -> Callable[..., T]:
            if not _derives(factory, self.base):
                raise TypeError(f"{self.kind} {name!r}: {factory!r} is not a {self._base_name}")
            if name in self._factories and self._factories[name] is not factory:
                raise ValueError(f"{self.kind} {name!r} is registered twice")
            self._factories[name] = factory
            return factory

        return decorator

    @property
    def _base_name(self) -> str:
        """The base class by its public path (``retrograde.orders.Order``)."""
        public = [part for part in self.base.__module__.split(".") if not part.startswith("_")]
        return ".".join([*public, self.base.__qualname__])

    def _found_entry_points(self) -> dict[str, EntryPoint]:
        """The group's entry points by name, found but not imported (built-ins win)."""
        if self._entry_points is None:
            found = {entry.name: entry for entry in entry_points(group=self.group)}
            self._entry_points = {k: v for k, v in found.items() if k not in self._factories}
        return self._entry_points

    def names(self) -> list[str]:
        """Sorted names of every registered plug-in (built-ins and entry points, unloaded)."""
        return sorted({*self._factories, *self._found_entry_points()})

    def get(self, name: str) -> Callable[..., T]:
        """The class for ``name``: a registered name, an entry point or a dotted import path.

        Raises
        ------
        ConfigError
            The name is unknown, cannot be imported, or does not name a subclass of the
            registry's base class (checked before anything is called).
        """
        if name in self._factories:
            return self._factories[name]
        entry = self._found_entry_points().get(name)
        if entry is not None:
            factory = self._checked(self._load_entry_point(entry), f"entry point {entry.value!r}")
            self._factories[name] = factory
            return factory
        if "." in name:
            return self._checked(_import_target(self.kind, name), f"_target_ {name!r}")
        known = ", ".join(self.names())
        raise ConfigError(
            f"unknown {self.kind} {name!r}{did_you_mean(name, self.names())}; "
            f"known {self.plural}: {known}; or give a dotted path as _target_"
        )

    def _load_entry_point(self, entry: EntryPoint) -> Any:
        try:
            return entry.load()
        except Exception as exc:  # a broken plug-in fails only when it is used
            raise ConfigError(
                f"{self.kind} {entry.name!r} from entry point {entry.value!r} (group "
                f"{self.group}) failed to load ({type(exc).__name__}: {exc}); fix or "
                "uninstall the package that declares it"
            ) from exc

    def _checked(self, factory: Any, what: str) -> Callable[..., T]:
        """``factory`` if it is a subclass of the base class; refused otherwise, uncalled."""
        if _derives(factory, self.base):
            if factory is not self.base and not inspect.isabstract(factory):
                return factory  # type: ignore[no-any-return]
            raise ConfigError(
                f"{self.kind} {what} names the abstract class {factory.__qualname__!r}; name "
                f"a concrete class derived from {self._base_name}"
            )
        shown = getattr(factory, "__qualname__", None) or getattr(factory, "__name__", "?")
        kind = "class" if isinstance(factory, type) else type(factory).__name__
        raise ConfigError(
            f"{self.kind} {what} names {shown!r} (a {kind}), not a subclass of "
            f"{self._base_name}; only {self.plural} may be built from a config: name a "
            f"class derived from {self.base.__qualname__}"
        )

    def make(self, name: str, **params: Any) -> T:
        """Build the plug-in ``name`` with keyword parameters.

        A plug-in from outside retrograde whose constructor raises anything but a
        :class:`~retrograde.errors.RetrogradeError` gives a one-line :class:`PluginError`.
        """
        factory = self.get(name)
        try:
            return factory(**params)
        except RetrogradeError:
            raise
        except TypeError as exc:
            if "unexpected keyword argument" in str(exc) or "required" in str(exc):
                raise ConfigError(f"{self.kind} {name!r}: {exc}") from exc
            if _is_builtin(factory):
                raise
            raise _plugin_error(self.kind, name, exc) from exc
        except Exception as exc:
            if _is_builtin(factory):
                raise  # a bug of ours: keep the traceback
            raise _plugin_error(self.kind, name, exc) from exc


def _derives(factory: Any, base: type) -> bool:
    """Whether ``factory`` is a class derived from ``base`` (nothing is called)."""
    return isinstance(factory, type) and issubclass(factory, base)


def _is_builtin(factory: Any) -> bool:
    return str(getattr(factory, "__module__", "")).split(".")[0] == "retrograde"


def _plugin_error(kind: str, name: str, exc: Exception) -> PluginError:
    return PluginError(
        f"{kind} {name!r} raised {type(exc).__name__} when built: {exc}; fix the plug-in or "
        "its parameters (--debug shows the traceback)"
    )


def _import_target(kind: str, target: str) -> Any:
    module_name, _, attr = target.rpartition(".")
    try:
        module = importlib.import_module(module_name)
        return getattr(module, attr)
    except Exception as exc:  # ImportError, AttributeError, or the module's own failure
        raise ConfigError(
            f"{kind} _target_ {target!r} cannot be imported ({type(exc).__name__}: {exc}); "
            "check the dotted path and that its package is installed"
        ) from exc
