"""Imports the built-in families so they register."""

from . import (
    command,  # noqa: F401
    mlp,  # noqa: F401
    ngram,  # noqa: F401
    recurrent,  # noqa: F401  (gru, lstm; torch imported lazily)
    transformer,  # noqa: F401  (torch imported lazily)
)
