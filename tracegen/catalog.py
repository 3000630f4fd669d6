"""The catalog: a directory of traces, one Parquet file each, and an index table with one row per trace.

Layout::

    ROOT/catalog.json          format name and version
    ROOT/index.parquet         one row per trace (id, origin, source, group, tags, figures, provenance, ...)
    ROOT/traces/ID.parquet     the samples, with the trace's metadata in the Parquet schema
    ROOT/.staging/             files of a change that is not committed yet
    ROOT/.lock                 taken (flock) by every change

A change (ingest, add, remove) runs under the lock in three steps: stage data files in ``.staging``
(each written to a temporary name, flushed and renamed), replace ``index.parquet`` atomically (the
commit point), then move the staged files into place. Whoever takes the lock next finishes or undoes an
interrupted change: a staged file whose id the index lists is moved into place (roll forward), any other
staged file is deleted (roll back). So a crash or a kill at any moment leaves no index row without its
file and no half-written file.
"""

from __future__ import annotations

import contextlib
import fcntl
import hashlib
import json
import os
import shutil
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable, Iterator, Sequence, Sized

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from . import selection
from .errors import CatalogError, InputError, TracegenError
from .ingest import Labels, check_options, expand_paths, reader
from .progress import bar
from .trace import Trace

FORMAT_NAME = "tracegen-catalog"
FORMAT_VERSION = 1
INDEX_FILE = "index.parquet"
DAMAGED_INDEX_FILE = "index.damaged.parquet"  # where verify --repair sets an unreadable index aside
TRACES_DIR = "traces"
STAGING_DIR = ".staging"
LOCK_FILE = ".lock"
MARKER_FILE = "catalog.json"

META_COLUMNS = ("id", "origin", "source", "group", "tags", "duration_s", "step_s", "weight", "file",
                "file_sha256", "provenance")
FIGURE_COLUMNS = tuple(Trace.from_columns([0.0]).summary())
INDEX_COLUMNS = META_COLUMNS + FIGURE_COLUMNS
_TEXT = {"id", "origin", "source", "group", "tags", "file", "file_sha256", "provenance"}


_HELD_LOCKS: set[int] = set()   # descriptors of the catalog locks this process holds


def release_inherited_locks() -> None:
    """In a process forked while a catalog lock was held: drop the inherited descriptors, so the lock
    ends with its owner (a flock lives as long as any descriptor of it, and a worker outliving a killed
    parent would otherwise hold the catalog locked)."""
    for fd in list(_HELD_LOCKS):
        try:
            os.close(fd)
        except OSError:
            pass
    _HELD_LOCKS.clear()


def _fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _write_atomic(table: pa.Table, target: Path) -> str:
    """Write a Parquet file under a temporary name, flush it, rename it into place; return its sha256."""
    tmp = target.with_name(f".{target.name}.{os.getpid()}.tmp")
    pq.write_table(table, tmp, compression="zstd")
    with open(tmp, "rb") as f:
        digest = hashlib.sha256(f.read()).hexdigest()
        os.fsync(f.fileno())
    os.replace(tmp, target)
    return digest


def _sha256(path: Path) -> str:
    with open(path, "rb") as f:
        return hashlib.sha256(f.read()).hexdigest()


def index_row(trace: Trace, file_sha256: str) -> dict[str, Any]:
    """The index row describing one stored trace."""
    row: dict[str, Any] = {
        "id": trace.id, "origin": trace.origin, "source": trace.source, "group": trace.group,
        "tags": json.dumps(dict(sorted(trace.tags.items()))), "duration_s": trace.duration_s,
        "step_s": trace.step_s, "weight": trace.weight, "file": f"{TRACES_DIR}/{trace.id}.parquet",
        "file_sha256": file_sha256,
        "provenance": json.dumps(trace.provenance, sort_keys=True, default=str),
    }
    row.update(trace.summary())
    return row


