"""Stream a text file as numbered lines with bounded memory.

Every reader goes through here, so every reader has the same guarantees: a line longer than the limit
fails fast without being held in memory, bytes that are not UTF-8 fail with the line that holds them, a
compressed file (gzip, xz, zstd, zip) fails saying so, and line numbers are 1-based as an editor shows them.
"""

from __future__ import annotations

import hashlib
from pathlib import Path
from typing import Iterator

from ..errors import InputError

MAX_LINE_BYTES = 1 << 20  # 1 MiB: far above any real log line, small enough to never matter for memory
_CHUNK = 1 << 20
# magic bytes that start compressed files, never a text log -> what the file is, and how to open it
_COMPRESSED = {
    b"\x1f\x8b": ("gzip-compressed", "decompress it first, e.g. gunzip -k FILE"),
    b"\xfd7zXZ\x00": ("xz-compressed", "decompress it first, e.g. unxz -k FILE"),
    b"\x28\xb5\x2f\xfd": ("zstd-compressed", "decompress it first, e.g. unzstd FILE"),
    b"PK\x03\x04": ("a zip archive (or a spreadsheet such as .xlsx)", "unzip it, or export the sheet as CSV"),
}


def file_sha256(path: str | Path) -> str:
    """Hex sha256 of a file's bytes, read in chunks."""
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(_CHUNK), b""):
            h.update(block)
    return h.hexdigest()


def iter_lines(path: str | Path, *, max_line_bytes: int = MAX_LINE_BYTES) -> Iterator[tuple[int, str]]:
    """Yield ``(line_number, text)`` for each line, without its line ending.

    A UTF-8 byte-order mark at the start is skipped. Raises InputError for a line over ``max_line_bytes``
    or bytes that do not decode as UTF-8.
    """
    path = str(path)
    try:
        f = open(path, "rb")
    except FileNotFoundError:
        raise InputError("no such file", path=path, hint="check the path") from None
    except IsADirectoryError:
        raise InputError("is a directory", path=path, hint="pass the files inside it") from None
    except OSError as exc:
        raise InputError(f"cannot be opened ({exc.strerror})", path=path) from None
    with f:
        lineno = 0
        pending = b""
        first = True
        while True:
            block = f.read(_CHUNK)
            if not block:
                break
            if not lineno and not pending:  # the file's first bytes
                _refuse_compressed(block, path)
            buf = pending + block
            parts = buf.split(b"\n")
            pending = parts.pop()
            if len(pending) > max_line_bytes:
                raise InputError(f"line is longer than {max_line_bytes} bytes", path=path,
                                 line=lineno + len(parts) + 1,
                                 hint="this is not a line-oriented log, or it lacks line breaks")
            for raw in parts:
                lineno += 1
                if len(raw) > max_line_bytes:
                    raise InputError(f"line is longer than {max_line_bytes} bytes", path=path,
                                     line=lineno, hint="this is not a line-oriented log")
                yield lineno, _decode(raw, path, lineno, first)
                first = False
        if pending:
            lineno += 1
            yield lineno, _decode(pending, path, lineno, first)


def _refuse_compressed(head: bytes, path: str) -> None:
    for magic, (what, hint) in _COMPRESSED.items():
        if head.startswith(magic):
            raise InputError(f"is {what}, not text", path=path, line=1, hint=hint.replace("FILE", Path(path).name))


def _decode(raw: bytes, path: str, lineno: int, first: bool) -> str:
    if first and raw.startswith(b"\xef\xbb\xbf"):
        raw = raw[3:]
    if raw.endswith(b"\r"):
        raw = raw[:-1]
    try:
        return raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise InputError(f"byte {exc.start + 1} is not valid UTF-8 (0x{raw[exc.start]:02x})", path=path,
                         line=lineno, hint="convert the file to UTF-8, e.g. with iconv") from None
