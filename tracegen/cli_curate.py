"""``tracegen audit``, ``split`` and ``widen``: the click layer over tracegen.curate (registered by cli.py)."""

from __future__ import annotations

from pathlib import Path

import click

from .cli import _catalog_option, _catalog_root, _open, cli
from .errors import TracegenError
from .files import refuse_existing


def _scheme_options(f):
    f = click.option("--scale", default="60s", show_default=True, help="Window length the cells are read on.")(f)
    f = click.option("--dims", default=None, help="Dimensions of a cell, comma separated "
                                                  "[default: level,variability,rtt,loss,outage].")(f)
    f = click.option("--bins", multiple=True, metavar="DIM=E1,E2,...",
                     help="Edges of one dimension's bins, e.g. level=1M,5M,20M (repeatable).")(f)
    f = click.option("--step", default=None, help="Common sample step (default: the median step, two digits).")(f)
    return f


def _scheme(scale: str, dims: str | None, bins: tuple[str, ...]):
    from .curate.cells import CellScheme
    from .units import parse_duration_s

    return CellScheme.build(dims, list(bins), parse_duration_s(scale, "--scale"))


def _step(step: str | None) -> float | None:
    from .units import parse_duration_s

    return None if step is None else parse_duration_s(step, "--step")


def _side(ctx: click.Context, catalog_path: Path | None, spec: tuple[str, ...], side: str):
    from .compare.inputs import resolve

    return resolve(_catalog_root(ctx, catalog_path), spec, side)


def _write(json_path: Path | None, html_path: Path | None, result) -> None:
    from .files import write_text_atomic

    if json_path is not None:
        write_text_atomic(json_path, result.to_json())
        click.echo(f"numbers: {json_path}")
    if html_path is not None:
        write_text_atomic(html_path, result.to_html())
        click.echo(f"report: {html_path}")


# --- audit -----------------------------------------------------------------------------------------
@cli.command("audit")
@click.argument("selection", nargs=-1, metavar="[EXPR... | DIR]")
@_catalog_option
@click.option("--where", multiple=True, metavar="EXPR", help="More selection expressions (all must hold).")
@click.option("--against", multiple=True, metavar="EXPR_OR_DIR",
              help="Reference selection (repeatable) or one folder: cells are judged against its mix.")
