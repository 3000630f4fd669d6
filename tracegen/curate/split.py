"""Leak-free, stratified train/validation/test splits.

Whole groups go to one side each (a group is whatever ``by`` names: the trace's group, source, id or a
tag), so windows of one recording session never sit on both sides of a split. Within that constraint the
groups are placed so every part's mix of condition cells (cells.py) is as close as possible to a scaled
copy of the whole corpus. The objective is the *stratification error*

    E = 1/(2N) * sum_k sum_c |n_kc - p_k * N_c|

with ``n_kc`` the windows of part k in cell c, ``N_c`` the windows of cell c, ``N`` all windows and ``p_k``
the share asked for part k. E lies in [0, 1]: it is the share of windows that would have to move for
every part to be a perfect scaled copy of the whole (0 when it is).

Traces whose samples are identical (same id) but carry different groups join those groups, so one
recording cannot land on two sides; the notes say so. A trace too short for any window (or with none
usable) still needs a side: it counts ``duration / window`` windows in a pseudo-cell of its own.

Search. When ``parts ** groups <= exact_limit`` every assignment is enumerated and the best returned (the
first in enumeration order among equal ones). Otherwise a seeded heuristic: a greedy start (largest
groups first, each into the part that lowers E most, ties broken at random from the seed), then local
search with single-group moves and pairwise swaps until none lowers E; several restarts (the first in
strict size order, the rest with sizes randomly perturbed by a factor 0.5-1.5), keeping the best. For
hundreds of groups the restarts after the first stop once a fixed amount of work is spent (WORK_BUDGET;
counted, not timed, so the result stays the same on any machine).

Guarantee tested (tests/test_curate_split.py, against a brute force over every assignment, on random
structures of 2-10 groups, 1-5 cells and 2-3 parts, with the heuristic forced): no group in two parts,
no part empty, and

    E(returned) <= E(best) + max_g N_g / N

i.e. within one largest group's share of the best possible split. The exact path returns E(best) itself.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Sequence

import numpy as np
import pandas as pd

from ..errors import TracegenError, check_seed
from ..files import write_text_atomic
from ..trace import Trace
from .cells import CellScheme, cell_table

FORMAT_NAME = "tracegen-split"
FORMAT_VERSION = 1
SHORT_CELL = "(shorter than a window)"
UNUSABLE_CELL = "(no usable window)"
RESTARTS = 8
# Further restarts are skipped once the search has weighed this many group-cell values (a few seconds);
# it only binds for hundreds of groups, where a restart changes E by little.
WORK_BUDGET = 500_000_000
SUM_TOLERANCE = 1e-6
MISSING_HINT_GROUP = "give every trace a group (tracegen ingest --group ...) or split by another field"


# --------------------------------------------------------------------------------------------------
# the objective and the search


def _check_parts(parts: Sequence[float]) -> np.ndarray:
    try:
        p = np.array([float(x) for x in parts], dtype=np.float64)
    except (TypeError, ValueError):
        raise TracegenError(f"shares {parts!r} must be numbers", field="parts", hint="e.g. 0.7,0.15,0.15") from None
    if p.size < 2:
        raise TracegenError(f"a split needs at least two parts, got {p.size}", field="parts",
                            hint="e.g. 0.7,0.15,0.15")
    bad = [x for x in p.tolist() if not (math.isfinite(x) and x > 0)]
    if bad:
        raise TracegenError(f"share {bad[0]:g} must be a finite number above 0", field="parts",
                            hint="give every part a positive share, e.g. 0.7,0.15,0.15")
    if abs(p.sum() - 1.0) > SUM_TOLERANCE:
        raise TracegenError(f"shares {[round(x, 6) for x in p.tolist()]} sum to {p.sum():g}, not 1", field="parts",
                            hint="make the shares add up to 1, e.g. 0.7,0.15,0.15")
    return p


def _check_counts(counts: Any, n_parts: int) -> np.ndarray:
    x = np.asarray(counts, dtype=np.float64)
    if x.ndim != 2:
        raise TracegenError(f"counts must be a (groups, cells) table, got {x.ndim} dimension(s)", field="counts")
    if not np.all(np.isfinite(x)) or np.any(x < 0):
        raise TracegenError("counts must be finite and >= 0", field="counts")
    if x.shape[0] < n_parts:
        raise TracegenError(f"{n_parts} parts asked but there are only {x.shape[0]} groups", field="parts",
                            hint="ask for fewer parts or split by a finer field")
    return x


def _part_sums(counts: np.ndarray, assignment: np.ndarray, n_parts: int) -> np.ndarray:
    out = np.zeros((n_parts, counts.shape[1]))
    np.add.at(out, assignment, counts)
    return out


def stratification_error(counts: Any, assignment: Any, parts: Sequence[float]) -> float:
    """E = 1/(2N) sum_k sum_c |n_kc - p_k N_c| of an assignment of groups (rows of ``counts``) to parts;
    0 when nothing is counted."""
    p = np.asarray(parts, dtype=np.float64)
    x = np.asarray(counts, dtype=np.float64)
    a = np.asarray(assignment, dtype=np.int64)
    if x.ndim != 2 or a.shape != (x.shape[0],) or (a.size and (a.min() < 0 or a.max() >= p.size)):
        raise TracegenError(f"assignment must give each of the {x.shape[0] if x.ndim == 2 else '?'} groups a "
                            f"part number 0..{p.size - 1}", field="assignment")
    total = x.sum()
    if total <= 0:
        return 0.0
    n = _part_sums(x, a, p.size)
    return float(np.abs(n - p[:, None] * x.sum(axis=0)).sum() / (2.0 * total))


def _exhaustive(x: np.ndarray, p: np.ndarray) -> np.ndarray:
    """The best assignment over all ``K ** G`` (every part non-empty), in chunks."""
    n_groups, n_cells = x.shape
    k = p.size
    target = p[:, None] * x.sum(axis=0)
    place = k ** np.arange(n_groups - 1, -1, -1, dtype=np.int64)  # group 0 is the most significant digit
    rows = max(1, 2 ** 18 // (n_groups * k + k * n_cells))
    best_e, best_i = math.inf, -1
    for start in range(0, k ** n_groups, rows):  # a loop over chunks of assignments
        idx = np.arange(start, min(start + rows, k ** n_groups), dtype=np.int64)
        digits = (idx[:, None] // place[None, :]) % k
        onehot = (digits[:, :, None] == np.arange(k)[None, None, :]).astype(np.float64)
        full = onehot.any(axis=1).all(axis=1)
        if not full.any():
            continue
        sums = np.einsum("agk,gc->akc", onehot, x)
        e = np.abs(sums - target[None]).sum(axis=(1, 2))
        e[~full] = math.inf
        i = int(np.argmin(e))
        if e[i] < best_e - _tol(x):
            best_e, best_i = float(e[i]), int(idx[i])
    return (best_i // place) % k


def _tol(x: np.ndarray) -> float:
    # improvements smaller than this (in windows) are rounding, not progress
    return 1e-9 * max(1.0, float(x.sum()))


def _greedy(x: np.ndarray, p: np.ndarray, order: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    n_groups = x.shape[0]
    k = p.size
    target = p[:, None] * x.sum(axis=0)
    sums = np.zeros_like(target)
    out = np.full(n_groups, -1, dtype=np.int64)
    used = np.zeros(k, dtype=bool)
    tol = _tol(x)
    for i, g in enumerate(order):  # a loop over groups
        delta = np.abs(sums + x[g] - target).sum(axis=1) - np.abs(sums - target).sum(axis=1)
        if (~used).sum() >= n_groups - i:  # as many groups left as empty parts: fill those
            delta[used] = math.inf
        ties = np.flatnonzero(delta <= delta.min() + tol)
        part = int(ties[rng.integers(ties.size)]) if ties.size > 1 else int(ties[0])
        out[g] = part
        used[part] = True
        sums[part] += x[g]
    return out


def _best_swap(x: np.ndarray, r: np.ndarray, f: np.ndarray, a: np.ndarray,
               tol: float) -> tuple[tuple[int, int] | None, int]:
    """A pair of groups in different parts whose swap lowers E by more than ``tol``: the best one of the
    first chunk that holds any (parts taken pairwise, groups in chunks), or None; and the work done
    (group pairs times cells weighed)."""
    k = r.shape[0]
    work = 0
    members = [np.flatnonzero(a == j) for j in range(k)]
    for pa in range(k):  # a loop over pairs of parts, then over chunks of groups
        for pb in range(pa + 1, k):
            xb = x[members[pb]]
            rows = max(1, 2 ** 20 // max(1, xb.size))
            for start in range(0, members[pa].size, rows):
                ga = members[pa][start:start + rows]
                d = xb[None, :, :] - x[ga][:, None, :]  # d[i, j]: what part pa gains by the swap
                gain = np.abs(r[pa] + d).sum(axis=2) + np.abs(r[pb] - d).sum(axis=2) - f[pa] - f[pb]
                work += d.size
                i, j = np.unravel_index(int(np.argmin(gain)), gain.shape)
                if gain[i, j] < -tol:
                    return (int(ga[i]), int(members[pb][j])), work
    return None, work


def _local_search(x: np.ndarray, p: np.ndarray, assignment: np.ndarray) -> tuple[np.ndarray, int]:
    """Single moves and pairwise swaps that lower E, until none does (no part is ever emptied). Moves are
    cheap, so the best move is taken while one helps; swaps only when no move does. Also returns the
    work done (group-cell values weighed)."""
    n_groups = x.shape[0]
    work = 0
    k = p.size
    a = assignment.copy()
    target = p[:, None] * x.sum(axis=0)
    tol = _tol(x)
    while True:  # each round lowers E by more than tol, so it ends
        r = _part_sums(x, a, k) - target
        f = np.abs(r).sum(axis=1)
        size = np.bincount(a, minlength=k)
        away = np.abs(r[a] - x).sum(axis=1) - f[a]
        move = away[:, None] + np.abs(r[None, :, :] + x[:, None, :]).sum(axis=2) - f[None, :]
        move[np.arange(n_groups), a] = math.inf
        move[size[a] == 1, :] = math.inf
        work += move.size * x.shape[1]
        g, b = np.unravel_index(int(np.argmin(move)), move.shape)
        if move[g, b] < -tol:
            a[g] = b
            continue
        pair, spent = _best_swap(x, r, f, a, tol)
        work += spent
        if pair is None:
            return a, work
        g, h = pair
        a[g], a[h] = a[h], a[g]


def assign_groups(counts: Any, parts: Sequence[float], seed: int = 0, *, exact_limit: int = 4096) -> np.ndarray:
    """The part (0..K-1) of each group (row of ``counts``: its windows in each cell) that minimises the
    stratification error, every part getting at least one group (module docstring). Deterministic for a
    seed; exhaustive when ``len(parts) ** groups <= exact_limit``."""
    p = _check_parts(parts)
    x = _check_counts(counts, p.size)
    if p.size ** x.shape[0] <= exact_limit:
        return _exhaustive(x, p)
    rng = np.random.default_rng(seed)
    sizes = x.sum(axis=1)
    best, best_e, work = None, math.inf, 0
    for restart in range(RESTARTS):  # a loop over restarts
        if restart and work > WORK_BUDGET:
            break
        weight = sizes if restart == 0 else sizes * rng.uniform(0.5, 1.5, sizes.size)
        shuffled = rng.permutation(x.shape[0])  # random order among equal sizes
        order = shuffled[np.argsort(-weight[shuffled], kind="stable")]
        a, spent = _local_search(x, p, _greedy(x, p, order, rng))
        work += spent
        e = stratification_error(x, a, p)
        if e < best_e - 1e-12:
            best, best_e = a, e
    return best


# --------------------------------------------------------------------------------------------------
# traces to groups


def _value(tr: Trace, field: str, tag: str | None) -> str:
    if tag is not None:
        v = tr.tags.get(tag)
    elif field == "id":
        v = tr.id
    else:
        v = getattr(tr, field)
    return "" if v is None else str(v)


def _keys(traces: Sequence[Trace], by: str) -> list[str]:
    """The value of ``by`` for every trace; TracegenError when some have none."""
    if not isinstance(by, str) or not by.strip():
        raise TracegenError(f"cannot split by {by!r}", field="by", hint="use group, source, id or a tag name")
    by = by.strip()
    if by.startswith("tag."):
        field, tag = by, by[4:]
    elif by in ("group", "source", "id"):
        field, tag = by, None
    else:
        field, tag = by, by
    keys = [_value(tr, field, tag) for tr in traces]  # a loop over traces
    missing = [tr.id for tr, k in zip(traces, keys) if not k]
    if tag is not None and len(missing) == len(traces):
        tags = sorted({name for tr in traces for name in tr.tags})
        raise TracegenError(f"no trace has a tag '{tag}'", field="by",
                            hint=f"tags present: {', '.join(tags)}; or split by group, source or id" if tags
                            else "the traces carry no tags; split by group, source or id")
    if missing:
        shown = ", ".join(missing[:5]) + (", ..." if len(missing) > 5 else "")
        what = {"group": "a group", "source": "a source"}.get(field, f"a tag '{tag}'")
        hint = MISSING_HINT_GROUP if field == "group" else f"give every trace {what} or split by another field"
        raise TracegenError(f"{len(missing)} of {len(traces)} traces have no {field}: {shown}", field="by",
                            hint=hint)
    return keys


def _join_shared(keys: list[str], traces: Sequence[Trace]) -> tuple[list[str], np.ndarray, list[str]]:
    """Union of the groups that hold the same samples (trace id). Returns the sorted distinct keys, the
    joined group number of each key, and a note per join."""
    labels = sorted(set(keys))
    index = {k: i for i, k in enumerate(labels)}
    parent = list(range(len(labels)))

    def root(i: int) -> int:
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    seen: dict[str, int] = {}
    shared: dict[tuple[int, int], str] = {}
    for tr, key in sorted(zip(traces, keys), key=lambda tk: (tk[0].id, tk[1])):  # a loop over traces
        i = index[key]
        if tr.id in seen and seen[tr.id] != i:
            pair = (seen[tr.id], i)
            shared.setdefault(pair, tr.id)
            a, b = root(pair[0]), root(pair[1])
            if a != b:
                parent[max(a, b)] = min(a, b)
        seen.setdefault(tr.id, i)
    notes = [f"joined groups {labels[a]} and {labels[b]}: they hold identical samples (trace id {tid}); "
             f"leakage refused" for (a, b), tid in sorted(shared.items())]
    roots = np.array([root(i) for i in range(len(labels))], dtype=np.int64)
    return labels, np.unique(roots, return_inverse=True)[1].reshape(-1), notes


# --------------------------------------------------------------------------------------------------
# the result


def _share(x: float) -> str:
    return f"{100 * x:.0f}%"


@dataclass(frozen=True)
class SplitResult:
    """A split: ``manifest`` (id, split, group; sorted by id), the part names and shares asked, per-part
    ``balance`` rows, the stratification error and notes on what was joined or could not be met."""

    manifest: pd.DataFrame
    parts: tuple[str, ...]
    asked: tuple[float, ...]
    balance: tuple[dict[str, Any], ...]
    error: float
    notes: tuple[str, ...]
    by: str
    seed: int
    cells: tuple[str, ...] = ()

    def to_data(self) -> dict[str, Any]:
        """Everything as plain values (for JSON)."""
        return {"format": FORMAT_NAME, "version": FORMAT_VERSION, "by": self.by, "seed": self.seed,
                "parts": list(self.parts), "asked": [float(a) for a in self.asked],
                "error": round(float(self.error), 6), "balance": [dict(b) for b in self.balance],
                "notes": list(self.notes), "cells": list(self.cells),
                "manifest": [{"id": i, "split": s, "group": g} for i, s, g in
                             self.manifest[["id", "split", "group"]].itertuples(index=False)]}

    def summary_text(self) -> str:
        """A small table for the terminal."""
        head = ("part", "traces", "groups", "windows", "hours", "asked", "got", "cell TV")
        rows = [(b["part"], str(b["traces"]), str(b["groups"]), f"{b['windows']:.0f}", f"{b['hours']:.2f}",
                 _share(b["share_asked"]), _share(b["share_got"]), f"{b['cell_tv']:.3f}") for b in self.balance]
        width = [max(len(r[i]) for r in [head, *rows]) for i in range(len(head))]

        def line(r: tuple[str, ...]) -> str:
            return "  ".join(v.ljust(w) if i == 0 else v.rjust(w) for i, (v, w) in enumerate(zip(r, width)))

        title = (f"split by {self.by}, seed {self.seed}: stratification error {self.error:.3f} "
                 f"(share of windows that would have to move)")
        out = [title, line(head)] + [line(r) for r in rows]
        out += [f"note: {n}" for n in self.notes]
        return "\n".join(out) + "\n"

    def write(self, path: str | Path, force: bool = False) -> Path:
        """Write the manifest as CSV (``.csv``) or Parquet (``.parquet``), atomically; an existing file only
        with ``force``."""
        path = Path(path)
        suffix = path.suffix.lower()
        if suffix not in (".csv", ".parquet"):
            raise TracegenError(f"cannot tell the format from the suffix '{path.suffix}'", path=path,
                                hint="name the file .csv or .parquet")
        if path.exists() and not force:
            raise TracegenError("exists already", path=path, hint="pass --force to replace it")
        frame = self.manifest[["id", "split", "group"]]
        if suffix == ".csv":
            return write_text_atomic(path, frame.to_csv(index=False, lineterminator="\n"))
        import pyarrow as pa
        import pyarrow.parquet as pq

        tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
            pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), tmp)
            os.replace(tmp, path)
        except OSError as exc:
            tmp.unlink(missing_ok=True)
            raise TracegenError(f"cannot be written ({exc.strerror or exc})", path=path) from None
        return path


def _names(names: Sequence[str] | None, k: int) -> tuple[str, ...]:
    if names is None:
        return {2: ("train", "test"), 3: ("train", "validation", "test")}.get(k) or \
            tuple(f"part{i + 1}" for i in range(k))
    out = tuple(str(n) for n in names)
    if len(out) != k:
        raise TracegenError(f"{len(out)} names given for {k} parts", field="names",
                            hint="give one name per share, e.g. train,validation,test")
    if len(set(out)) != len(out) or any(not n.strip() for n in out):
        raise TracegenError(f"names {list(out)} must be distinct and not empty", field="names")
    return out


def _trace_counts(traces: Sequence[Trace], scheme: CellScheme,
                  step_s: float | None) -> tuple[list[str], np.ndarray, list[str]]:
    """Window counts of each trace per cell; a trace with no window counts ``duration / window`` in a
    pseudo-cell so it still weighs in."""
    table = cell_table(traces, scheme, step_s)
    counts = table.counts(len(traces)).astype(np.float64)
    keys = list(table.keys)
    empty = counts.sum(axis=1) == 0
    if empty.any():
        m = max(1, round(scheme.scale_s / table.step_s))
        n_samples = np.array([len(tr) for tr in traces])  # a loop over traces
        length = np.array([tr.duration_s for tr in traces]) / scheme.scale_s
        for name, rows in ((SHORT_CELL, empty & (n_samples < m)), (UNUSABLE_CELL, empty & (n_samples >= m))):
            if rows.any():
                keys.append(name)
                counts = np.column_stack([counts, np.where(rows, length, 0.0)])
    return keys, counts, list(table.notes)


def split(traces: Sequence[Trace], *, by: str = "group", parts: Sequence[float] = (0.7, 0.15, 0.15),
          names: Sequence[str] | None = None, seed: int = 0, scheme: CellScheme | None = None,
          step_s: float | None = None) -> SplitResult:
    """Split ``traces`` into parts with whole groups on each side and every part's cell mix close to the
    whole's (module docstring). Same traces and seed give the same split."""
    traces = list(traces)
    check_seed(seed)
    if not traces:
        raise TracegenError("no traces to split", field="traces", hint="check the selection or the folder")
    p = _check_parts(parts)
    part_names = _names(names, p.size)
    scheme = scheme or CellScheme()
    keys = _keys(traces, by)
    labels, joined, notes = _join_shared(keys, traces)
    n_groups = int(joined.max()) + 1
    if n_groups < p.size:
        raise TracegenError(f"{p.size} parts asked but the traces form only {n_groups} group"
                            f"{'s' if n_groups != 1 else ''} by {by}", field="parts",
                            hint="ask for fewer parts or split by a finer field (e.g. --by id)")
    label_of = {k: i for i, k in enumerate(labels)}
    group_of_trace = joined[np.array([label_of[k] for k in keys])]
    cells, counts, cell_notes = _trace_counts(traces, scheme, step_s)
    per_group = np.zeros((n_groups, counts.shape[1]))
    np.add.at(per_group, group_of_trace, counts)
    assignment = assign_groups(per_group, p, seed)
    part_of_trace = assignment[group_of_trace]

    group_name = [" + ".join(labels[i] for i in np.flatnonzero(joined == g)) for g in range(n_groups)]
    total = per_group.sum()
    whole = per_group.sum(axis=0)
    sums = _part_sums(per_group, assignment, p.size)
    got = sums.sum(axis=1) / total if total > 0 else np.zeros(p.size)
    for k in range(p.size):  # a loop over parts
        members = np.flatnonzero(assignment == k)
        big = members[np.argmax(per_group[members].sum(axis=1))]
        share = per_group[big].sum() / total if total > 0 else 0.0
        if share > p[k] + 0.005:  # by half a percentage point or more, so the printed shares differ
            notes.append(f"group {group_name[big]} holds {_share(share)} of the windows; kept whole, so "
                         f"'{part_names[k]}' gets {_share(got[k])} instead of {_share(p[k])}")
    notes += cell_notes

    hours = np.array([tr.duration_s for tr in traces]) / 3600.0
    balance = []
    for k in range(p.size):  # a loop over parts
        mine = part_of_trace == k
        n_k = sums[k].sum()
        tv = 0.5 * float(np.abs(sums[k] / n_k - whole / total).sum()) if n_k > 0 and total > 0 else 0.0
        balance.append({"part": part_names[k], "traces": int(mine.sum()),
                        "groups": len({keys[i] for i in np.flatnonzero(mine)}), "windows": round(float(n_k), 6),
                        "hours": round(float(hours[mine].sum()), 6), "share_asked": round(float(p[k]), 6),
                        "share_got": round(float(got[k]), 6), "cell_tv": round(tv, 6)})

    ids = [tr.id for tr in traces]
    manifest = pd.DataFrame({"id": ids, "split": [part_names[k] for k in part_of_trace], "group": keys})
    manifest = manifest.drop_duplicates().sort_values(["id", "group"], kind="stable").reset_index(drop=True)
    error = stratification_error(per_group, assignment, p)
    return SplitResult(manifest, part_names, tuple(float(x) for x in p), tuple(balance), error, tuple(notes),
                       by.strip(), int(seed), tuple(cells))


__all__ = ["SplitResult", "assign_groups", "split", "stratification_error"]
