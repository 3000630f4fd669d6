"""Measuring the gap between a synthetic (or training) set and field traces: features, distances, the
noise floor and the report. ``tracegen.coverage(real, synthetic, ...) -> CoverageResult``."""

from typing import Any

__all__ = ["coverage", "CoverageResult"]


def __getattr__(name: str) -> Any:  # imported on first use, so the submodules load on their own
    if name in __all__:
        from . import gap

        return getattr(gap, name)
    raise AttributeError(name)