def _index_table(rows: pd.DataFrame) -> pa.Table:
    fields = [pa.field(c, pa.string() if c in _TEXT else pa.float64()) for c in INDEX_COLUMNS]
    schema = pa.schema(fields, metadata={b"tracegen": json.dumps(
        {"format": FORMAT_NAME, "version": FORMAT_VERSION}).encode()})
    rows = rows.sort_values("id", kind="stable") if len(rows) else rows
    arrays = [pa.array(rows[c].tolist() if len(rows) else [], type=f.type) for c, f in zip(INDEX_COLUMNS, fields)]
    return pa.Table.from_arrays(arrays, schema=schema)


def _empty_index() -> pd.DataFrame:
    return pd.DataFrame({c: pd.Series(dtype=object if c in _TEXT else float) for c in INDEX_COLUMNS})


def _whole_trace_row(path: Path) -> dict[str, Any] | None:
    """The index row for a file in ``traces/`` that reads as a trace whose content id is its file name."""
    if path.suffix != ".parquet" or not path.is_file():
        return None
    try:
        trace = Trace.from_arrow(pq.read_table(path), path=str(path))
    except (TracegenError, pa.ArrowException, OSError):
        return None
    return index_row(trace, _sha256(path)) if f"{trace.id}.parquet" == path.name else None


def read_task(job: tuple[str, str, Labels, dict[str, Any]]) -> tuple[list[Trace], TracegenError | None]:
    """A worker's task: one file read by its format's reader; a user's error comes back as a value, so the
    caller decides (stop, or skip the file)."""
    fmt, path, labels, opts = job
    try:
        return reader(fmt).read(Path(path), labels, **opts), None
    except TracegenError as exc:
        return [], exc


@dataclass
class IngestReport:
    """What an ingest did: ids added, ids already present, files that failed (with ``skip_bad``)."""

    files: int = 0
    added: list[str] = field(default_factory=list)
    present: list[str] = field(default_factory=list)
    failed: list[str] = field(default_factory=list)


@dataclass
class VerifyReport:
    """What verify found; ``ok`` when the catalog is consistent."""

    checked: int = 0
    problems: list[str] = field(default_factory=list)
    recovered: list[str] = field(default_factory=list)
    repaired: list[str] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return not self.problems or len(self.repaired) >= len(self.problems)


