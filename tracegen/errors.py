"""One exception family: every failure a user can cause is a TracegenError.

The message always says where (file, line, field) and what to do, so the CLI can print it as one line.
"""

from __future__ import annotations

from pathlib import Path


class TracegenError(Exception):
    """A failure the user can act on.

    ``path``, ``line`` and ``field`` locate the problem; ``hint`` says what to do about it.
    """

    def __init__(
        self,
        message: str,
        *,
        path: str | Path | None = None,
        line: int | None = None,
        field: str | None = None,
        hint: str | None = None,
    ) -> None:
        self.message = message
        self.path = None if path is None else str(path)
        self.line = line
        self.field = field
        self.hint = hint
        super().__init__(self.__str__())

    def __str__(self) -> str:
        where = ""
        if self.path is not None:
            where = self.path
            if self.line is not None:
                where += f":{self.line}"
            where += ": "
        elif self.line is not None:
            where = f"line {self.line}: "
        what = f"field '{self.field}': " if self.field else ""
        text = f"{where}{what}{self.message}"
        if self.hint:
            text += f" ({self.hint})"
        return text

    def __reduce__(self):  # keep the fields when an error travels back from a worker process
        return _rebuild, (type(self), self.message, self.path, self.line, self.field, self.hint)


def _rebuild(cls: type, message: str, path: str | None, line: int | None, field: str | None,
             hint: str | None) -> TracegenError:
    return cls(message, path=path, line=line, field=field, hint=hint)


def check_seed(seed: object, name: str = "seed") -> int:
    """``seed`` as an int, or a TracegenError naming ``name`` unless it is an integer in 0 .. 2**32 - 1
    (the range every random generator tracegen seeds accepts)."""
    import numbers

    if isinstance(seed, bool) or not isinstance(seed, numbers.Integral) or not 0 <= int(seed) <= MAX_SEED:
        raise TracegenError(f"must be an integer from 0 to {MAX_SEED}, got {seed!r}", field=name)
    return int(seed)


MAX_SEED = 2**32 - 1


class InputError(TracegenError):
    """A measured file or option that cannot be read as given."""


class CatalogError(TracegenError):
    """A catalog that is missing, locked, inconsistent or asked for something it does not hold."""


class SelectionError(TracegenError):
    """A selection expression that cannot be parsed or names an unknown field."""
