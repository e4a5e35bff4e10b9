"""Reading TOML: the standard library's ``tomllib`` (Python >= 3.11), else its backport ``tomli`` (a dependency
on Python 3.10 only). ``from bonft._core.toml import tomllib``."""
from __future__ import annotations

import sys

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - Python 3.10
    import tomli as tomllib

__all__ = ["tomllib"]
