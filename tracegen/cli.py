"""The ``tracegen`` command: a thin click layer that parses, calls the library and prints."""

from __future__ import annotations

import json
import math
import os
import sys
from pathlib import Path
from typing import Any

import click

from . import __version__
from .errors import TracegenError
from .paths import ENV_CATALOG, default_catalog

EXIT_USER_ERROR = 2
EXIT_INTERNAL = 3


class _Group(click.Group):
    """Turns a TracegenError into one line on stderr and exit code 2 (a traceback only with --debug)."""

    def invoke(self, ctx: click.Context) -> Any:
        try:
            return super().invoke(ctx)
        except TracegenError as exc:
            if (ctx.obj or {}).get("debug"):
                raise
            click.echo(f"error: {exc}", err=True)
            ctx.exit(EXIT_USER_ERROR)
        except (click.exceptions.Exit, click.exceptions.Abort, click.ClickException):
            raise
        except BrokenPipeError:  # the reader of our output went away (e.g. `| head`): stop quietly
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, sys.stdout.fileno())
            ctx.exit(0)
        except Exception as exc:  # a bug of ours: say so briefly, keep the traceback for --debug
            if (ctx.obj or {}).get("debug"):
                raise
            click.echo(f"internal error: {type(exc).__name__}: {exc} (rerun with --debug for the traceback "
                       f"and please report it)", err=True)
            ctx.exit(EXIT_INTERNAL)


def _catalog_option(f):
    return click.option("--catalog", "catalog_path", type=click.Path(file_okay=False, path_type=Path),
                        default=None, help=f"Catalog directory (default: ${ENV_CATALOG}, the checkout's "
                                           "catalog/, or a per-user data directory).")(f)


def _catalog_root(ctx: click.Context, given: Path | None) -> Path:
    return given or ctx.obj.get("catalog") or default_catalog()


def _open(ctx: click.Context, given: Path | None, create: bool = False):
    from .catalog import Catalog

    return Catalog.open(_catalog_root(ctx, given), create=create)


def _clean(value: Any) -> Any:
    if isinstance(value, float) and math.isnan(value):
        return None
    if isinstance(value, dict):
        return {k: _clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_clean(v) for v in value]
    return value


def _print_json(value: Any) -> None:
    click.echo(json.dumps(_clean(value), indent=2, sort_keys=True, default=str))


@click.group(cls=_Group, context_settings={"help_option_names": ["-h", "--help"]})
@_catalog_option
@click.option("--debug", is_flag=True, help="Show the full traceback on errors.")
@click.version_option(__version__, prog_name="tracegen")
@click.pass_context
def cli(ctx: click.Context, catalog_path: Path | None, debug: bool) -> None:
    """Curate measured network-path traces, model them, synthesise more, and measure the gap."""
    ctx.ensure_object(dict)
    ctx.obj["catalog"] = catalog_path
    ctx.obj["debug"] = debug


