"""Loading user code named by a spec: ``"module:name"`` or ``"path/to/file.py:name"``.

The one home of the import rules every ``module:function`` key and option follows (verifiers, objectives,
credit functions): the working directory, or the file's folder, goes first on the import path.

Caution: loading a spec imports and runs the named module or file with the rights of the current
process, as ``python file.py`` would. Only load code you have read.
"""
from __future__ import annotations

import importlib
import importlib.util
import os
import sys
from typing import Any


def _import_failure(kind: str, spec: str, what: str, e: BaseException) -> ValueError:
    msg = str(e).strip().splitlines()[0] if str(e).strip() else ""
    return ValueError(f"{kind} {spec!r}: importing {what} raised {type(e).__name__}" + (f": {msg}" if msg else ""))


def load_spec(spec: str, *, what: str = "verifier") -> Any:
    """The object ``"module:name"`` or ``"path/to/file.py:name"`` names (``what``: the kind, for messages).

    * ``"module:name"`` imports ``module`` with the current working directory first on the import
      path, so ``"mine:score"`` finds ``./mine.py`` whichever program runs (the ``bonft`` command included).
    * ``"path/to/file.py:name"`` runs that file as a module with its folder first on the import path
      (``sys.path``), so the file's own imports of its neighbours (``from helpers import ...``) work.

    Both folders stay on ``sys.path`` for the rest of the process (the code may import lazily).
    ``name`` may be dotted (``"pkg.mod:Holder.verify"``). Every failure is one ``ValueError``/``TypeError``
    line naming the spec and the cause (an import error inside the file included).
    """
    if not isinstance(spec, str):
        raise TypeError(f"spec must be a str like 'module:function', got {type(spec).__name__}")
    where, sep, attr = spec.rpartition(":")
    if not sep or not where or not attr:
        raise ValueError(f"spec must look like 'module:function' or 'path/to/file.py:function', got {spec!r}")
    if where.endswith(".py") or os.sep in where or "/" in where:
        if not os.path.isfile(where):
            raise FileNotFoundError(f"spec names the file {where!r}, which does not exist")
        folder = os.path.dirname(os.path.abspath(where))
        _put_first(folder)
        name = f"bonft_user_{what}_" + os.path.splitext(os.path.basename(where))[0]
        mspec = importlib.util.spec_from_file_location(name, where)
        if mspec is None or mspec.loader is None:
            raise ValueError(f"spec names {where!r}, which cannot be imported as a Python file")
        module = importlib.util.module_from_spec(mspec)
        sys.modules[name] = module  # dataclasses / pickling look the module up by name
        try:
            mspec.loader.exec_module(module)
        except Exception as e:  # noqa: BLE001 - one line naming the file and the cause
            sys.modules.pop(name, None)
            raise _import_failure(what, spec, f"the file {where!r} (its folder {folder!r} is first on the import path)", e) from e
    else:
        _put_first(os.getcwd())
        try:
            module = importlib.import_module(where)
        except ModuleNotFoundError as e:
            if e.name is not None and (where == e.name or where.startswith(e.name + ".")):
                raise ValueError(f"spec names the module {where!r}, which cannot be imported ({e}); it is looked up in "
                                 f"the working directory {os.getcwd()!r} and on the import path") from None
            raise _import_failure(what, spec, f"the module {where!r}", e) from e
        except Exception as e:  # noqa: BLE001
            raise _import_failure(what, spec, f"the module {where!r}", e) from e
    obj: Any = module
    for part in attr.split("."):
        try:
            obj = getattr(obj, part)
        except AttributeError:
            raise ValueError(f"spec names {attr!r}, but {where!r} has no attribute {part!r}") from None
    return obj


def _put_first(folder: str) -> None:
    """``folder`` first on ``sys.path`` (moved there when already present), caches of importers refreshed."""
    if folder in sys.path:
        sys.path.remove(folder)
    sys.path.insert(0, folder)
    importlib.invalidate_caches()
