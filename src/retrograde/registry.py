"""One registry per kind of plug-in (orders, sources, families).

Built-ins register with the :meth:`Registry.register` decorator. Third-party plug-ins are
found through the entry-point group ``retrograde.<kind>s`` or named by a dotted import path
(Hydra's ``_target_`` convention: ``package.module.ClassName``).
"""

from __future__ import annotations

import importlib
from collections.abc import Callable
from importlib.metadata import entry_points
from typing import Any, Generic, TypeVar

from .errors import ConfigError
from .validation import did_you_mean

__all__ = ["Registry"]

T = TypeVar("T")


class Registry(Generic[T]):
    """Maps names to factories (usually classes) of one kind of plug-in."""

    def __init__(self, kind: str, group: str, plural: str | None = None) -> None:
        self.kind = kind  # "order", "source", "family"
        self.plural = plural or f"{kind}s"
        self.group = group  # entry-point group, e.g. "retrograde.orders"
        self._factories: dict[str, Callable[..., T]] = {}
        self._entry_points_loaded = False

    def register(self, name: str) -> Callable[[Callable[..., T]], Callable[..., T]]:
        def decorator(factory: Callable[..., T]) -> Callable[..., T]:
            if name in self._factories and self._factories[name] is not factory:
                raise ValueError(f"{self.kind} {name!r} is registered twice")
            self._factories[name] = factory
            return factory

        return decorator

    def _load_entry_points(self) -> None:
        if self._entry_points_loaded:
            return
        self._entry_points_loaded = True
        for entry in entry_points(group=self.group):
            if entry.name not in self._factories:
                try:
                    self._factories[entry.name] = entry.load()
                except Exception as exc:  # a broken plug-in must not break the built-ins
                    raise ConfigError(
                        f"{self.kind} {entry.name!r} from entry point {entry.value!r} "
                        f"(group {self.group}) failed to load: {exc}"
                    ) from exc

    def names(self) -> list[str]:
        """Sorted names of every registered plug-in (built-ins and entry points)."""
        self._load_entry_points()
        return sorted(self._factories)

    def get(self, name: str) -> Callable[..., T]:
        """The factory for ``name``: a registered name or a dotted import path."""
        self._load_entry_points()
        if name in self._factories:
            return self._factories[name]
        if "." in name:
            return _import_target(self.kind, name)
        known = ", ".join(self.names())
        raise ConfigError(
            f"unknown {self.kind} {name!r}{did_you_mean(name, self._factories)}; "
            f"known {self.plural}: {known}; or give a dotted path as _target_"
        )

    def make(self, name: str, **params: Any) -> T:
        """Build the plug-in ``name`` with keyword parameters."""
        factory = self.get(name)
        try:
            return factory(**params)
        except TypeError as exc:
            if "unexpected keyword argument" in str(exc) or "required" in str(exc):
                raise ConfigError(f"{self.kind} {name!r}: {exc}") from exc
            raise


def _import_target(kind: str, target: str) -> Callable[..., Any]:
    module_name, _, attr = target.rpartition(".")
    try:
        module = importlib.import_module(module_name)
        factory = getattr(module, attr)
    except (ImportError, AttributeError) as exc:
        raise ConfigError(f"{kind} _target_ {target!r} cannot be imported: {exc}") from exc
    if not callable(factory):
        raise ConfigError(f"{kind} _target_ {target!r} is not callable")
    return factory  # type: ignore[no-any-return]