# --- ingest ----------------------------------------------------------------------------------------
# (flag, reader option, click type, help). Every reader option has exactly one flag here.
_READER_FLAGS: list[tuple[str, str, Any, str]] = [
    ("--time-column", "time_column", str, "Column with the time stamps (header name or 0-based position)."),
    ("--time-unit", "time_unit", str, "Time stamps in s, ms, us, ns or iso8601."),
    ("--bandwidth-column", "bandwidth_column", str, "Column with the throughput or available bandwidth."),
    ("--bandwidth-unit", "bandwidth_unit", str,
     "bps, kbps, Mbps, Gbps, Bps, kBps, MBps, or bytes (bytes since the previous row)."),
    ("--rtt-column", "rtt_column", str, "Column with the round-trip time."),
    ("--rtt-unit", "rtt_unit", str, "RTT in ms, s or us."),
    ("--loss-column", "loss_column", str, "Column with the loss per interval."),
    ("--loss-unit", "loss_unit", str, "Loss as fraction or percent."),
    ("--jitter-column", "jitter_column", str, "Column with the jitter."),
    ("--jitter-unit", "jitter_unit", str, "Jitter in ms, s or us."),
    ("--cell-column", "cell_column", str, "Column with the serving cell or access point."),
    ("--lat-column", "lat_column", str, "Column with latitude in degrees (coarsened unless --keep-personal)."),
    ("--lon-column", "lon_column", str, "Column with longitude in degrees (coarsened unless --keep-personal)."),
    ("--delimiter", "delimiter", str, "Field delimiter: ',', 'tab', ';' or '|' (default: detect)."),
    ("--split-column", "split_column", str, "Column whose values cut the file into separate traces."),
    ("--tag-column", "tag_columns", str, "Column whose first value becomes a tag (repeatable)."),
    ("--group-column", "group_column", str, "Column naming the group (session, route, device) of each trace."),
    ("--bytes-column", "bytes_column", str, "Packets: column with each packet's size in bytes."),
    ("--seq-column", "seq_column", str, "Packets: column with sequence numbers (loss from gaps)."),
    ("--seq-bits", "seq_bits", int, "Packets: sequence numbers wrap at 2^N (e.g. 16 for RTP)."),
    ("--send-time-column", "send_time_column", str, "Packets: sender time stamps (jitter per RFC 3550)."),
    ("--clock-rate-hz", "clock_rate_hz", float, "RTCP: RTP clock rate for jitter, when lines do not say."),
    ("--interval", "interval_s", str, "Interval or bin width, e.g. 1s or 250ms."),
]


def _reader_options(f):
    for flag, key, typ, text in reversed(_READER_FLAGS):
        multiple = key == "tag_columns"
        f = click.option(flag, key, type=typ, default=None, multiple=multiple, help=text)(f)
    return f


def _parse_tags(values: tuple[str, ...]) -> dict[str, str]:
    tags = {}
    for item in values:
        key, sep, value = item.partition("=")
        if not sep or not key.strip():
            raise click.BadParameter(f"'{item}' is not KEY=VALUE", param_hint="--tag")
        tags[key.strip()] = value.strip()
    return tags


def _parallel_options(f):
    f = click.option("--workers", type=int, default=None,
                     help="Local worker processes [default: the cores].")(f)
    f = click.option("--cluster", default=None, metavar="tcp://HOST:PORT|FILE",
                     help="Run on this Dask cluster (scheduler address or scheduler file; pip install '.[dask]').")(f)
    return f


@cli.command()
@click.argument("files", nargs=-1, required=True, type=click.Path(path_type=Path))
@click.option("--format", "fmt", type=click.Choice(["csv", "rtcp", "ping", "packets"]), required=True,
              help="What the files are.")
@click.option("--tag", "tags", multiple=True, metavar="KEY=VALUE",
              help="Tag every trace (access, mobility, place, direction, device, ...). Repeatable.")
@click.option("--group", default=None, help="Group of every trace (default: the file name, or --group-column).")
@click.option("--source", default=None, help="Source label (default: the file name).")
@click.option("--keep-personal", is_flag=True,
              help="Keep addresses, identifiers and precise locations instead of dropping or coarsening them.")
