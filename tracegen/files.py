"""Writing a text file so that no reader ever sees half of it: a temporary name beside it, then a rename."""

from __future__ import annotations

import contextlib
import os
from pathlib import Path

from .errors import TracegenError


def refuse_existing(*paths: str | Path | None, force: bool) -> None:
    """Before any work: a TracegenError when one output path is given twice, or exists and ``force`` is off."""
    seen: set[Path] = set()
    for p in paths:
        if p is None:
            continue
        key = Path(p).resolve()
        if key in seen:
            raise TracegenError("is given for two outputs", path=p, hint="give each output its own file")
        seen.add(key)
        if key.exists() and not force:
            raise TracegenError("exists already", path=p, hint="pass --force to replace it")


def write_text_atomic(path: str | Path, text: str, *, error: type[TracegenError] = TracegenError) -> Path:
    """Write ``text`` (UTF-8) to ``path``, creating its folder; ``error`` names the path on failure."""
    path = Path(path)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp.write_text(text, encoding="utf-8")
        os.replace(tmp, path)
    except OSError as exc:
        with contextlib.suppress(OSError):  # e.g. the parent is a file: there is no temporary file to remove
            tmp.unlink(missing_ok=True)
        raise error(f"cannot be written ({exc.strerror})", path=path) from None
    return path