@click.option("--mix", "mix_path", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Target mix (TOML: [cells] and [tags.NAME] shares).")
@click.option("--json", "json_path", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Write every number here (JSON).")
@click.option("--html", "html_path", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Write the self-contained HTML page here.")
@_scheme_options
@click.option("--thin", "thin_ratio", default=0.5, show_default=True,
              help="A cell is thin below this share of its expected windows.")
@click.option("--min-expected", default=5.0, show_default=True,
              help="Flag a cell empty or thin only when it expects at least this many windows.")
@click.option("--no-duplicates", is_flag=True, help="Skip the search for duplicates and near copies.")
@click.option("--force", is_flag=True, help="Replace --json and --html files that exist.")
@click.pass_context
def audit_cmd(ctx: click.Context, selection: tuple[str, ...], catalog_path: Path | None, where: tuple[str, ...],
              against: tuple[str, ...], mix_path: Path | None, json_path: Path | None, html_path: Path | None,
              scale: str, dims: str | None, bins: tuple[str, ...], step: str | None, thin_ratio: float,
              min_expected: float, no_duplicates: bool, force: bool) -> None:
    """What a corpus holds, what it repeats and where it is thin."""
    from .curate.audit import audit
    from .curate.mix import read_mix

    refuse_existing(json_path, html_path, force=force)

    scheme = _scheme(scale, dims, bins)
    mix = None if mix_path is None else read_mix(mix_path, scheme)
    traces, label = _side(ctx, catalog_path, selection + where, "selection")
    ref, ref_label = _side(ctx, catalog_path, against, "against") if against else (None, None)
    labels = {"selection": label, **({"reference": ref_label} if ref_label else {})}
    result = audit(traces, against=ref, mix=mix, scheme=scheme, step_s=_step(step), thin_ratio=thin_ratio,
                   min_expected=min_expected, duplicates=not no_duplicates, labels=labels)
    _write(json_path, html_path, result)
    click.echo(result.summary_text())


# --- split -----------------------------------------------------------------------------------------
@cli.command("split")
@click.argument("selection", nargs=-1, metavar="[EXPR... | DIR]")
@_catalog_option
@click.option("--where", multiple=True, metavar="EXPR", help="More selection expressions (all must hold).")
@click.option("--by", default="group", show_default=True,
              help="What must stay on one side: group, source, or a tag name.")
@click.option("--parts", default="0.7,0.15,0.15", show_default=True, help="Shares of the parts (sum 1).")
@click.option("--names", default=None, help="Names of the parts [default: train,validation,test for three].")
@click.option("--seed", default=0, show_default=True, help="Seed of the assignment.")
@click.option("--out", "out", type=click.Path(dir_okay=False, path_type=Path), required=True,
              help="Manifest to write: .csv or .parquet (columns id, split, group).")
@click.option("--force", is_flag=True, help="Replace --out if it exists.")
@click.option("--json", "json_path", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Write the balance report here (JSON).")
@_scheme_options
@click.pass_context
def split_cmd(ctx: click.Context, selection: tuple[str, ...], catalog_path: Path | None, where: tuple[str, ...],
              by: str, parts: str, names: str | None, seed: int, out: Path, force: bool, json_path: Path | None,
              scale: str, dims: str | None, bins: tuple[str, ...], step: str | None) -> None:
    """Train/validation/test splits that keep every group whole, stratified by condition cells."""
    import json

    from .curate.split import split
    from .files import write_text_atomic

    try:
        shares = [float(x) for x in parts.split(",")]  # an empty item ("0.7,,0.3") is a typo, not a skip
    except ValueError:
        raise TracegenError(f"'{parts}' is not a list of numbers", field="--parts", hint="e.g. 0.7,0.15,0.15") from None
    name_list = None if names is None else [x.strip() for x in names.split(",")]
    refuse_existing(out, json_path, force=force)
    traces, _ = _side(ctx, catalog_path, selection + where, "selection")
    result = split(traces, by=by, parts=shares, names=name_list, seed=seed, scheme=_scheme(scale, dims, bins),
                   step_s=_step(step))
    result.write(out, force=force)
    if json_path is not None:
        write_text_atomic(json_path, json.dumps(result.to_data(), indent=1, allow_nan=False) + "\n")
    click.echo(result.summary_text().rstrip())
    click.echo(f"manifest: {out}")


# --- widen -----------------------------------------------------------------------------------------
@cli.command("widen")
@click.argument("model_path", metavar="MODEL", type=click.Path(dir_okay=False, path_type=Path))
@click.argument("selection", nargs=-1, metavar="[EXPR... | DIR]")
@_catalog_option
@click.option("--where", multiple=True, metavar="EXPR", help="More selection expressions (all must hold).")
@click.option("--against", multiple=True, metavar="EXPR_OR_DIR", help="Reference whose mix the corpus should have.")
@click.option("--mix", "mix_path", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Target mix (TOML) the corpus should have.")
@click.option("--cell", "cells", multiple=True, metavar="KEY=N",
              help="Aim at this cell with N windows, e.g. 'level=<1M,outage=10%+=40' (repeatable; "
                   "instead of the empty and thin cells of the audit).")
@click.option("--max-per-cell", default=None, type=int, help="Add at most this many windows to one cell.")
@click.option("--budget", default=2000, show_default=True, help="Traces drawn per cell at most.")
@click.option("--seed", default=0, show_default=True, help="Seed of the draws.")
@click.option("--out", "out", type=click.Path(file_okay=False, path_type=Path), default=None,
              help="Write the added windows to this folder (one file each, manifest.csv, run.json).")
@click.option("--add", "add", is_flag=True, help="Add the windows to the catalog instead.")
@click.option("--force", is_flag=True, help="Replace files that exist in --out.")
@click.option("--json", "json_path", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Write the report, with the audits before and after, here (JSON).")
@_scheme_options
@click.option("--thin", "thin_ratio", default=0.5, show_default=True, help="As for audit.")
@click.option("--min-expected", default=5.0, show_default=True, help="As for audit.")
@click.pass_context
def widen_cmd(ctx: click.Context, model_path: Path, selection: tuple[str, ...], catalog_path: Path | None,
              where: tuple[str, ...], against: tuple[str, ...], mix_path: Path | None, cells: tuple[str, ...],
              max_per_cell: int | None, budget: int, seed: int, out: Path | None, add: bool, force: bool,
              json_path: Path | None, scale: str, dims: str | None, bins: tuple[str, ...], step: str | None,
              thin_ratio: float, min_expected: float) -> None:
    """Synthesise windows aimed at the cells where the corpus is thin, with importance weights."""
    import json

    from .curate.audit import audit
    from .curate.mix import read_mix
    from .curate.widen import CellGoal, goals_from_audit, widen
    from .files import write_text_atomic
    from .model import load
    from .progress import bar

    if (out is None) == (not add):
        raise TracegenError("say where the windows go", field="--out", hint="pass --out DIR or --add (not both)")
    if max_per_cell is not None and max_per_cell < 1:
        raise TracegenError(f"must be at least 1, got {max_per_cell}", field="--max-per-cell")
    scheme = _scheme(scale, dims, bins)
    model = load(model_path)
    mix = None if mix_path is None else read_mix(mix_path, scheme)
    traces, label = _side(ctx, catalog_path, selection + where, "selection")
    ref = _side(ctx, catalog_path, against, "against")[0] if against else None
    if cells:
        goals = []
        for text in cells:
            key, sep, n = text.rpartition("=")
            if not sep or not key or not n.strip().isdigit():
                raise TracegenError(f"cannot read '{text}'", field="--cell", hint="write KEY=N, e.g. 'level=<1M=40'")
            goals.append(CellGoal(key, int(n) if max_per_cell is None else min(int(n), max_per_cell)))
    else:
        if ref is None and mix is None:
            raise TracegenError("nothing to aim at", field="--against",
                                hint="pass --against EXPR, --mix FILE or --cell KEY=N")
        first = audit(traces, against=ref, mix=mix, scheme=scheme, step_s=_step(step), thin_ratio=thin_ratio,
                      min_expected=min_expected, duplicates=False)
        goals = goals_from_audit(first, max_windows=max_per_cell)
        if not goals:
            click.echo("no cell is empty or thin: nothing to add")
            return
    if out is not None:
        from .synth.output import check_targets

        check_targets(out, "widen", range(sum(g.windows for g in goals)), "parquet", force=force,
                      manifest=out / "manifest.csv")
    step_s = _step(step)
    if step_s is None:
        from .compare.gap import common_step

        step_s = common_step(traces, ref or traces)
    with bar(range(len(goals)), label="widening", length=len(goals)) as shown:
        tick = getattr(shown, "update", None)
        result = widen(model, goals, scheme=scheme, step_s=step_s, seed=seed, budget=budget, name=model_path.stem,
                       corpus=traces, against=ref, mix=mix, progress=(lambda _: tick(1)) if tick else None)
    if out is not None:
        from .synth.output import write_files

        write_files(result.traces, out, name="widen", run={"kind": "widen", "seed": seed,
                                                           "goals": [g.to_data() for g in result.goals]})
    else:
        cat = _open(ctx, catalog_path)
        cat.add(result.traces, length=len(result.traces))
    if json_path is not None:
        write_text_atomic(json_path, json.dumps(result.to_data(), indent=1, allow_nan=False, default=float) + "\n")
    click.echo(result.summary_text())
    click.echo(f"added {len(result.traces)} windows " + (f"to {out}" if out is not None else "to the catalog"))