@click.option("--describe", is_flag=True, help="Dry run: print what would be read and store nothing.")
@click.option("--skip-bad", is_flag=True, help="Store the good files and list the bad ones (default: all or nothing).")
@click.option("--json", "as_json", is_flag=True, help="Print the result as JSON.")
@_reader_options
@_catalog_option
@_parallel_options
@click.pass_context
def ingest(ctx: click.Context, files: tuple[Path, ...], fmt: str, tags: tuple[str, ...], group: str | None,
           source: str | None, keep_personal: bool, describe: bool, skip_bad: bool, as_json: bool,
           catalog_path: Path | None, workers: int | None, cluster: str | None, **options: Any) -> None:
    """Read measured FILES (or directories of them) into the catalog."""
    from .ingest import Labels, describe_file, expand_paths
    from .units import parse_duration_s

    if options.get("tag_columns") == ():
        options["tag_columns"] = None
    if options.get("interval_s") is not None:
        options["interval_s"] = parse_duration_s(options["interval_s"], "--interval")
    given = {k: v for k, v in options.items() if v is not None}
    labels = Labels(tags=_parse_tags(tags), group=group, source=source, keep_personal=keep_personal)
    if describe:
        for path in expand_paths(files, fmt):
            click.echo(describe_file(path, fmt, labels, **given))
        return
    from .catalog import MARKER_FILE

    root = _catalog_root(ctx, catalog_path)
    folder_existed, is_new = root.exists(), not (root / MARKER_FILE).exists()
    cat = _open(ctx, catalog_path, create=True)
    try:
        report = cat.ingest(files, fmt, labels, skip_bad=skip_bad, workers=workers, cluster=cluster, **given)
    except TracegenError:
        if is_new:  # a first ingest that failed leaves no half-made catalog behind
            cat.discard_if_empty(remove_root=not folder_existed)
        raise
    nothing = bool(report.failed) and not report.added and not report.present
    if nothing and is_new:
        cat.discard_if_empty(remove_root=not folder_existed)
    if as_json:
        _print_json({"files": report.files, "added": report.added, "present": report.present,
                     "failed": report.failed})
    else:
        click.echo(f"{report.files} files: {len(report.added)} traces added, "
                   f"{len(report.present)} already present; catalog {cat.root} holds {len(cat)}")
        for line in report.failed:
            click.echo(f"skipped: {line}", err=True)
    if nothing:  # --skip-bad, and every file was bad
        ctx.exit(1)


# --- catalog ---------------------------------------------------------------------------------------
@cli.group(cls=_Group)
def catalog() -> None:
    """List, show, remove, verify and count the catalog's traces."""


_where = click.option("--where", multiple=True, metavar="EXPR",
                      help="Selection, e.g. access=lte or 'mean_bw_bps<5e6' (repeatable; all must hold).")


def _fmt_tags(tags: dict) -> str:
    return " ".join(f"{k}={v}" for k, v in sorted(tags.items()))


@catalog.command("list")
@_where
@click.option("--json", "as_json", is_flag=True, help="Print a JSON array of index rows.")
@_catalog_option
@click.pass_context
def list_(ctx: click.Context, where: tuple[str, ...], as_json: bool, catalog_path: Path | None) -> None:
    """List traces (one line each, or JSON with --json)."""
    rows = _open(ctx, catalog_path).rows(where)
    if as_json:
        _print_json(rows)
        return
    click.echo(f"{'id':16}  {'origin':9}  {'group':16}  {'duration':>9}  {'step':>6}  {'mean Mbit/s':>11}  tags")
    for r in rows:
        mean, step = r["mean_bw_bps"], r["step_s"]  # no step: a one-sample trace from an older tracegen
        step_text = "-" if step is None else f"{step:5.2g}s"
        mean_text = "" if mean is None else f"{mean / 1e6:11.3f}"
        click.echo(f"{r['id']:16}  {r['origin']:9}  {str(r['group'])[:16]:16}  {r['duration_s']:8.0f}s  "
                   f"{step_text:>6}  {mean_text:>11}  {_fmt_tags(r['tags'])}")
    click.echo(f"{len(rows)} traces")


@catalog.command()
@click.argument("trace_id")
@click.option("--samples", default=10, show_default=True, help="How many samples to print.")
@click.option("--json", "as_json", is_flag=True, help="Print the index row and the samples as JSON.")
@_catalog_option
@click.pass_context
def show(ctx: click.Context, trace_id: str, samples: int, as_json: bool, catalog_path: Path | None) -> None:
    """Show one trace: what is known about it and its first samples."""
    cat = _open(ctx, catalog_path)
    tid = cat.resolve(trace_id)
    row = next(r for r in cat.rows([f"id={tid}"]))
    frame = cat.get(tid).to_pandas().head(samples)
    if as_json:
        row = dict(row)
        row["samples"] = frame.astype(object).where(frame.notna(), None).to_dict(orient="list")
        _print_json(row)
        return
    for key in ("id", "origin", "source", "group", "duration_s", "step_s", "weight"):
        click.echo(f"{key:>18}: {row[key]}")
    click.echo(f"{'tags':>18}: {_fmt_tags(row['tags'])}")
    for key in ("mean_bw_bps", "median_bw_bps", "p5_bw_bps", "outage_share", "median_rtt_ms", "p95_rtt_ms",
                "mean_loss", "median_jitter_ms", "cell_changes"):
        click.echo(f"{key:>18}: {'unknown' if row[key] is None else f'{row[key]:.6g}'}")
    click.echo(f"{'provenance':>18}: {json.dumps(row['provenance'], sort_keys=True)}")
    click.echo(frame.to_string(index=False))