class Catalog:
    """A catalog directory. Open with :meth:`open`; reading needs no lock, every change takes it."""

    def __init__(self, root: Path):
        self.root = Path(root)
        self._last_recovery: list[str] = []

    # --- opening ----------------------------------------------------------------------------
    @classmethod
    def open(cls, root: str | Path, *, create: bool = False) -> "Catalog":
        """Open the catalog at ``root``; with ``create``, make it when it does not exist yet."""
        root = Path(root)
        marker = root / MARKER_FILE
        if not marker.exists():
            if not create:
                raise CatalogError("is not a tracegen catalog (no catalog.json)", path=root,
                                   hint="build one with `tracegen demo --catalog DIR` or `tracegen ingest`")
            if root.exists() and not root.is_dir():
                raise CatalogError("exists and is not a directory", path=root)
            try:
                (root / TRACES_DIR).mkdir(parents=True, exist_ok=True)
                tmp = root / f".{MARKER_FILE}.tmp"
                tmp.write_text(json.dumps({"format": FORMAT_NAME, "version": FORMAT_VERSION}) + "\n")
                os.replace(tmp, marker)
            except OSError as exc:
                raise CatalogError(f"cannot be created ({exc.strerror})", path=root) from None
        else:
            try:
                info = json.loads(marker.read_text())
            except (OSError, json.JSONDecodeError) as exc:
                raise CatalogError(f"catalog.json is unreadable ({exc})", path=marker) from None
            if info.get("format") != FORMAT_NAME or info.get("version") != FORMAT_VERSION:
                raise CatalogError(f"is format {info.get('format')!r} version {info.get('version')!r}, "
                                   f"expected {FORMAT_NAME!r} version {FORMAT_VERSION}", path=marker,
                                   hint="use the tracegen version that wrote it")
        (root / TRACES_DIR).mkdir(exist_ok=True)
        return cls(root)

    # --- reading ----------------------------------------------------------------------------
    def index(self) -> pd.DataFrame:
        """The index as a DataFrame; ``tags`` and ``provenance`` decoded to dicts."""
        path = self.root / INDEX_FILE
        if not path.exists():
            stored = sum(1 for f in (self.root / TRACES_DIR).glob("*.parquet"))
            if stored:
                raise CatalogError(f"index is missing while {TRACES_DIR}/ holds {stored} trace files", path=path,
                                   hint="run `tracegen catalog verify --repair` to list them again")
            frame = _empty_index()
        else:
            try:
                frame = pq.read_table(path).to_pandas()
            except (pa.ArrowException, OSError) as exc:
                raise CatalogError(f"index is unreadable ({exc})", path=path,
                                   hint="run `tracegen catalog verify --repair`") from None
        frame = frame.copy()
        frame["tags"] = [json.loads(t) for t in frame["tags"]]
        frame["provenance"] = [json.loads(p) for p in frame["provenance"]]
        return frame.reset_index(drop=True)

    def _index_or_none(self) -> pd.DataFrame | None:
        try:
            return self.index()
        except CatalogError:
            return None

    def rows(self, where: Sequence[str] = ()) -> list[dict[str, Any]]:
        """Index rows (plain dicts, NaN as None) of the traces that meet ``where``."""
        frame = selection.select(self.index(), list(where))
        out = []
        for rec in frame.to_dict(orient="records"):
            out.append({k: (None if isinstance(v, float) and np.isnan(v) else v) for k, v in rec.items()})
        return out

    def ids(self, where: Sequence[str] = ()) -> list[str]:
        """Ids of the traces that meet ``where``, sorted."""
        return sorted(selection.select(self.index(), list(where))["id"])

    def resolve(self, ref: str) -> str:
        """The full id for an id or a unique prefix of one."""
        ids = self.index()["id"]
        hits = [i for i in ids if i.startswith(ref)] if ref else []
        if len(hits) == 1:
            return hits[0]
        if not hits:
            raise CatalogError(f"holds no trace with id '{ref}'", path=self.root,
                               hint="list ids with `tracegen catalog list`")
        raise CatalogError(f"id prefix '{ref}' matches {len(hits)} traces", path=self.root,
                           hint="give more characters")

    def get(self, ref: str) -> Trace:
        """Load one trace by id (or unique id prefix)."""
        return self._load(self.resolve(ref))

    def _load(self, tid: str) -> Trace:
        path = self.root / TRACES_DIR / f"{tid}.parquet"
        try:
            table = pq.read_table(path)
        except (pa.ArrowException, OSError) as exc:
            raise CatalogError(f"trace file is unreadable ({exc})", path=path,
                               hint="run `tracegen catalog verify`") from None
        return Trace.from_arrow(table, path=str(path))

    def traces(self, where: Sequence[str] = ()) -> Iterator[Trace]:
        """Load the traces that meet ``where``, one at a time (sorted by id)."""
        for tid in self.ids(where):  # full ids from one read of the index
            yield self._load(tid)

    def __len__(self) -> int:
        return len(self.index())

    # --- changing ---------------------------------------------------------------------------
    @contextlib.contextmanager
    def _locked(self, *, recover: bool = True) -> Iterator[None]:
        try:
            fd = os.open(self.root / LOCK_FILE, os.O_RDWR | os.O_CREAT, 0o644)
        except OSError as exc:
            raise CatalogError(f"cannot take the catalog lock ({exc.strerror})", path=self.root) from None
        try:
            fcntl.flock(fd, fcntl.LOCK_EX)
            _HELD_LOCKS.add(fd)
            for place in (self.root, self.root / TRACES_DIR):  # a change must be able to finish once committed
                if not os.access(place, os.W_OK | os.X_OK):
                    raise CatalogError("is not writable, so nothing was changed", path=place,
                                       hint="fix its permissions or work on a copy of the catalog")
            self._last_recovery = self._recover() if recover else []
            yield
        finally:
            _HELD_LOCKS.discard(fd)
            fcntl.flock(fd, fcntl.LOCK_UN)
            os.close(fd)

    def _recover(self) -> list[str]:
        """Finish or undo a change that was interrupted; return what was done (lock held)."""
        staging = self.root / STAGING_DIR
        if not staging.exists():
            return []
        listed = set(self.index()["id"])
        done = []
        for f in sorted(staging.iterdir()):
            tid = f.name.removesuffix(".parquet")
            final = self.root / TRACES_DIR / f.name
            if f.suffix == ".parquet" and not f.name.startswith(".") and tid in listed and not final.exists():
                os.replace(f, final)
                done.append(f"finished storing {tid} (an earlier change was interrupted after its commit)")
            else:
                f.unlink()
                done.append(f"discarded {f.name} (an earlier change was interrupted before its commit)")
        staging.rmdir()
        _fsync_dir(self.root / TRACES_DIR)
        return done

    def _commit(self, new_rows: list[dict[str, Any]], drop_ids: Iterable[str] = ()) -> None:
        """Replace the index (the commit point), then move staged files into place (lock held)."""
        frame = self.index()
        drop = set(drop_ids)
        if drop:
            frame = frame[~frame["id"].isin(drop)]
        frame["tags"] = [json.dumps(dict(sorted(t.items()))) for t in frame["tags"]]
        frame["provenance"] = [json.dumps(p, sort_keys=True, default=str) for p in frame["provenance"]]
        if new_rows:
            frame = pd.concat([frame, pd.DataFrame(new_rows, columns=list(INDEX_COLUMNS))], ignore_index=True)
        _write_atomic(_index_table(frame), self.root / INDEX_FILE)
        _fsync_dir(self.root)
        staging = self.root / STAGING_DIR
        if staging.exists():
            for row in new_rows:
                src = staging / f"{row['id']}.parquet"
                if src.exists():
                    os.replace(src, self.root / row["file"])
            _fsync_dir(self.root / TRACES_DIR)
            shutil.rmtree(staging)

    def _stage(self, trace: Trace) -> dict[str, Any]:
        staging = self.root / STAGING_DIR
        staging.mkdir(exist_ok=True)
        digest = _write_atomic(trace.to_arrow(), staging / f"{trace.id}.parquet")
        return index_row(trace, digest)

    def add(self, traces: Iterable[Trace], *, progress: bool | None = None, length: int | None = None) -> IngestReport:
        """Store traces, all in one commit; ones whose id is already in the catalog are left as they are.

        ``traces`` may be a generator: each trace is staged as it arrives and then dropped, so memory
        stays flat however many there are (``length`` sizes the progress bar then)."""
        report = IngestReport()
        with self._locked():
            known = set(self.index()["id"])
            rows = []
            if length is None and isinstance(traces, Sized):
                length = len(traces)
            with bar(traces, label="storing traces", length=length, enabled=progress) as items:
                for tr in items:
                    if tr.id in known:
                        report.present.append(tr.id)
                        continue
                    rows.append(self._stage(tr))
                    known.add(tr.id)
                    report.added.append(tr.id)
            self._commit(rows)
        return report

    def ingest(self, paths: Iterable[str | Path], fmt: str, labels: Labels | None = None, *,
               skip_bad: bool = False, progress: bool | None = None, workers: int | None = 1,
               cluster: str | None = None, **options: Any) -> IngestReport:
        """Read measured files with a format's reader and store their traces in one commit.

        All or nothing: if any file is bad the error is raised and the catalog is unchanged, unless
        ``skip_bad``, which stores the good files and lists the bad ones in ``failed``. Files whose
        traces are already stored add nothing. ``workers`` local processes or a Dask ``cluster``
        (tracegen.parallel) read the files, one task per file (a cluster's workers must see the
        paths); this process stores what they read, in the files' order, so the catalog is the same.
        """
        from .parallel import runner

        labels = labels or Labels()
        opts = check_options(fmt, options)
        files = expand_paths(paths, fmt)
        report = IngestReport(files=len(files))
        with self._locked(), runner(workers, cluster) as run:
            known = set(self.index()["id"])
            rows: list[dict[str, Any]] = []
            try:
                jobs = [(fmt, str(p), labels, opts) for p in files]
                with bar(run.map(read_task, jobs), label=f"ingesting {len(files)} {fmt} files", length=len(files),
                         enabled=progress) as items:
                    for traces, error in items:
                        if error is not None:
                            if not skip_bad:
                                raise error
                            report.failed.append(str(error))
                            continue
                        for tr in traces:
                            if tr.id in known:
                                report.present.append(tr.id)
                                continue
                            rows.append(self._stage(tr))
                            known.add(tr.id)
                            report.added.append(tr.id)
            except BaseException:
                shutil.rmtree(self.root / STAGING_DIR, ignore_errors=True)
                raise
            self._commit(rows)
        return report

    def remove(self, refs: Iterable[str]) -> list[str]:
        """Remove traces by id (or unique prefix); return the ids removed."""
        with self._locked():
            ids = sorted({self.resolve(r) for r in refs})
            if not ids:
                return []
            staging = self.root / STAGING_DIR
            staging.mkdir(exist_ok=True)
            for tid in ids:  # parked in staging first, so an interrupted remove is rolled back
                src = self.root / TRACES_DIR / f"{tid}.parquet"
                if src.exists():
                    os.replace(src, staging / src.name)
            self._commit([], drop_ids=ids)
        return ids

    def discard_if_empty(self, *, remove_root: bool = False) -> bool:
        """Undo ``open(create=True)`` of a catalog that never took a trace (a first ingest that failed):
        remove its marker, lock, empty index and ``traces/``, and with ``remove_root`` the folder itself
        when that leaves it empty. Returns whether the catalog was discarded."""
        traces_dir = self.root / TRACES_DIR
        if len(self) or (self.root / STAGING_DIR).exists() or any(traces_dir.iterdir()):
            return False
        for name in (INDEX_FILE, LOCK_FILE, MARKER_FILE):
            (self.root / name).unlink(missing_ok=True)
        traces_dir.rmdir()
        if remove_root:
            with contextlib.suppress(OSError):  # not empty: the user's own files stay, and so does the folder
                self.root.rmdir()
        return True

    # --- checking ---------------------------------------------------------------------------
    def verify(self, *, repair: bool = False, progress: bool | None = None) -> VerifyReport:
        """Check every file against its hash and content id; find orphans. ``repair`` mends what it can.

        Problems: an index row whose file is missing, unreadable, or whose bytes or content do not match
        the row; a file in ``traces/`` that no row lists (an orphan); an unreadable index. Repair drops
        the bad rows and their files, lists again every orphan that is a whole trace under its own id (each
        trace file carries its full metadata), removes the other orphans, and rebuilds an unreadable index
        from the trace files after setting it aside as ``index.damaged.parquet``.
        """
        report = VerifyReport()
        with self._locked(recover=False):  # recovery reads the index: first see that it can be read
            frame = self._index_or_none()
            if frame is None:
                index_path = self.root / INDEX_FILE
                report.problems.append(f"{INDEX_FILE}: " + ("unreadable" if index_path.exists() else "missing"))
                if not repair:
                    return report
                if index_path.exists():
                    os.replace(index_path, self.root / DAMAGED_INDEX_FILE)
                    report.repaired.append(f"set the unreadable index aside as {DAMAGED_INDEX_FILE}")
                _write_atomic(_index_table(_empty_index()), index_path)  # every trace file is now an orphan
                frame = self.index()
                report.repaired.append("rebuilt the index from the trace files")
            report.recovered = self._recover()
            bad_ids: list[str] = []
            with bar(list(frame.itertuples(index=False)), label="verifying", enabled=progress) as rows:
                for row in rows:
                    report.checked += 1
                    path = self.root / row.file
                    problem = None
                    if not path.exists():
                        problem = "file is missing"
                    elif _sha256(path) != row.file_sha256:
                        problem = "file bytes do not match the index's sha256"
                    else:
                        try:
                            tr = Trace.from_arrow(pq.read_table(path), path=str(path))
                            if tr.id != row.id:
                                problem = f"content hashes to {tr.id}, not its id"
                        except (TracegenError, pa.ArrowException, OSError) as exc:
                            problem = f"file is unreadable ({exc})"
                    if problem:
                        report.problems.append(f"{row.file}: {problem}")
                        bad_ids.append(row.id)
            listed = {f"{i}.parquet" for i in frame["id"]}
            orphans = sorted(f for f in (self.root / TRACES_DIR).iterdir() if f.name not in listed)
            relisted = []
            for f in orphans:
                whole = _whole_trace_row(f)
                report.problems.append(f"{TRACES_DIR}/{f.name}: orphan (no index row lists it"
                                       + ("; the file is a whole trace)" if whole else ")"))
                if repair and whole:
                    relisted.append(whole)
                    report.repaired.append(f"listed {TRACES_DIR}/{f.name} again from its own metadata")
                elif repair:
                    if f.is_dir():
                        shutil.rmtree(f)
                    else:
                        f.unlink()
                    report.repaired.append(f"removed orphan {TRACES_DIR}/{f.name}")
            if repair and (bad_ids or relisted):
                for tid in bad_ids:
                    p = self.root / TRACES_DIR / f"{tid}.parquet"
                    if p.exists():
                        p.unlink()
                    report.repaired.append(f"dropped trace {tid} (its file was missing or damaged)")
                self._commit(relisted, drop_ids=bad_ids)
                report.checked += len(relisted)
        return report

    # --- figures ----------------------------------------------------------------------------
    def stats(self, where: Sequence[str] = (), by: str | None = None) -> list[dict[str, Any]]:
        """Counts and hours of the selected traces, overall or per value of a tag or text field."""
        frame = selection.select(self.index(), list(where))
        if by is None:
            keys = pd.Series(["all"] * len(frame), index=frame.index)
        elif by in frame.columns and by not in ("tags", "provenance"):
            keys = frame[by].astype(str)
        else:
            name = by.removeprefix("tag.")
            if len(frame) and not any(name in t for t in frame["tags"]):
                raise CatalogError(f"no trace has a tag or field '{name}'", path=self.root, field="by",
                                   hint="list tags with `tracegen catalog list`")
            keys = pd.Series([t.get(name, "(none)") for t in frame["tags"]], index=frame.index)
        out = []
        for key in sorted(keys.unique()) if len(frame) else []:
            part = frame[keys == key]
            bw = part["mean_bw_bps"].to_numpy(dtype=float)
            out.append({
                "key": key, "traces": int(len(part)), "hours": float(part["duration_s"].sum() / 3600),
                "groups": int(part["group"].nunique()),
                "measured": int((part["origin"] == "measured").sum()),
                "synthetic": int((part["origin"] == "synthetic").sum()),
                "median_mean_bw_bps": float(np.nanmedian(bw)) if np.isfinite(bw).any() else None,
                "median_rtt_ms": _nanmedian(part["median_rtt_ms"]),
                "outage_share": _weighted(part["outage_share"], part["duration_s"]),
            })
        return out


def _nanmedian(values: pd.Series) -> float | None:
    v = values.to_numpy(dtype=float)
    return float(np.nanmedian(v)) if np.isfinite(v).any() else None


def _weighted(values: pd.Series, weights: pd.Series) -> float | None:
    v = values.to_numpy(dtype=float)
    w = weights.to_numpy(dtype=float)
    ok = np.isfinite(v) & np.isfinite(w)
    return float(np.sum(v[ok] * w[ok]) / np.sum(w[ok])) if ok.any() and np.sum(w[ok]) > 0 else None


__all__ = ["Catalog", "IngestReport", "VerifyReport", "InputError", "index_row"]
