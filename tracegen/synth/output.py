"""Where synthetic traces go: one file per trace in a folder, or a catalog; plus the run's weight table.

Files are ``NAME-INDEX.parquet`` (the Trace schema with its metadata, zstd, row groups of at most
``ROW_GROUP_SAMPLES`` samples) or ``NAME-INDEX.csv`` (the columns only; CSV has no place for the
metadata, which the manifest and ``run.json`` keep). Each file is written under a temporary name and
renamed, so a reader never sees half a file. Nothing is written when any target exists, unless
``force``, nor when a target cannot be created (a folder on the way is a file, or not writable).

A run that fails removes what it wrote that was not there before (trace files, manifest, ``run.json``,
the folder it made), so a rerun starts clean; files it had already replaced (``force``) stay replaced.
A run that succeeds into a folder holding an earlier run's ``run.json`` removes the files that run
listed (its manifest's trace files, or its plan's name and count, and its manifest) which this run did
not write again, so the folder holds one run; other files are never touched (``RunReport.removed``).

The manifest (CSV) has one row per trace: ``index``, ``id``, ``file``, ``log_likelihood_ratio``,
``weight`` (p/q, the trace's own importance weight, mean 1 under the tilted law) and
``normalised_weight`` (self-normalised over the run: n w_i / sum_j w_j, mean exactly 1). ``run.json``
beside the files holds the plan, the model's sha256, the version and Kish's effective sample size.
Traces stream through: only the manifest rows are kept, so memory stays flat for any count.
"""

from __future__ import annotations

import contextlib
import csv
import io
import json
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable, Iterator, Mapping

import numpy as np

from .. import __version__
from ..errors import TracegenError
from ..files import write_text_atomic
from ..trace import Trace
from .tilt import effective_sample_size, normalised_weights

ROW_GROUP_SAMPLES = 1 << 20
MANIFEST_COLUMNS = ("index", "id", "file", "log_likelihood_ratio", "weight", "normalised_weight")
RUN_FILE = "run.json"
_TRACE_FILE = re.compile(r"[A-Za-z0-9_-][A-Za-z0-9._-]*-[0-9]{6,}\.(?:parquet|csv)")  # what file_stem names


@dataclass
class RunReport:
    """What a run wrote: per-trace rows (the manifest) and, for catalog output, what was already there."""

    rows: list[dict[str, Any]] = field(default_factory=list)
    present: list[str] = field(default_factory=list)
    files: list[Path] = field(default_factory=list)
    manifest: Path | None = None
    removed: list[Path] = field(default_factory=list)

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


def check_writable(path: str | Path, *, hint: str = "choose another place for it", verb: str = "written") -> None:
    """Refuse, before anything is written, a file that could not be written (or a folder that could not be
    created, ``verb="created"``): it is a folder, a folder on its way is a file, or the nearest folder on
    its way that exists is not writable."""
    path = Path(path)
    if path.is_dir() and verb == "written":
        raise TracegenError("is a folder, not a file", path=path, hint=hint)
    parent = path.parent
    while not parent.exists() and parent != parent.parent:
        parent = parent.parent
    if not parent.is_dir():
        raise TracegenError(f"cannot be {verb}: {parent} is a file, not a folder", path=path, hint=hint)
    if not os.access(parent, os.W_OK | os.X_OK):
        raise TracegenError(f"cannot be {verb}: {parent} is not writable", path=path, hint=hint)


def _check_outputs(out_dir: Path, manifest: Path) -> None:
    """The folder can be made (or written into, run.json too) and the manifest written: before any trace."""
    if out_dir.exists() and not out_dir.is_dir():
        raise TracegenError("is not a folder", path=out_dir, hint="give --out a folder to write the traces into")
    if out_dir.is_dir():
        check_writable(out_dir / RUN_FILE, hint="choose another --out")
    else:
        check_writable(out_dir, hint="choose another --out", verb="created")
    check_writable(manifest, hint="choose another --manifest")


def check_targets(out_dir: Path, name: str, indices: range, fmt: str, *, force: bool = False,
                  manifest: Path | None = None) -> None:
    """Refuse, before anything is written, to overwrite a file (unless ``force``) or to write where a
    file cannot be (:func:`check_writable`)."""
    out_dir = Path(out_dir)
    _check_outputs(out_dir, manifest if manifest is not None else out_dir / "manifest.csv")
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
    except BaseException as exc:
        with contextlib.suppress(OSError):
            tmp.unlink(missing_ok=True)
        if isinstance(exc, OSError):
            raise TracegenError(f"cannot be written ({exc.strerror})", path=path) from None
        raise