@catalog.command()
@click.argument("trace_ids", nargs=-1)
@_where
@_catalog_option
@click.pass_context
def remove(ctx: click.Context, trace_ids: tuple[str, ...], where: tuple[str, ...], catalog_path: Path | None) -> None:
    """Remove traces by id (or unique prefix) and/or by selection."""
    if not trace_ids and not where:
        raise click.UsageError("name trace ids or give --where")
    cat = _open(ctx, catalog_path)
    refs = list(trace_ids) + (cat.ids(where) if where else [])
    removed = cat.remove(refs)
    click.echo(f"removed {len(removed)} traces; {len(cat)} left")


@catalog.command()
@click.option("--repair", is_flag=True, help="Remove orphan files and rows whose file is missing or damaged.")
@click.option("--json", "as_json", is_flag=True, help="Print the findings as JSON.")
@_catalog_option
@click.pass_context
def verify(ctx: click.Context, repair: bool, as_json: bool, catalog_path: Path | None) -> None:
    """Check every trace file against its hash; exit 1 when problems remain."""
    report = _open(ctx, catalog_path).verify(repair=repair)
    if as_json:
        _print_json({"checked": report.checked, "problems": report.problems, "recovered": report.recovered,
                     "repaired": report.repaired, "ok": report.ok})
    else:
        for line in report.recovered:
            click.echo(f"recovered: {line}")
        for line in report.problems:
            click.echo(f"problem: {line}")
        for line in report.repaired:
            click.echo(f"repaired: {line}")
        verdict = ("consistent after repair" if report.repaired else "consistent") if report.ok \
            else f"{len(report.problems)} problems (try --repair)"
        click.echo(f"{report.checked} traces checked: {verdict}")
    if not report.ok:
        ctx.exit(1)


@catalog.command()
@_where
@click.option("--by", default=None, help="Break down by a tag (access, mobility, ...) or field (origin, group).")
@click.option("--json", "as_json", is_flag=True, help="Print the figures as JSON.")
@_catalog_option
@click.pass_context
def stats(ctx: click.Context, where: tuple[str, ...], by: str | None, as_json: bool,
          catalog_path: Path | None) -> None:
    """Count traces and hours, overall or per tag value."""
    rows = _open(ctx, catalog_path).stats(where, by=by)
    if as_json:
        _print_json(rows)
        return
    click.echo(f"{by or '':14}  {'traces':>6}  {'hours':>7}  {'groups':>6}  {'median Mbit/s':>13}  "
               f"{'median RTT ms':>13}  {'outage':>6}")
    for r in rows:
        bw = r["median_mean_bw_bps"]
        rtt = r["median_rtt_ms"]
        out = r["outage_share"]
        click.echo(f"{str(r['key'])[:14]:14}  {r['traces']:6d}  {r['hours']:7.2f}  {r['groups']:6d}  "
                   f"{'-' if bw is None else f'{bw / 1e6:.3f}':>13}  {'-' if rtt is None else f'{rtt:.1f}':>13}  "
                   f"{'-' if out is None else f'{out:.1%}':>6}")


# --- fit and model -------------------------------------------------------------------------------
def _parse_states(text: str) -> list[int]:
    """'3', '2..8' or '2,3,5' -> state counts."""
    try:
        if ".." in text:
            lo, hi = (int(v) for v in text.split("..", 1))
            values = list(range(lo, hi + 1))
        else:
            values = [int(v) for v in text.split(",")]
    except ValueError:
        raise click.BadParameter(f"'{text}' is not a count or a range", param_hint="--states") from None
    if not values or min(values) < 1:
        raise click.BadParameter(f"'{text}' must name counts >= 1 (e.g. 3 or 2..8)", param_hint="--states")
    return values


