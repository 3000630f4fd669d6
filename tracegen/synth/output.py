"""Where synthetic traces go: one file per trace in a folder, or a catalog; plus the run's weight table.

Files are ``NAME-INDEX.parquet`` (the Trace schema with its metadata, zstd, row groups of at most
``ROW_GROUP_SAMPLES`` samples) or ``NAME-INDEX.csv`` (the columns only; CSV has no place for the
metadata, which the manifest and ``run.json`` keep). Each file is written under a temporary name and
renamed, so a reader never sees half a file. Nothing is written when any target exists, unless
``force``.

The manifest (CSV) has one row per trace: ``index``, ``id``, ``file``, ``log_likelihood_ratio``,
``weight`` (p/q, the trace's own importance weight, mean 1 under the tilted law) and
``normalised_weight`` (self-normalised over the run: n w_i / sum_j w_j, mean exactly 1). ``run.json``
beside the files holds the plan, the model's sha256, the version and Kish's effective sample size.
Traces stream through: only the manifest rows are kept, so memory stays flat for any count.
"""

from __future__ import annotations

import csv
import io
import json
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable, Mapping

import numpy as np

from .. import __version__
from ..errors import TracegenError
from ..files import write_text_atomic
from ..trace import Trace
from .tilt import effective_sample_size, normalised_weights

ROW_GROUP_SAMPLES = 1 << 20
MANIFEST_COLUMNS = ("index", "id", "file", "log_likelihood_ratio", "weight", "normalised_weight")
RUN_FILE = "run.json"


@dataclass
class RunReport:
    """What a run wrote: per-trace rows (the manifest) and, for catalog output, what was already there."""

    rows: list[dict[str, Any]] = field(default_factory=list)
    present: list[str] = field(default_factory=list)
    files: list[Path] = field(default_factory=list)
    manifest: Path | None = None

    @property
    def effective_sample_size(self) -> float:
        return effective_sample_size(np.array([r["log_likelihood_ratio"] for r in self.rows])) if self.rows else 0.0


def file_stem(name: str, index: int) -> str:
    """``NAME-000042``: the run's name made safe for a file name, and the trace's index."""
    safe = re.sub(r"[^A-Za-z0-9._-]+", "_", name).strip("._") or "trace"
    return f"{safe}-{index:06d}"


def _row(tr: Trace, file: str) -> dict[str, Any]:
    return {"index": int(tr.provenance.get("index", 0)), "id": tr.id, "file": file,
            "log_likelihood_ratio": float(tr.provenance.get("log_likelihood_ratio", 0.0)), "weight": tr.weight}


def _finish_rows(rows: list[dict[str, Any]]) -> None:
    if rows:
        w = normalised_weights(np.array([r["log_likelihood_ratio"] for r in rows])) * len(rows)
        for r, v in zip(rows, w.tolist()):
            r["normalised_weight"] = v


