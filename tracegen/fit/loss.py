"""Packet loss as a two-state Gilbert-Elliott channel, learned from interval loss fractions.

The model (Gilbert 1960; Elliott 1963): a hidden Markov chain with a good and a bad state steps once per
interval; p = P(good -> bad), r = P(bad -> good); each state loses packets at its own mean rate
(``loss_good``, ``loss_bad``). In the stationary chain the bad share is p / (p + r), the loss rate is
p / (p + r) * loss_bad + r / (p + r) * loss_good, and a bad burst lasts 1 / r intervals on average.

Estimator. Traces carry only a loss fraction per interval, not per-packet outcomes, so the hidden state
is not decoded; it is read off a threshold:

1. an interval with a known loss fraction is *bad* when the fraction exceeds ``bad_threshold``
   (default 0.05), else *good*; an interval whose loss is NaN is unknown;
2. p and r are transition counts over pairs of consecutive known intervals of the same trace:
   p = #(good -> bad) / #(pairs starting good), r = #(bad -> good) / #(pairs starting bad). A pair is
   never formed across two traces or across an unknown interval;
3. ``loss_good`` and ``loss_bad`` are the mean loss fractions of the intervals labelled good and bad.

Binary series (ping: 0/1 per probe) thereby give Gilbert's simple model, loss_good = 0 and loss_bad = 1.
Degenerate data: with no known loss at all the fit returns None (the caller records "loss unknown").
A state that is never left in the data gets the exit probability 1 if the other state was seen, else
0: never bad gives p = 0, r = 1 (and loss_bad = 1, never used since the bad share is 0); always bad
gives p = 1, r = 0 (and loss_good = 0). If both states are seen but neither is ever left (each trace
stays in one state), each exit probability is set to 1 / (pairs starting in that state + 1).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any, Mapping, Sequence

import numpy as np

from ..errors import TracegenError

_FIELDS = ("p", "r", "loss_good", "loss_bad", "bad_threshold", "n_intervals", "n_transitions_good",
           "n_transitions_bad")


@dataclass(frozen=True)
class GilbertElliott:
    """A fitted Gilbert-Elliott channel; one step is one interval of the traces it was fitted on.

    ``n_transitions_good`` / ``n_transitions_bad`` count the pairs of consecutive known intervals that
    start in the good / bad state (the denominators of p and r); ``n_intervals`` the known intervals.
    """

    p: float
    r: float
    loss_good: float
    loss_bad: float
    bad_threshold: float = 0.05
    n_intervals: int = 0
    n_transitions_good: int = 0
    n_transitions_bad: int = 0

    def __post_init__(self) -> None:
        _check(asdict(self))

    @property
    def stationary_bad(self) -> float:
        """Long-run share of intervals in the bad state, p / (p + r)."""
        return self.p / (self.p + self.r)

    @property
    def stationary_loss(self) -> float:
        """Long-run loss fraction, p/(p+r) * loss_bad + r/(p+r) * loss_good."""
        pi = self.stationary_bad
        return pi * self.loss_bad + (1.0 - pi) * self.loss_good

    @property
    def mean_bad_burst_intervals(self) -> float:
        """Mean length of a bad run in intervals, 1 / r (geometric sojourn); inf when r = 0."""
        return 1.0 / self.r if self.r > 0 else float("inf")

    def sample(self, rng: np.random.Generator, n: int, start: int | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Draw ``n`` intervals: (state, loss) with state 0 good / 1 bad, loss the state's mean fraction.

        ``start`` is the first state; None draws it from the stationary distribution. Runs alternate
        with geometric lengths (good runs Geometric(p), bad runs Geometric(r)), laid out by np.repeat.
        Per-packet losses can then be drawn as Bernoulli(loss) per packet of each interval.
        """
        n = int(n)
        if n < 0:
            raise TracegenError(f"sample size {n} must be >= 0", field="n")
        if start is None:
            state = int(rng.random() < self.stationary_bad)
        elif start in (0, 1):
            state = int(start)
        else:
            raise TracegenError(f"start state {start!r} must be 0 (good), 1 (bad) or None", field="start")
        if n == 0:
            return np.zeros(0, dtype=np.int8), np.zeros(0)
        exits = (self.p, self.r)
        mean_pair = sum(1.0 / e if e > 0 else float(n) for e in exits)
        runs: list[np.ndarray] = []
        covered = 0
        while covered < n:  # a loop over batches of runs, not over intervals
            pairs = int(np.ceil(1.2 * (n - covered) / max(mean_pair, 1.0))) + 8
            first, second = exits[state], exits[1 - state]
            a = rng.geometric(first, pairs) if first > 0 else np.full(pairs, n)
            b = rng.geometric(second, pairs) if second > 0 else np.full(pairs, n)
            batch = np.empty(2 * pairs, dtype=np.int64)
            batch[0::2], batch[1::2] = a, b
            runs.append(batch)
            covered += int(batch.sum())
        lengths = np.concatenate(runs)
        labels = (state + np.arange(len(lengths))) % 2
        states = np.repeat(labels.astype(np.int8), lengths)[:n]
        loss = np.where(states == 1, self.loss_bad, self.loss_good)
        return states, loss

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able values."""
        return asdict(self)

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> "GilbertElliott":
        """Rebuild from :meth:`to_dict` output; raises TracegenError naming the bad field."""
        if not isinstance(data, Mapping):
            raise TracegenError(f"a Gilbert-Elliott model is a mapping, not {type(data).__name__}")
        missing = [f for f in _FIELDS if f not in data]
        if missing:
            raise TracegenError(f"missing from the loss model: {missing}", field=missing[0])
        extra = sorted(set(data) - set(_FIELDS))
        if extra:
            raise TracegenError(f"unknown field(s) {extra} in the loss model", field=extra[0])
        _check(data)
        return cls(**{f: (int(data[f]) if f.startswith("n_") else float(data[f])) for f in _FIELDS})


def _check(d: Mapping[str, Any]) -> None:
    for name in _FIELDS:
        v = d[name]
        if isinstance(v, bool) or not isinstance(v, (int, float, np.integer, np.floating)):
            raise TracegenError(f"value {v!r} is not a number", field=name)
        if not np.isfinite(v):
            raise TracegenError(f"value {v} is not finite", field=name)
        if name.startswith("n_"):
            if v < 0 or int(v) != v:
                raise TracegenError(f"count {v} must be a whole number >= 0", field=name)
        elif not 0.0 <= v <= 1.0:
            raise TracegenError(f"value {v} is outside [0, 1]", field=name)
    if d["p"] + d["r"] <= 0:
        raise TracegenError(f"p {d['p']} + r {d['r']} must be > 0 (else the chain has no stationary state)",
                            field="p")


def _exit(moves: int, pairs: int, other_seen: bool) -> float:
    if pairs > 0:
        return moves / pairs
    return 1.0 if other_seen else 0.0


def fit_gilbert_elliott(series: Sequence[np.ndarray], bad_threshold: float = 0.05) -> GilbertElliott | None:
    """Fit p, r, loss_good, loss_bad from one loss-fraction array per trace (estimator: module docstring).

    Returns None when no interval has a known loss.
    """
    if not (np.isfinite(bad_threshold) and 0.0 <= bad_threshold < 1.0):
        raise TracegenError(f"bad threshold {bad_threshold} must be in [0, 1)", field="bad_threshold")
    known_n = bad_n = gb = from_good = bg = from_bad = 0
    sum_good = sum_bad = 0.0
    for loss in series:  # a loop over traces
        a = np.asarray(loss, dtype=np.float64).reshape(-1)
        known = ~np.isnan(a)
        bad = known & (a > bad_threshold)
        good = known & ~bad
        pair = known[:-1] & known[1:]
        from_good += int(np.sum(pair & good[:-1]))
        gb += int(np.sum(pair & good[:-1] & bad[1:]))
        from_bad += int(np.sum(pair & bad[:-1]))
        bg += int(np.sum(pair & bad[:-1] & good[1:]))
        known_n += int(known.sum())
        bad_n += int(bad.sum())
        sum_good += float(a[good].sum())
        sum_bad += float(a[bad].sum())
    if known_n == 0:
        return None
    good_n = known_n - bad_n
    p = _exit(gb, from_good, bad_n > 0)
    r = _exit(bg, from_bad, good_n > 0)
    if p + r == 0:  # both states seen, neither ever left: one pseudo-exit each
        p, r = 1.0 / (from_good + 1), 1.0 / (from_bad + 1)
    loss_good = sum_good / good_n if good_n else 0.0
    loss_bad = sum_bad / bad_n if bad_n else 1.0
    return GilbertElliott(p=float(p), r=float(r), loss_good=float(min(max(loss_good, 0.0), 1.0)),
                          loss_bad=float(min(max(loss_bad, 0.0), 1.0)), bad_threshold=float(bad_threshold),
                          n_intervals=known_n, n_transitions_good=from_good, n_transitions_bad=from_bad)


def loss_by_state(loss_series: Sequence[np.ndarray], state_series: Sequence[np.ndarray],
                  n_states: int) -> list[float | None]:
    """Mean loss fraction per level state (None for a state with no interval of known loss).

    ``state_series`` holds one int array per trace, aligned with ``loss_series``; -1 is unknown.
    """
    if len(loss_series) != len(state_series):
        raise TracegenError(f"{len(loss_series)} loss series but {len(state_series)} state series",
                            field="state_series")
    n_states = int(n_states)
    if n_states < 1:
        raise TracegenError(f"number of states {n_states} must be >= 1", field="n_states")
    total = np.zeros(n_states)
    count = np.zeros(n_states)
    for i, (loss, state) in enumerate(zip(loss_series, state_series)):  # a loop over traces
        a = np.asarray(loss, dtype=np.float64).reshape(-1)
        s = np.asarray(state).reshape(-1)
        if len(a) != len(s):
            raise TracegenError(f"trace {i}: {len(a)} loss values but {len(s)} states", field="state_series")
        if s.size and not np.issubdtype(s.dtype, np.integer):
            raise TracegenError(f"trace {i}: states must be integers, not {s.dtype}", field="state_series")
        bad = (s < -1) | (s >= n_states)
        if bad.any():
            raise TracegenError(f"trace {i}: state {int(s[bad][0])} is outside -1..{n_states - 1}",
                                field="state_series")
        use = (s >= 0) & ~np.isnan(a)
        total += np.bincount(s[use], weights=a[use], minlength=n_states)
        count += np.bincount(s[use], minlength=n_states)
    return [float(t / c) if c else None for t, c in zip(total, count)]
