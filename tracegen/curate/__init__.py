"""Curating corpora: audit, leak-free splits and widening where a corpus is thin.

``audit(traces, against=..., mix=...)`` -> AuditResult; ``split(traces, by=..., parts=...)`` ->
SplitResult; ``widen(model, goals, ...)`` -> WidenResult (goals from ``goals_from_audit`` or
``CellGoal(key, windows)``); cells are read with a ``CellScheme``; target mixes with ``read_mix``.
"""

from .audit import AuditResult, audit
from .cells import CellScheme, cell_table
from .duplicates import find_duplicates
from .mix import TargetMix, read_mix
from .split import SplitResult, split
from .widen import CellGoal, WidenResult, goals_from_audit, widen

__all__ = ["audit", "AuditResult", "split", "SplitResult", "widen", "WidenResult", "CellGoal", "goals_from_audit",
           "CellScheme", "cell_table", "find_duplicates", "read_mix", "TargetMix"]
