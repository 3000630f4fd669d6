"""Progress bars for long work: shown on a terminal, silent in pipes and files."""

from __future__ import annotations

import contextlib
import sys
from typing import Iterable, Iterator, TypeVar

import click

T = TypeVar("T")


def wanted(enabled: bool | None = None) -> bool:
    """Show a bar? ``None`` means: only when standard error is a terminal."""
    if enabled is not None:
        return enabled
    return sys.stderr.isatty()


@contextlib.contextmanager
def bar(items: Iterable[T], *, label: str, length: int | None = None,
        enabled: bool | None = None) -> Iterator[Iterable[T]]:
    """A click progress bar over ``items`` on standard error, or the items untouched when not wanted."""
    if not wanted(enabled):
        yield items
        return
    with click.progressbar(items, label=label, length=length, file=sys.stderr) as shown:
        yield shown
