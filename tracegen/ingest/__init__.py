"""Readers for measured formats. Each module reads one format into Traces.

A reader module has ``OPTIONS`` (its format options and their defaults), ``PATTERNS`` (file names it
takes from a directory), ``read(path, labels, **options) -> list[Trace]`` and
``describe(path, labels, **options) -> str`` (a dry run: what would be read, nothing stored).
"""

from __future__ import annotations

import importlib
from pathlib import Path
from types import ModuleType
from typing import Any, Iterable

from ..errors import InputError
from ..trace import Trace
from .common import Labels

FORMATS = {"csv": "delimited", "rtcp": "rtcp", "ping": "ping", "packets": "packets"}

__all__ = ["FORMATS", "Labels", "reader", "read_file", "describe_file", "expand_paths", "check_options", "option_flag"]


def reader(fmt: str) -> ModuleType:
    """The reader module for a format name."""
    if fmt not in FORMATS:
        raise InputError(f"unknown format '{fmt}'", field="format", hint=f"use one of: {', '.join(FORMATS)}")
    return importlib.import_module(f"{__name__}.{FORMATS[fmt]}")


_FLAGS = {"tag_columns": "--tag-column", "interval_s": "--interval"}


def option_flag(name: str) -> str:
    """The command-line flag of a reader option."""
    return _FLAGS.get(name, "--" + name.replace("_", "-"))


def check_options(fmt: str, options: dict[str, Any]) -> dict[str, Any]:
    """Reject options that do not apply to ``fmt``; return the options with the reader's defaults filled."""
    mod = reader(fmt)
    given = {k: v for k, v in options.items() if v is not None}
    wrong = sorted(set(given) - set(mod.OPTIONS))
    if wrong:
        names = ", ".join(option_flag(w) for w in wrong)
        raise InputError(f"option {names} does not apply to format '{fmt}'", field="format",
                         hint=f"{fmt} takes: {', '.join(option_flag(o) for o in mod.OPTIONS) or 'no options'}")
    return {**mod.OPTIONS, **given}


def read_file(path: str | Path, fmt: str, labels: Labels | None = None, **options: Any) -> list[Trace]:
    """Read one measured file into one or more Traces (validated, personal fields handled)."""
    opts = check_options(fmt, options)
    return reader(fmt).read(Path(path), labels or Labels(), **opts)


def describe_file(path: str | Path, fmt: str, labels: Labels | None = None, **options: Any) -> str:
    """A dry run of :func:`read_file`: what would be read, as text. Nothing is stored."""
    opts = check_options(fmt, options)
    return reader(fmt).describe(Path(path), labels or Labels(), **opts)


def expand_paths(paths: Iterable[str | Path], fmt: str) -> list[Path]:
    """Files to read: files as given, directories searched (recursively, sorted) for the format's files."""
    mod = reader(fmt)
    out: list[Path] = []
    for raw in paths:
        p = Path(raw)
        if p.is_dir():
            found = sorted({f for pat in mod.PATTERNS for f in p.rglob(pat)
                            if f.is_file() and not any(part.startswith(".") for part in f.relative_to(p).parts)})
            if not found:
                raise InputError(f"holds no files matching {', '.join(mod.PATTERNS)}", path=str(p),
                                 hint=f"is --format {fmt} right?")
            out.extend(found)
        elif p.exists():
            out.append(p)
        else:
            raise InputError("no such file or directory", path=str(p))
    return out