def write_manifest(rows: list[dict[str, Any]], path: Path) -> Path:
    """The weight table as CSV (columns MANIFEST_COLUMNS), written atomically."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(MANIFEST_COLUMNS)
    for r in rows:
        w.writerow([r["index"], r["id"], r["file"], repr(r["log_likelihood_ratio"]), repr(r["weight"]),
                    repr(r["normalised_weight"])])
    return write_text_atomic(path, buf.getvalue())


def check_targets(out_dir: Path, name: str, indices: range, fmt: str, *, force: bool = False,
                  manifest: Path | None = None) -> None:
    """Refuse, before anything is written, to overwrite a file (unless ``force``)."""
    out_dir = Path(out_dir)
    if out_dir.exists() and not out_dir.is_dir():
        raise TracegenError("is not a folder", path=out_dir, hint="give --out a folder to write the traces into")
    if force or not out_dir.is_dir():
        if manifest is not None and manifest.exists() and not force:
            raise TracegenError("exists already", path=manifest, hint="pass --force to replace it")
        return
    taken = {p.name for p in out_dir.iterdir()}
    clash = [f"{file_stem(name, i)}.{fmt}" for i in indices if f"{file_stem(name, i)}.{fmt}" in taken]
    for extra in ((manifest.name if manifest is not None and manifest.parent == out_dir else None), RUN_FILE):
        if extra and extra in taken:
            clash.append(extra)
    if manifest is not None and manifest.parent != out_dir and manifest.exists():
        clash.append(str(manifest))
    if clash:
        raise TracegenError(f"holds {len(clash)} file(s) this run would replace, first {clash[0]}", path=out_dir,
                            hint="pass --force to replace them, or choose another --out")


def _write_trace(tr: Trace, path: Path, fmt: str) -> None:
    import pyarrow.csv as pacsv
    import pyarrow.parquet as pq

    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    table = tr.to_arrow()
    try:
        if fmt == "parquet":
            pq.write_table(table, tmp, compression="zstd", row_group_size=ROW_GROUP_SAMPLES)
        else:
            pacsv.write_csv(table.replace_schema_metadata(None), tmp)
        os.replace(tmp, path)
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        raise TracegenError(f"cannot be written ({exc.strerror})", path=path) from None


def _write_one(tr: Trace, out_dir: Path, fmt: str, name: str) -> tuple[Path, dict[str, Any]]:
    path = out_dir / f"{file_stem(name, int(tr.provenance.get('index', 0)))}.{fmt}"
    _write_trace(tr, path, fmt)
    return path, _row(tr, path.name)


def _prepare_dir(out_dir: str | Path, fmt: str) -> Path:
    if fmt not in ("parquet", "csv"):
        raise TracegenError(f"unknown format '{fmt}'", field="output.format", hint="use parquet or csv")
    out_dir = Path(out_dir)
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise TracegenError(f"cannot be created ({exc.strerror})", path=out_dir) from None
    return out_dir


def _close_run(report: RunReport, out_dir: Path, fmt: str, run: Mapping[str, Any] | None,
               manifest: str | Path | None) -> RunReport:
    _finish_rows(report.rows)
    report.manifest = write_manifest(report.rows, Path(manifest) if manifest else out_dir / "manifest.csv")
    summary = {"format": "tracegen-synthesis-run", "version": 1, "tracegen_version": __version__,
               "traces": len(report.rows), "effective_sample_size": report.effective_sample_size,
               "files": fmt, "manifest": str(report.manifest.name), **dict(run or {})}
    write_text_atomic(out_dir / RUN_FILE, json.dumps(summary, indent=1, sort_keys=True, default=str) + "\n")
    return report


def write_files(traces: Iterable[Trace], out_dir: str | Path, *, fmt: str = "parquet", name: str = "model",
                run: Mapping[str, Any] | None = None, manifest: str | Path | None = None) -> RunReport:
    """Write each trace to ``out_dir`` as it arrives, then the manifest and ``run.json`` (module docstring).

    Call :func:`check_targets` first: this function overwrites.
    """
    out_dir = _prepare_dir(out_dir, fmt)
    report = RunReport()
    for tr in traces:
        path, row = _write_one(tr, out_dir, fmt, name)
        report.files.append(path)
        report.rows.append(row)
    return _close_run(report, out_dir, fmt, run, manifest)


def write_chunk(job: tuple[Any, ...]) -> list[tuple[str, dict[str, Any]]]:
    """A worker's task: synthesise a chunk of traces and write each to the output folder as it is made
    (one trace in memory at a time; the worker must reach the folder: a local or shared file system);
    returns (file, manifest row) pairs."""
    from . import synth_range

    *synth_job, out_dir, fmt, name = job
    return [(str(p), row) for p, row in (_write_one(tr, Path(out_dir), fmt, name) for tr in synth_range(tuple(synth_job)))]


def synth_files(model: Any, count: int, duration_s: float, step_s: float, seed: int, out_dir: str | Path, *,
                fmt: str = "parquet", name: str = "model", run: Mapping[str, Any] | None = None,
                manifest: str | Path | None = None, workers: int | None = 1, cluster: str | None = None,
                progress: Any = None, **options: Any) -> RunReport:
    """Synthesise straight into files with the workers writing them (tracegen.parallel): only manifest rows
    travel back, so the run scales with the workers. Same files, manifest and run.json as
    ``write_files(iter_synth(...))``. ``progress(n)`` is called with each chunk's size."""
    from ..parallel import chunks, runner
    from . import _load, check_run, model_digest

    model, _ = _load(model)
    check_run(model, count, duration_s, step_s, seed, **{k: options.get(k) for k in
                                                        ("cross_traffic", "bottleneck", "handover", "tilt")})
    out_dir = _prepare_dir(out_dir, fmt)
    options.setdefault("name", name)
    digest, text = model_digest(model), model.to_json()
    report = RunReport()
    with runner(workers, cluster) as r:
        jobs = [(text, digest, a, n, duration_s, step_s, seed, options, str(out_dir), fmt, name)
                for a, n in chunks(count, r.workers)]
        for part in r.map(write_chunk, jobs):
            for path, row in part:
                report.files.append(Path(path))
                report.rows.append(row)
            if progress is not None:
                progress(len(part))
    return _close_run(report, out_dir, fmt, run, manifest)


def add_to_catalog(traces: Iterable[Trace], catalog: Any, *, count: int | None = None,
                   manifest: str | Path | None = None, progress: bool | None = None) -> RunReport:
    """Add the traces to ``catalog`` in one commit (streamed: each is staged as it arrives), then
    write the manifest if asked."""
    report = RunReport()

    def keep(items: Iterable[Trace]) -> Iterable[Trace]:
        for tr in items:
            report.rows.append(_row(tr, f"traces/{tr.id}.parquet"))
            yield tr

    added = catalog.add(keep(traces), progress=progress, length=count)
    report.present = list(added.present)
    _finish_rows(report.rows)
    if manifest is not None:
        report.manifest = write_manifest(report.rows, Path(manifest))
    return report


__all__ = ["write_files", "add_to_catalog", "check_targets", "write_manifest", "file_stem", "RunReport",
           "MANIFEST_COLUMNS", "ROW_GROUP_SAMPLES", "RUN_FILE"]
