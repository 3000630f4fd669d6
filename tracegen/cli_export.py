"""``tracegen export`` and ``replay``: the click layer over tracegen.export (registered by cli.py)."""

from __future__ import annotations

from pathlib import Path

import click

from .cli import _catalog_option, _open, cli
from .errors import TracegenError


def _traces(ctx: click.Context, refs: tuple[str, ...], catalog_path: Path | None) -> list:
    """Trace files as they are; anything else is a catalog id (or unique prefix)."""
    from .compare.inputs import read_trace_file

    out, cat = [], None
    for ref in refs:  # a loop over arguments
        p = Path(ref)
        if p.is_file():
            out.extend(read_trace_file(p))
        elif p.suffix in (".parquet", ".csv", ".tsv") or "/" in ref:
            raise TracegenError("no such file", path=p, hint="give a trace file or a catalog id")
        else:
            cat = cat or _open(ctx, catalog_path)
            out.append(cat.get(ref))
    return out


def _shaping_options(f):
    f = click.option("--nan", "nan", type=click.Choice(["error", "hold", "zero"]), default="error", show_default=True,
                     help="Unknown bandwidth: refuse, hold the last known rate, or treat as an outage.")(f)
    f = click.option("--qdisc", type=click.Choice(["tbf", "htb"]), default="tbf", show_default=True,
                     help="Rate limiter of the tc script.")(f)
    f = click.option("--mtu", default=1500, show_default=True, help="Largest packet in bytes (68 to 65535).")(f)
    f = click.option("--min-step", default="100ms", show_default=True,
                     help="Finer steps are averaged onto this one in the tc script.")(f)
    f = click.option("--queue", "queue", default="200ms", show_default=True,
                     help="Queue of the rate limiter, as time at each step's rate.")(f)
    f = click.option("--delay-share", default=0.5, show_default=True,
                     help="Share of the RTT delayed on the shaped direction (netem).")(f)
    return f


def _tc_options(qdisc: str, mtu: int, min_step: str, delay_share: float, queue: str) -> dict:
    from .units import parse_duration_s

    return {"qdisc": qdisc, "mtu": mtu, "min_step_s": parse_duration_s(min_step, "--min-step"),
            "delay_share": delay_share, "queue_ms": parse_duration_s(queue, "--queue") * 1000.0}


@cli.command("export")
@click.argument("refs", nargs=-1, required=True, metavar="TRACE_FILE_OR_ID...")
@_catalog_option
@click.option("--to", "to", type=click.Choice(["tc", "schedule", "csv", "parquet", "jsonl"]), required=True,
              help="What to write.")
@click.option("--out", "out", type=click.Path(path_type=Path), required=True, help="Folder to write into (made).")
@click.option("--force", is_flag=True, help="Write into --out even if it exists, replacing files.")
@click.option("--packet-bytes", default=1500, show_default=True, help="Packet size of the delivery schedule.")
@click.option("--schedule-format", type=click.Choice(["parquet", "csv"]), default="parquet", show_default=True)
@_shaping_options
@click.pass_context
def export_cmd(ctx: click.Context, refs: tuple[str, ...], catalog_path: Path | None, to: str, out: Path, force: bool,
               packet_bytes: int, schedule_format: str, nan: str, qdisc: str, mtu: int, min_step: str,
               delay_share: float, queue: str) -> None:
    """Write traces for a test bench: tc script, packet schedule, CSV, Parquet or JSON lines."""
    from .export import export

    traces = _traces(ctx, refs, catalog_path)
    extra = _tc_options(qdisc, mtu, min_step, delay_share, queue) if to == "tc" else {}
    paths = export(traces, to, out, force=force, packet_bytes=packet_bytes, nan=nan, schedule_format=schedule_format,
                   **extra)
    for p in paths:
        click.echo(str(p))
    if to == "tc":
        click.echo(f"run as root: bash {paths[0]} DEVICE   (add --dry-run to print the commands instead)")


@cli.command("replay")
@click.argument("ref", metavar="TRACE_FILE_OR_ID")
@click.argument("command", nargs=-1, metavar="[-- COMMAND...]")
@_catalog_option
@click.option("--name", default="tgr", show_default=True,
              help="Namespaces NAME-send and NAME-recv, veth NAME-s (10.201.0.1) and NAME-r (10.201.0.2).")
@click.option("--dry-run", is_flag=True, help="Print the tc commands with their times; change nothing.")
@_shaping_options
@click.pass_context
def replay_cmd(ctx: click.Context, ref: str, command: tuple[str, ...], catalog_path: Path | None, name: str,
               dry_run: bool, nan: str, qdisc: str, mtu: int, min_step: str, delay_share: float, queue: str) -> None:
    """Replay a trace on a veth pair between two fresh network namespaces (root), traffic from NAME-send to
    NAME-recv shaped; run COMMAND meanwhile (e.g. -- ip netns exec tgr-send iperf3 ...); all removed after."""
    import subprocess
    import tempfile

    from .export.replay import RECV_ADDRESS, SEND_ADDRESS, replay
    from .export.tc import tc_script

    (trace,) = _traces(ctx, (ref,), catalog_path)[:1]
    options = dict(nan=nan, **_tc_options(qdisc, mtu, min_step, delay_share, queue))
    if dry_run:
        with tempfile.TemporaryDirectory() as tmp:
            path = Path(tmp) / "replay.sh"
            path.write_text(tc_script(trace, **options), encoding="utf-8")
            run = subprocess.run(["bash", str(path), f"{name}-s", "--dry-run"], capture_output=True, text=True,
                                 timeout=60)
        click.echo(run.stdout.rstrip())
        return
    click.echo(f"replaying {trace.id} ({trace.duration_s:g} s): {name}-send {SEND_ADDRESS} -> {name}-recv "
               f"{RECV_ADDRESS}, shaped on {name}-s; Ctrl-C stops and removes everything", err=True)
    report = replay(trace, name=name, command=command or None, **options)
    if report.stderr.strip():
        click.echo(report.stderr.rstrip(), err=True)
    if report.script_status not in (0, 130, 143):
        raise TracegenError(f"the tc script failed with status {report.script_status}", field="replay",
                            hint="see the messages above")
    click.echo(f"done: namespaces removed (script status {report.script_status}"
               + (f", command status {report.command_status})" if report.command_status is not None else ")"))