def _write_one(tr: Trace, out_dir: Path, fmt: str, name: str) -> tuple[Path, dict[str, Any]]:
    path = out_dir / f"{file_stem(name, int(tr.provenance.get('index', 0)))}.{fmt}"
    _write_trace(tr, path, fmt)
    return path, _row(tr, path.name)


def _first_missing(path: Path) -> Path | None:
    """The outermost folder of ``path`` (itself included) that does not exist yet: what a mkdir makes."""
    missing = None
    while not path.exists() and path != path.parent:
        missing, path = path, path.parent
    return missing


def _previous_run_files(out_dir: Path, present: set[str]) -> set[str]:
    """The files of ``present`` (names in ``out_dir``) that the run which wrote ``out_dir/run.json`` listed:
    its manifest (if it has the manifest's columns) and the trace files named in it, and the trace files
    its plan's name and trace count give. None without a readable run.json of a synthesis run."""
    try:
        info = json.loads((out_dir / RUN_FILE).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return set()
    if not isinstance(info, dict) or info.get("format") != "tracegen-synthesis-run":
        return set()
    names: set[str] = set()
    plan, fmt, count = info.get("plan"), info.get("files"), info.get("traces")
    if isinstance(plan, dict) and isinstance(plan.get("name"), str) and fmt in ("parquet", "csv") \
            and isinstance(count, int) and not isinstance(count, bool):
        own = re.compile(rf"{re.escape(file_stem(plan['name'], 0)[:-7])}-([0-9]{{6,}})\.{fmt}")
        names.update(n for n in present if (m := own.fullmatch(n)) and int(m[1]) < count)
    listed = info.get("manifest")
    if isinstance(listed, str) and listed in present and listed != RUN_FILE:
        try:
            with (out_dir / listed).open(newline="", encoding="utf-8") as f:
                rows = csv.reader(f)
                if tuple(next(rows, ())) == MANIFEST_COLUMNS:
                    names.add(listed)
                    names.update(r[2] for r in rows if len(r) == len(MANIFEST_COLUMNS) and _TRACE_FILE.fullmatch(r[2]))
        except (OSError, UnicodeDecodeError, csv.Error):
            pass
    return names & present


class _Folder:
    """A file run's hold on its output (module docstring): checked and made before any trace is written;
    what was there before, so a failed run takes back only what it wrote; what the earlier run there
    listed, so a finished run removes what it did not write again."""

    def __init__(self, out_dir: str | Path, fmt: str, name: str, manifest: str | Path | None) -> None:
        if fmt not in ("parquet", "csv"):
            raise TracegenError(f"unknown format '{fmt}'", field="output.format", hint="use parquet or csv")
        out_dir = Path(out_dir)
        self.manifest = Path(manifest) if manifest else out_dir / "manifest.csv"
        _check_outputs(out_dir, self.manifest)
        self.made = [(top, start) for start in (out_dir, self.manifest.parent)
                     if (top := _first_missing(start)) is not None]
        self.manifest_was_there = self.manifest.exists()
        try:
            out_dir.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise TracegenError(f"cannot be created ({exc.strerror})", path=out_dir) from None
        self.out_dir = out_dir
        self.before = {p.name for p in out_dir.iterdir()}
        self.previous = _previous_run_files(out_dir, self.before)
        self.own = re.compile(rf"{re.escape(file_stem(name, 0)[:-7])}-[0-9]{{6,}}\.{fmt}")

    def _manifest_inside(self) -> bool:
        return self.manifest.parent.resolve() == self.out_dir.resolve()

    @contextlib.contextmanager
    def undo_on_failure(self) -> Iterator[None]:
        """On any failure inside: remove the trace files, manifest and run.json that were not there
        before, then the folders the run made if they are empty again; the failure goes on."""
        try:
            yield
        except BaseException:
            manifest = self.manifest.name if self._manifest_inside() else None
            listing: list[Path] = []
            with contextlib.suppress(OSError):  # the failure itself must go on, not one of the clean-up
                listing = list(self.out_dir.iterdir())
            for p in listing:
                if p.name not in self.before and (p.name in (RUN_FILE, manifest) or self.own.fullmatch(p.name)):
                    with contextlib.suppress(OSError):
                        p.unlink()
            if not self.manifest_was_there:
                with contextlib.suppress(OSError):
                    self.manifest.unlink(missing_ok=True)
            for top, start in self.made:
                for d in (start, *start.parents):
                    with contextlib.suppress(OSError):
                        d.rmdir()  # only an empty folder goes
                    if d == top:
                        break
            raise

    def drop_previous(self, report: RunReport) -> None:
        """After a finished run: remove the earlier run's files (``self.previous``) this run did not write."""
        keep = {p.name for p in report.files} | {RUN_FILE}
        if self._manifest_inside():
            keep.add(self.manifest.name)
        for fname in sorted(self.previous - keep):
            p = self.out_dir / fname
            if p.is_file():
                try:
                    p.unlink()
                except OSError as exc:
                    raise TracegenError(f"is left from the earlier run in this folder and cannot be removed "
                                        f"({exc.strerror})", path=p, hint="remove it by hand") from None
                report.removed.append(p)


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

    Call :func:`check_targets` first: this function overwrites. A failure takes back what the run wrote;
    a finished run removes the files of the earlier run in ``out_dir`` that it did not write again.
    """
    folder = _Folder(out_dir, fmt, name, manifest)
    report = RunReport()
    with folder.undo_on_failure():
        for tr in traces:
            path, row = _write_one(tr, folder.out_dir, fmt, name)
            report.files.append(path)
            report.rows.append(row)
        _close_run(report, folder.out_dir, fmt, run, folder.manifest)
    folder.drop_previous(report)
    return report


def write_chunk(job: tuple[Any, ...]) -> list[tuple[str, dict[str, Any]]]:
    """A worker's task: synthesise a chunk of traces and write each to the output folder as it is made
    (one trace in memory at a time; the worker must reach the folder: a local or shared file system);
    returns (file, manifest row) pairs."""
    from . import synth_range

    *synth_job, out_dir, fmt, name = job
    return [(str(p), row) for p, row in (_write_one(tr, Path(out_dir), fmt, name)
                                         for tr in synth_range(tuple(synth_job)))]


def synth_files(model: Any, count: int, duration_s: float, step_s: float, seed: int, out_dir: str | Path, *,
                fmt: str = "parquet", name: str = "model", run: Mapping[str, Any] | None = None,
                manifest: str | Path | None = None, workers: int | None = 1, cluster: str | None = None,
                progress: Any = None, **options: Any) -> RunReport:
    """Synthesise straight into files with the workers writing them (tracegen.parallel): only manifest rows
    travel back, so the run scales with the workers. Same files, manifest and run.json as
    ``write_files(iter_synth(...))``, taken back on failure and replacing an earlier run in the same way.
    ``progress(n)`` is called with each chunk's size."""
    from ..parallel import chunks, runner
    from . import _load, check_run, model_digest

    model, _ = _load(model)
    check_run(model, count, duration_s, step_s, seed, **{k: options.get(k) for k in
                                                        ("cross_traffic", "bottleneck", "handover", "tilt")})
    folder = _Folder(out_dir, fmt, name, manifest)
    options.setdefault("name", name)
    digest, text = model_digest(model), model.to_json()
    report = RunReport()
    with folder.undo_on_failure():
        with runner(workers, cluster) as r:  # leaving it waits for the workers, so nothing is written after the undo
            jobs = [(text, digest, a, n, duration_s, step_s, seed, options, str(folder.out_dir), fmt, name)
                    for a, n in chunks(count, r.workers)]
            for part in r.map(write_chunk, jobs):
                for path, row in part:
                    report.files.append(Path(path))
                    report.rows.append(row)
                if progress is not None:
                    progress(len(part))
        _close_run(report, folder.out_dir, fmt, run, folder.manifest)
    folder.drop_previous(report)
    return report


def add_to_catalog(traces: Iterable[Trace], catalog: Any, *, count: int | None = None,
                   manifest: str | Path | None = None, progress: bool | None = None) -> RunReport:
    """Add the traces to ``catalog`` in one commit (streamed: each is staged as it arrives). The manifest,
    if asked, is checked first and written after the last trace, before the commit: a run that fails
    leaves the catalog as it was and no manifest it wrote."""
    report = RunReport()
    manifest = None if manifest is None else Path(manifest)
    if manifest is not None:
        check_writable(manifest, hint="choose another --manifest")
    was_there = manifest is not None and manifest.exists()

    def keep(items: Iterable[Trace]) -> Iterable[Trace]:
        for tr in items:
            report.rows.append(_row(tr, f"traces/{tr.id}.parquet"))
            yield tr
        _finish_rows(report.rows)
        if manifest is not None:
            report.manifest = write_manifest(report.rows, manifest)

    try:
        added = catalog.add(keep(traces), progress=progress, length=count)
    except BaseException:
        if report.manifest is not None and not was_there:
            with contextlib.suppress(OSError):
                report.manifest.unlink()
        raise
    report.present = list(added.present)
    return report


__all__ = ["write_files", "add_to_catalog", "check_targets", "check_writable", "write_manifest", "file_stem",
           "RunReport", "MANIFEST_COLUMNS", "ROW_GROUP_SAMPLES", "RUN_FILE"]