@cli.command("fit")
@_where
@click.option("--states", default="2..8", show_default=True, help="Level states: a count (3), a range (2..8) or a list.")
@click.option("--step", default=None, help="Fit at this step, e.g. 1s (default: the traces' own step).")
@click.option("--with-rtt", is_flag=True, help="Model log-RTT jointly with log-bandwidth (full covariance per state).")
@click.option("--restarts", default=3, show_default=True, help="Seeded EM restarts per state count; the best wins.")
@click.option("--max-iter", default=100, show_default=True, help="EM iterations per restart.")
@click.option("--criterion", type=click.Choice(["full-bic", "hmm-bic"]), default="full-bic", show_default=True,
              help="How the state count is chosen.")
@click.option("--seed", default=0, show_default=True, help="Seed of the restarts.")
@click.option("--slow-block", default="60s", show_default=True,
              help="Block length for the slow part (per-trace offset and drift over minutes); 'none' leaves it out.")
@click.option("--outage-slope/--no-outage-slope", default=True, show_default=True,
              help="Tie the outage-entry rate to the slow level (coverage holes; kept only when BIC says so).")
@click.option("--out", "out", type=click.Path(dir_okay=False, path_type=Path), required=True, help="Model file to write (JSON).")
@click.option("--force", is_flag=True, help="Replace --out if it exists.")
@_catalog_option
@_parallel_options
@click.pass_context
def fit_cmd(ctx: click.Context, where: tuple[str, ...], states: str, step: str | None, with_rtt: bool, restarts: int,
            max_iter: int, criterion: str, seed: int, slow_block: str, outage_slope: bool, out: Path, force: bool,
            catalog_path: Path | None, workers: int | None, cluster: str | None) -> None:
    """Fit a path model to the selected catalog traces and write it as JSON."""
    from .fit import fit
    from .model import ModelError
    from .units import parse_duration_s

    counts = _parse_states(states)
    step_s = None if step is None else parse_duration_s(step, "--step")
    slow_s = None if slow_block.strip().lower() == "none" else parse_duration_s(slow_block, "--slow-block")
    if out.exists() and not force:
        raise ModelError("exists already", path=out, hint="pass --force to replace it")
    cat = _open(ctx, catalog_path)
    traces = list(cat.traces(where))
    model = fit(traces, states=counts, step_s=step_s, with_rtt=with_rtt, restarts=restarts, seed=seed,
                max_iter=max_iter, criterion=criterion, slow_block_s=slow_s, outage_slope=outage_slope,
                selection=list(where), workers=workers, cluster=cluster)
    model.save(out)
    click.echo(model.summary_text())
    click.echo(f"wrote {out}")


@cli.group(cls=_Group)
def model() -> None:
    """Look at fitted model files."""


