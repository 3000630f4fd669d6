"""The demo world: an invented city's robot and cart fleet, measured through a physics-flavoured field simulator.

Port Quillon, its districts (Saltmarket, Tinker Quay, Lanternhill, the Heronbank riverside, the Old Mill
Campus), fleet, cells and access points are invented; its coordinates lie in open sea. Per session, on a 40 ms
radio step: a route, log-distance path loss, Gudmundson shadowing, averaged Rayleigh/Rician fading, interference
weighted by each cell's slowly varying load, SINR, Shannon-type capacity shared among the cell's users, A3-style
handovers that interrupt briefly or fail into outages, RTT from propagation, scheduling, HARQ and queueing, loss
at low SINR, RFC 3550 jitter. It is written as the files a fleet operator would have (CSV/TSV logs, RTCP
receiver reports, ping output) and ingested with the real readers. It is the demo's world, not a tracegen model.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import Mapping

from ..errors import TracegenError, check_seed
from .files import _READER, _SUFFIX, _reader_options, rtcp_reports, tags_of, write_sources
from .radio import (SUB, a3_next, fading_power_mean, free_space_path_loss_db, gudmundson_shadowing_db,
                    log_distance_path_loss_db, shannon_capacity_bps)
from .world import ARCHETYPES, CITY, Session, simulate_fleet, simulate_session

__all__ = ["ARCHETYPES", "CITY", "SUB", "DemoReport", "Session", "a3_next", "build_demo", "fading_power_mean",
           "free_space_path_loss_db", "gudmundson_shadowing_db", "log_distance_path_loss_db", "rtcp_reports",
           "shannon_capacity_bps", "simulate_fleet", "simulate_session", "tags_of", "write_sources"]


@dataclass(frozen=True)
class DemoReport:
    """What :func:`build_demo` made: where, which files, which traces, how many per tag."""

    root: Path
    sources_dir: Path
    files: Mapping[str, tuple[str, ...]]
    added: tuple[str, ...]
    present: tuple[str, ...]
    counts: Mapping[str, Mapping[str, int]]
    seed: int
    duration_s: float
    model_path: Path | None = None
    model_summary: str = ""
    synthetic_dir: Path | None = None
    synthetic_count: int = 0
    coverage_html: Path | None = None
    coverage_json: Path | None = None
    gap_ratio: float | None = None
    gap_reading: str = ""
    audit_html: Path | None = None
    audit_flagged: int = 0

    @property
    def trace_ids(self) -> tuple[str, ...]:
        return self.added + self.present

    def text(self, catalog: str | None = None) -> str:
        """A short human summary and what to try next; ``catalog`` is appended as ``--catalog DIR``."""
        flag = "" if catalog is None else f" --catalog {catalog}"
        n_files = sum(len(v) for v in self.files.values())
        kinds = ", ".join(f"{len(v)} {k}" for k, v in sorted(self.files.items()))  # by reader format
        out = [f"Demo world: {CITY} (invented, seed {self.seed}): sidewalk delivery robots and tele-operated",
               "  utility carts on LTE-like cells and campus Wi-Fi.",
               f"Wrote {n_files} source files ({kinds}) of {self.duration_s:g} s each to {self.sources_dir},",
               "  with the true handovers and outages in truth.json.",
               f"Catalog {self.root}: {len(self.added)} traces added, {len(self.present)} already there."]
        for tag, values in self.counts.items():
            out.append(f"  {tag}: " + ", ".join(f"{v} {c}" for v, c in values.items()))
        if self.model_path is not None:
            out += [f"Fitted a path model to the LTE traces: {self.model_path}", self.model_summary]
        if self.synthetic_dir is not None:
            out.append(f"Synthesised {self.synthetic_count} traces from it into {self.synthetic_dir} "
                       "(with a manifest of weights)")
        if self.coverage_html is not None:
            ratio = "-" if self.gap_ratio is None else f"{self.gap_ratio:.2f}"
            out.append(f"Coverage of the synthetic traces against the measured LTE ones: gap ratio {ratio} "
                       f"({self.gap_reading}; 1 is as close as the field is to itself)")
            out.append(f"  report {self.coverage_html}")
            out.append(f"  numbers {self.coverage_json}")
        if self.audit_html is not None:
            out.append(f"Audit of the synthetic traces against the measured LTE ones: {self.audit_flagged} condition "
                       f"cells empty or thin: {self.audit_html}")
        example = self.trace_ids[0] if self.trace_ids else "ID"
        out += ["What to try next:", f"  tracegen catalog list{flag}", f"  tracegen catalog stats --by access{flag}",
                f"  tracegen catalog show {example}{flag}", f"  tracegen catalog verify{flag}"]
        if self.model_path is not None:
            out += [f"  tracegen model show {self.model_path}",
                    f"  tracegen fit{flag} --where access=wifi --out wifi-model.json",
                    f"  tracegen synth {self.model_path} --count 5 --duration 10min --step 100ms "
                    "--cross-flows-per-s 0.5 --buffer-ms 150 --handovers-per-min 2 --out synthetic/"]
        if self.synthetic_dir is not None:
            out.append(f"  tracegen coverage{flag} --real access=lte --synthetic {self.synthetic_dir} --html report.html")
            out.append(f"  tracegen audit{flag} origin=measured --html audit.html")
            out.append(f"  tracegen split{flag} origin=measured --by group --parts 0.7,0.15,0.15 --out splits.csv")
            out.append(f"  tracegen widen {self.model_path}{flag} {self.synthetic_dir} --against access=lte --out widened/")
        return "\n".join(out)


MIN_SESSIONS, MAX_SESSIONS = 6, 1000          # fewer leave the demo's fit and splits too little to work with
MIN_DURATION_S, MAX_DURATION_S = 60.0, 86400.0  # a 60 s window for the reports at least; one day


def build_demo(root: Path, *, seed: int = 7, sessions: int = 36, duration_s: float = 300,
               progress: bool | None = None, fit_model: bool = True, synthesise: bool = True) -> DemoReport:
    """Simulate the fleet, write its files under ``root/demo-sources`` and ingest them into the catalog at ``root``;
    fit a model to the LTE traces (``root/demo-model.json``), synthesise as many into ``root/demo-synthetic``
    and write the coverage report of those against the measured ones (``root/demo-coverage.html``/``.json``)
    and their audit against them (``root/demo-audit.html``/``.json``)."""
    from ..catalog import Catalog
    from ..ingest import Labels
    from ..progress import bar

    check_seed(seed)
    if isinstance(sessions, bool) or not isinstance(sessions, int) or not MIN_SESSIONS <= sessions <= MAX_SESSIONS:
        raise TracegenError(f"must be an integer from {MIN_SESSIONS} to {MAX_SESSIONS}, got {sessions!r}",
                            field="sessions")
    if not MIN_DURATION_S <= float(duration_s) <= MAX_DURATION_S:
        raise TracegenError(f"must be from {MIN_DURATION_S:g} s to {MAX_DURATION_S:g} s, got {duration_s!r}",
                            field="duration", hint="the demo's reports need at least one 60 s window per session")
    root = Path(root)
    sims = simulate_fleet(seed, sessions, duration_s, progress)
    sources = root / "demo-sources"
    written = write_sources(sims, sources)
    batches: dict[str, tuple[str, dict, dict, list[Path]]] = {}
    for s in sims:  # one ingest per distinct (format, options, tags): fewer commits
        fmt = _READER[s.plan["fmt"]]
        key = json.dumps([fmt, _reader_options(s), tags_of(s)], sort_keys=True)
        batches.setdefault(key, (fmt, _reader_options(s), tags_of(s), []))[3].append(
            sources / f"{s.name}{_SUFFIX[s.plan['fmt']]}")
    cat = Catalog.open(root, create=True)
    added, present, counts = [], [], {}
    with bar(sorted(batches), label=f"ingesting {sum(map(len, written.values()))} files", enabled=progress) as keys:
        for key in keys:
            fmt, options, tags, paths = batches[key]
            rep = cat.ingest(paths, fmt, Labels(tags=tags), progress=False, **options)
            added += rep.added
            present += rep.present
            for tag, value in tags.items():
                counts.setdefault(tag, {})
                counts[tag][value] = counts[tag].get(value, 0) + len(rep.added) + len(rep.present)
    counts = {t: dict(sorted(v.items())) for t, v in counts.items()}
    model_path, summary = None, ""
    if fit_model and cat.ids(["access=lte"]):
        from ..fit import fit

        where = ["access=lte"]
        model = fit(list(cat.traces(where)), states=range(2, 7), restarts=2, seed=seed, selection=where,
                    progress=progress)
        model_path = model.save(root / "demo-model.json")
        summary = model.summary_text()
    synthetic_dir, n_synth = None, 0
    if model_path is not None and synthesise:
        synthetic_dir, n_synth = _synthesise(model_path, root / "demo-synthetic", len(cat.ids(["access=lte"])),
                                             duration_s, seed, progress)
    cov_html = cov_json = audit_html = None
    ratio, words, flagged = None, "", 0
    if synthetic_dir is not None:
        from ..compare import coverage
        from ..compare.inputs import read_folder
        from ..files import write_text_atomic

        result = coverage(list(cat.traces(["access=lte"])), read_folder(synthetic_dir), seed=seed,
                          labels={"real": "the measured LTE traces (access=lte)", "synthetic": "demo-synthetic"},
                          progress=progress)
        cov_html, cov_json = root / "demo-coverage.html", root / "demo-coverage.json"
        write_text_atomic(cov_html, result.to_html())
        write_text_atomic(cov_json, result.to_json())
        ratio, words = result.gap_ratio, result.data["gap_ratio"]["reading"]
        from ..curate.audit import audit

        checked = audit(read_folder(synthetic_dir), against=list(cat.traces(["access=lte"])),
                        labels={"selection": "demo-synthetic", "reference": "the measured LTE traces"})
        audit_html = root / "demo-audit.html"
        write_text_atomic(audit_html, checked.to_html())
        write_text_atomic(root / "demo-audit.json", checked.to_json())
        flagged = len(checked.flagged())
    return DemoReport(root, sources, {k: tuple(p.name for p in v) for k, v in sorted(written.items())},
                      tuple(added), tuple(present), counts, seed, float(duration_s), model_path, summary,
                      synthetic_dir, n_synth, cov_html, cov_json, ratio, words, audit_html, flagged)


def _synthesise(model_path: Path, out: Path, count: int, duration_s: float, seed: int,
                progress: bool | None) -> tuple[Path, int]:
    """As many synthetic traces as measured LTE ones, as long, at the model's step, into ``out`` (replaced)."""
    from ..progress import bar
    from ..synth import iter_synth
    from ..synth.output import write_files

    stream = iter_synth(model_path, count, float(duration_s), 1.0, seed, name="demo")
    with bar(stream, label=f"synthesising {count} traces", length=count, enabled=progress) as items:
        report = write_files(items, out, name="demo", run={"plan": {"model": model_path.name, "count": count,
                                                                    "duration_s": float(duration_s), "seed": seed}})
    return out, len(report.files)
