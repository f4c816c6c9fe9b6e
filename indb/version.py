"""The package version, in a module of its own so that any module can read it without
importing the package's ``__init__`` (which imports the API). ``pyproject.toml`` reads it."""

from __future__ import annotations

__version__ = "0.2.0"