@model.command("show")
@click.argument("path", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--json", "as_json", is_flag=True, help="Print the validated model as JSON.")
def model_show(path: Path, as_json: bool) -> None:
    """Print a readable summary of a model file (it is validated first)."""
    from .model import load

    m = load(path)
    click.echo(m.to_json().rstrip() if as_json else m.summary_text())


# --- synth and scenarios ---------------------------------------------------------------------------
def _synth_options(f):
    """The options of ``synth``: each sets one scenario key (scenario.OPTION_KEYS), named in its help."""
    opts = [
        click.option("--scenario", "scenario_file", type=click.Path(dir_okay=False, path_type=Path), default=None,
                     help="A scenario file (TOML) with the run's settings; options given here win."),
        click.option("--count", type=int, default=None, help="How many traces [count]."),
        click.option("--duration", type=str, default=None, help="Length of each trace, e.g. 600 or 10min [duration_s]."),
        click.option("--step", type=str, default=None, help="Sample step, at least 10 ms, e.g. 0.1 or 100ms [step_s]."),
        click.option("--seed", type=int, default=None, help="Seed of the run [seed]."),
        click.option("--name", type=str, default=None, help="Label of the run in sources, tags and file names [name]."),
        click.option("--out", type=click.Path(file_okay=False, path_type=Path), default=None,
                     help="Write one file per trace into this folder [output.dir]."),
        click.option("--format", "format", type=click.Choice(["parquet", "csv"]), default=None,
                     help="File format with --out [output.format]."),
        click.option("--catalog", type=click.Path(file_okay=False, path_type=Path), default=None,
                     help="Add the traces to this catalog instead [output.catalog]."),
        click.option("--force", is_flag=True, default=None,
                     help="Replace files that exist in --out; files of the earlier run there that this run does not "
                          "write again are removed [output.force]."),
        click.option("--manifest", type=click.Path(dir_okay=False, path_type=Path), default=None,
                     help="Where the per-trace weight table goes [output.manifest]."),
        click.option("--cross-flows-per-s", type=float, default=None,
                     help="Competing flows arriving per second [cross_traffic.flow_rate_per_s]."),
        click.option("--buffer-ms", type=float, default=None, help="Bottleneck buffer in ms [bottleneck.buffer_ms]."),
        click.option("--policy", type=str, default=None,
                     help="Bottleneck drop policy: drop-tail, red or codel [bottleneck.policy]."),
        click.option("--handovers-per-min", type=float, default=None, help="Handover rate [handover.rate_per_min]."),
        click.option("--handover-at", type=str, multiple=True,
                     help="A handover at this time, e.g. 90 or 2min (repeatable) [handover.times_s]."),
        click.option("--tilt-states", type=str, default=None,
                     help="Weights raising the chance of states, lowest first, e.g. 4,2,1,1,1 [tilt.state_weights]."),
        click.option("--tilt-handovers", type=float, default=None,
                     help="Multiply the handover rate, weighting traces back [tilt.handover_rate_factor]."),
        click.option("--tag", "tag", type=str, multiple=True, help="KEY=VALUE label on every trace (repeatable) [tags]."),
        click.option("--set", "assignments", multiple=True, metavar="SECTION.KEY=VALUE",
                     help="Set any scenario key, e.g. bottleneck.buffer_bytes=50000 or tilt.failure_factor=3 "
                          "(repeatable; the value is read as TOML)."),
    ]
    for opt in reversed(opts):
        f = opt(f)
    return f


def _plan_from_cli(model_file: Path | None, values: dict[str, Any]):
    from .synth.scenario import OPTION_KEYS, load_scenario
    from .units import parse_duration_s

    settings: dict[str, Any] = {"model": None if model_file is None else str(model_file)}
    for option, key in OPTION_KEYS.items():
        value = values.get(option.replace("-", "_"))
        if value is None or value == ():
            continue
        if option in ("duration", "step"):
            value = parse_duration_s(value, f"--{option}")
        elif option in ("out", "catalog", "manifest"):
            value = str(value)
        elif option == "handover-at":
            value = [0.0 if _is_zero(v) else parse_duration_s(v, "--handover-at") for v in value]
        elif option == "tilt-states":
            try:
                value = [float(v) for v in value.split(",")]
            except ValueError:
                raise click.BadParameter(f"'{value}' is not a comma-separated list of numbers",
                                         param_hint="--tilt-states") from None
        elif option == "tag":
            tags = {}
            for item in value:
                k, sep, v = item.partition("=")
                if not sep or not k.strip():
                    raise click.BadParameter(f"'{item}' is not KEY=VALUE", param_hint="--tag")
                tags[k.strip()] = v.strip()
            value = tags
        settings[key] = value
    for k, v in (settings.pop("tags", None) or {}).items():
        settings[f"tags.{k}"] = v
    return load_scenario(values.get("scenario_file"), settings, tuple(values.get("assignments") or ()))


def _is_zero(text: str) -> bool:
    try:
        return float(text) == 0.0
    except ValueError:
        return False


@cli.command("synth")
@click.argument("model_file", required=False, type=click.Path(dir_okay=False, path_type=Path))
@_synth_options
@_parallel_options
@click.pass_context
def synth_cmd(ctx: click.Context, model_file: Path | None, workers: int | None, cluster: str | None,
              **values: Any) -> None:
    """Sample synthetic traces from MODEL_FILE (or the scenario's model) into files or a catalog.

    Same model, settings and seed give the same bytes. Each trace records its importance weight when a
    tilt is set; the manifest lists them with the self-normalised weights.
    """
    from .model import load
    from .progress import bar
    from .synth import iter_synth, model_digest
    from .synth.output import add_to_catalog, check_targets, check_writable, synth_files

    if values.get("catalog") is None and values.get("out") is None and ctx.obj.get("catalog") is not None:
        values["catalog"] = ctx.obj["catalog"]
    plan = _plan_from_cli(model_file, values)
    if plan.output_dir is None and plan.output_catalog is None:
        raise click.UsageError("say where the traces go: --out DIR or --catalog DIR (or output.dir in the scenario)")
    model = load(plan.model_path)
    run = {"plan": {**plan.to_dict(), "count": plan.count}, "model_sha256": model_digest(model)}
    if plan.output_dir is not None:
        check_targets(plan.output_dir, plan.name, range(plan.count), plan.output_format, force=plan.force,
                      manifest=plan.manifest)
        with bar(range(plan.count), label=f"synthesising {plan.count} traces", length=plan.count) as shown:
            tick = getattr(shown, "update", None)
            options = {k: v for k, v in plan.options().items() if k != "name"}
            report = synth_files(model, plan.count, plan.duration_s, plan.step_s, plan.seed, plan.output_dir,
                                 fmt=plan.output_format, name=plan.name, run=run, manifest=plan.manifest,
                                 workers=workers, cluster=cluster, progress=tick, **options)
        click.echo(f"wrote {len(report.files)} traces to {plan.output_dir} (manifest {report.manifest})")
        if report.removed:
            click.echo(f"removed {len(report.removed)} file(s) of the earlier run in {plan.output_dir} "
                       "that this run did not write again")
    else:
        from .catalog import Catalog

        if plan.manifest is not None and plan.manifest.exists() and not plan.force:
            raise TracegenError("exists already", path=plan.manifest, hint="pass --force to replace it")
        if plan.manifest is not None:
            check_writable(plan.manifest, hint="choose another --manifest")
        cat = Catalog.open(plan.output_catalog, create=True)
        stream = iter_synth(model, plan.count, plan.duration_s, plan.step_s, plan.seed, workers=workers,
                            cluster=cluster, **plan.options())
        report = add_to_catalog(stream, cat, count=plan.count, manifest=plan.manifest)
        click.echo(f"added {len(report.rows) - len(report.present)} synthetic traces "
                   f"({len(report.present)} already there) to {cat.root}")
    if plan.tilt is not None:
        click.echo(f"tilted: effective sample size {report.effective_sample_size:.1f} of {len(report.rows)}")


@cli.group(cls=_Group)
def scenario() -> None:
    """Check scenario files and list their keys."""


@scenario.command("check")
@click.argument("path", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--set", "assignments", multiple=True, metavar="SECTION.KEY=VALUE",
              help="Set any scenario key before checking (repeatable).")
def scenario_check(path: Path, assignments: tuple[str, ...]) -> None:
    """Validate a scenario file against its model and print the resolved plan."""
    from .model import load
    from .synth import check_run
    from .synth.scenario import load_scenario

    plan = load_scenario(path, None, assignments)
    model = load(plan.model_path)
    try:
        check_run(model, plan.count, plan.duration_s, plan.step_s, plan.seed, cross_traffic=plan.cross_traffic,
                  bottleneck=plan.bottleneck, handover=plan.handover, tilt=plan.tilt)
    except TracegenError as exc:
        raise TracegenError(exc.message, path=path, field=exc.field, hint=exc.hint) from None
    click.echo(plan.describe())
    click.echo(f"model: {model.n_states} states at {model.step_s:g} s; "
               f"{plan.count * math.ceil(plan.duration_s / plan.step_s - 1e-9):,} samples in all")
    click.echo("ok")


@scenario.command("keys")
def scenario_keys() -> None:
    """List every scenario key with its default and the option that sets it."""
    from .synth.scenario import OPTION_KEYS, all_keys

    by_key = {v: k for k, v in OPTION_KEYS.items()}
    for key, default in all_keys().items():
        option = by_key.get(key) or by_key.get(key.split(".")[0])
        how = f"--{option}" if option else f"--set {key}=..."
        click.echo(f"{key:36} {'' if default is None else default!s:14} {how}")


# --- coverage --------------------------------------------------------------------------------------
@cli.command("coverage")
@_catalog_option
@click.option("--real", "real", multiple=True, metavar="EXPR",
              help="Selection of the field traces (repeatable, all must hold) [default: origin=measured].")
@click.option("--synthetic", "synthetic", multiple=True, metavar="EXPR_OR_DIR", required=True,
              help="Selection of the traces to audit (repeatable), or one folder of trace files.")
@click.option("--json", "json_path", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Write every number here (JSON, stable keys).")
@click.option("--html", "html_path", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Write the self-contained HTML report here.")
@click.option("--scales", default="10,60,300", show_default=True, help="Window lengths in seconds.")
@click.option("--step", default=None, help="Common sample step (default: the coarser set's median step, two digits), e.g. 1s.")
@click.option("--splits", default=10, show_default=True, help="Seeded group splits of the real set for the noise floor.")
@click.option("--seed", default=0, show_default=True, help="Seed of the splits and subsamples.")
@click.option("-k", "--neighbours", "k", default=5, show_default=True, help="k of the k-NN metrics.")
@click.option("--force", is_flag=True, help="Replace --json and --html files that exist.")
@_parallel_options
@click.pass_context
def coverage_cmd(ctx: click.Context, catalog_path: Path | None, real: tuple[str, ...], synthetic: tuple[str, ...],
                 json_path: Path | None, html_path: Path | None, scales: str, step: str | None, splits: int,
                 seed: int, k: int, force: bool, workers: int | None, cluster: str | None) -> None:
    """How far the synthetic traces are from the field, beside the field's own noise floor."""
    from .compare import coverage
    from .compare.inputs import resolve
    from .files import refuse_existing
    from .units import parse_duration_s

    refuse_existing(json_path, html_path, force=force)

    try:
        scale_list = [parse_duration_s(v.strip(), "--scales") for v in scales.split(",") if v.strip()]
    except TracegenError:
        raise click.BadParameter(f"'{scales}' is not a list of durations", param_hint="--scales") from None
    root = _catalog_root(ctx, catalog_path)
    real_traces, real_label = resolve(root, real or ("origin=measured",), "real")
    syn_traces, syn_label = resolve(root, synthetic, "synthetic")
    result = coverage(real_traces, syn_traces, scales_s=scale_list,
                      step_s=None if step is None else parse_duration_s(step, "--step"), splits=splits, seed=seed,
                      k=k, labels={"real": real_label, "synthetic": syn_label}, workers=workers, cluster=cluster)
    from .files import write_text_atomic

    for path, text in ((json_path, result.to_json if json_path else None),
                       (html_path, result.to_html if html_path else None)):
        if path is not None:
            write_text_atomic(path, text())
    click.echo(result.summary_text())
    for path, what in ((json_path, "numbers"), (html_path, "report")):
        if path is not None:
            click.echo(f"{what}: {path}")


# --- demo ------------------------------------------------------------------------------------------
@cli.command()
@click.option("--seed", default=7, show_default=True, help="Seed of the invented world.")
@click.option("--sessions", default=36, show_default=True, help="How many measurement sessions to simulate.")
@click.option("--duration", "duration", default="300s", show_default=True, help="Length of each session.")
@_catalog_option
@click.pass_context
def demo(ctx: click.Context, seed: int, sessions: int, duration: str, catalog_path: Path | None) -> None:
    """Build the demo catalog from an invented field world, through the real readers."""
    from .demo import build_demo
    from .units import parse_duration_s

    root = _catalog_root(ctx, catalog_path)
    report = build_demo(root, seed=seed, sessions=sessions, duration_s=parse_duration_s(duration, "--duration"))
    named = catalog_path or ctx.obj.get("catalog")
    click.echo(report.text(None if named is None else str(root)))


from . import cli_curate, cli_export  # noqa: E402,F401  (register audit, split, widen, export, replay above)


def main() -> None:
    """Console entry point."""
    cli(obj={}, prog_name="tracegen")


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
