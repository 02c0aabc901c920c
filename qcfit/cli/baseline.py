"""``qcfit baseline list | show | diff | fit``: baseline versions and the Phase I fit."""

from __future__ import annotations

import datetime as dt
import getpass
import json
from typing import Any

import click

from qcfit.cli import app, main
from qcfit.errors import BaselineError, InvalidArgumentError, NotFoundError

FORMATS = ("text", "json")


def _os_user() -> str:
    try:
        return getpass.getuser()
    except Exception:  # no login name (service account without a passwd entry)
        return "unknown"


def _now() -> dt.datetime:
    return dt.datetime.now(dt.UTC)


def _sync(ctx: click.Context) -> tuple[Any, Any, dict[str, int]]:
    """Config, engine and the config's baselines recorded as versions (content hash -> id)."""
    from qcfit.store.baselines import sync_baseline_versions
    from qcfit.store.engine import write_tx
    from qcfit.store.migrate import check_schema

    a = app(ctx)
    config = a.config()
    engine = a.engine()
    check_schema(engine)
    with write_tx(engine) as conn:
        versions = sync_baseline_versions(conn, config, os_user=_os_user(), now=_now())
    return config, engine, versions


def _echo_json(data: Any) -> None:
    click.echo(json.dumps(data, indent=2, default=str, allow_nan=False))


@main.group("baseline")
def baseline() -> None:
    """Baselines: recorded versions, and fitting a new one from in-control history."""


# --------------------------------------------------------------------------- list / show


def _version_dict(row: Any, current: set[int]) -> dict[str, Any]:
    return {
        "id": row.id, "name": row.name, "effective": row.effective.isoformat(),
        "lines": list(row.lines), "proportions": dict(row.proportions), "rate": row.rate,
        "thresholds": dict(row.thresholds), "content_hash": row.content_hash,
        "first_seen_utc": row.first_seen.isoformat(), "os_user": row.os_user,
        "in_config": row.id in current, "toml": row.toml_text,
    }


@baseline.command("list")
@click.option("--format", "fmt", type=click.Choice(FORMATS), default="text", show_default=True)
@click.pass_context
def list_cmd(ctx: click.Context, fmt: str) -> None:
    """Every baseline version in the store (the config's baselines are recorded first)."""
    from qcfit.store.baselines import list_versions
    from qcfit.store.engine import read_tx

    _, engine, versions = _sync(ctx)
    with read_tx(engine) as conn:
        rows = list_versions(conn)
    current = set(versions.values())
    if fmt == "json":
        _echo_json([_version_dict(r, current) for r in rows])
        return
    if not rows:
        click.echo("No baselines: add a [baseline.NAME] table to the config.")
        return
    head = ("ID", "NAME", "EFFECTIVE", "LINES", "RATE", "FIRST SEEN (UTC)", "BY", "IN CONFIG")
    table = [head] + [
        (str(r.id), r.name, r.effective.isoformat(), ",".join(r.lines),
         "-" if r.rate is None else f"{r.rate:g}", r.first_seen.strftime("%Y-%m-%d %H:%M"),
         r.os_user, "yes" if r.id in current else "no")
        for r in rows
    ]
    _echo_table(table)


def _echo_table(rows: list[tuple[str, ...]]) -> None:
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    for r in rows:
        click.echo("  ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)).rstrip())


@baseline.command("show")
@click.argument("name")
@click.option("--format", "fmt", type=click.Choice(FORMATS), default="text", show_default=True)
@click.pass_context
def show_cmd(ctx: click.Context, name: str, fmt: str) -> None:
    """Every recorded version of baseline NAME (or the version with id NAME), newest first."""
    from qcfit.store.baselines import get_version, versions_named
    from qcfit.store.engine import read_tx

    _, engine, versions = _sync(ctx)
    with read_tx(engine) as conn:
        rows = versions_named(conn, name)
        if not rows and name.isdigit():
            rows = [get_version(conn, int(name))]
    if not rows:
        raise NotFoundError("baseline", f"{name!r} (see qcfit baseline list)")
    current = set(versions.values())
    rows = rows[::-1]
    if fmt == "json":
        _echo_json([_version_dict(r, current) for r in rows])
        return
    for i, r in enumerate(rows):
        state = "in the config" if r.id in current else "no longer in the config"
        if i:
            click.echo("")
        click.echo(f"version {r.id} of baseline {r.name} ({state}); first seen "
                   f"{r.first_seen:%Y-%m-%d %H:%M} UTC by {r.os_user}; sha256 {r.content_hash}")
        click.echo(r.toml_text.rstrip("\n"))


# --------------------------------------------------------------------------- diff


@baseline.command("diff")
@click.argument("v1", type=int)
@click.argument("v2", type=int)
@click.option("--format", "fmt", type=click.Choice(FORMATS), default="text", show_default=True)
@click.pass_context
def diff_cmd(ctx: click.Context, v1: int, v2: int, fmt: str) -> None:
    """What changed from baseline version V1 to V2 (ids from qcfit baseline list)."""
    from qcfit.baselines import version_diff
    from qcfit.store.baselines import get_version
    from qcfit.store.engine import read_tx

    _, engine, _ = _sync(ctx)
    with read_tx(engine) as conn:
        old, new = get_version(conn, v1), get_version(conn, v2)
    diff = version_diff(old, new)
    if fmt == "json":
        _echo_json(diff)
        return
    click.echo(f"version {old.id} ({old.name}, effective {old.effective}) -> version {new.id} "
               f"({new.name}, effective {new.effective})")
    rows = [("CATEGORY", f"V{old.id}", f"V{new.id}", "CHANGE", "RELATIVE")]
    for c in diff["categories"]:
        rows.append((c["code"], _share(c["old"]), _share(c["new"]),
                     "-" if c["change"] is None else f"{c['change']:+.4f}",
                     "-" if c["relative"] is None else f"{c['relative']:+.1%}"))
    _echo_table(rows)
    if diff["cohen_w"] is not None:
        click.echo(f"Cohen's w of V{new.id}'s mix against V{old.id}'s: {diff['cohen_w']:.4f}")
    for key in ("rate", "lines", "effective", "thresholds"):
        if diff[key]["old"] != diff[key]["new"]:
            click.echo(f"{key}: {_plain(diff[key]['old'])} -> {_plain(diff[key]['new'])}")


def _share(x: float | None) -> str:
    return "-" if x is None else f"{x:.4f}"


def _plain(value: Any) -> str:
    if value is None:
        return "none"
    if isinstance(value, list):
        return ", ".join(map(str, value))
    if isinstance(value, dict):
        return ", ".join(f"{k} = {v}" for k, v in value.items()) or "none"
    return str(value)


# --------------------------------------------------------------------------- fit


def _fit_lines(config: Any, line: tuple[str, ...], lines: tuple[str, ...]) -> list[str]:
    given = [x.strip() for x in line]
    for text in lines:
        given += [x.strip() for x in text.replace(",", " ").split()]
    given = list(dict.fromkeys(x for x in given if x))
    if not given:
        raise InvalidArgumentError("--line", "give the line to fit, e.g. --line L1 "
                                             "(or --lines L1,L2, or --line '*' for every line)")
    if given == ["*"]:
        return ["*"]
    unknown = [x for x in given if x not in config.lines]
    if unknown:
        raise InvalidArgumentError(
            "--line", f"unknown line {unknown[0]!r}; the config has {', '.join(config.lines)}")
    return given


def _settings(config: Any, method: str, exclude: bool, max_rounds: int) -> Any:
    from qcfit.baselines import FitSettings

    t = config.thresholds
    return FitSettings(
        method=method, exclude_outliers=exclude, max_rounds=max_rounds,
        outlier_level=t.alarm_level, adjust=t.multiple_testing, min_effect_w=t.min_effect_w,
        min_rate_ratio=t.min_rate_ratio, alpha=t.alarm_level, power=t.power, seed=t.seed,
    )


def _window(engine: Any, config: Any, lines: list[str], since: dt.date, until: dt.date) -> Any:
    from qcfit.store.baselines import read_window
    from qcfit.store.engine import read_tx

    codes = list(config.lines) if lines == ["*"] else lines
    with read_tx(engine) as conn:
        win = read_window(conn, lines=codes, since=since, until=until,
                          categories=list(config.categories))
    if win.other_categories:
        listed = ", ".join(f"{c} ({n})" for c, n in win.other_categories.items())
        raise BaselineError("--from/--to", f"the window holds defects in categories that are "
                                           f"not in the config: {listed}")
    if not win.shift_ids:
        raise BaselineError("--from/--to", f"no shifts with data for {', '.join(lines)} from "
                                           f"{since} to {until} (an empty history window)")
    return win


def _current(config: Any, lines: list[str], at: dt.date, study: Any) -> dict[str, Any] | None:
    """How far the fitted mix and rate are from the baseline in force for the (first) line
    on the window's last day; None when no baseline applies there."""
    from qcfit.baselines import cohen_w
    from qcfit.config import baseline_for

    spec = baseline_for(config, next(iter(config.lines)) if lines == ["*"] else lines[0], at)
    if spec is None:
        return None
    old = [float(spec.proportions[c]) for c in study.categories]
    ratio = None
    if spec.rate is not None and study.rate is not None:
        ratio = study.rate.rate / float(spec.rate)
    return {"name": spec.name, "effective": spec.effective.isoformat(),
            "cohen_w": cohen_w(study.proportions.proportions, old), "rate_ratio": ratio}


def _default_name(lines: list[str], effective: dt.date) -> str:
    who = "all-lines" if lines == ["*"] else "-".join(lines)
    return f"{who}-{effective.isoformat()}"


@baseline.command("fit")
@click.option("--line", "line", multiple=True, metavar="L",
              help="Line to fit (repeat for several; '*' for every line).")
@click.option("--lines", "lines", multiple=True, metavar="L1,L2",
              help="Several lines at once, comma separated (one baseline for all of them).")
@click.option("--from", "since", required=True, type=click.DateTime(["%Y-%m-%d"]),
              help="First shift date of the history window (local start date).")
@click.option("--to", "until", required=True, type=click.DateTime(["%Y-%m-%d"]),
              help="Last shift date of the history window (inclusive).")
@click.option("--exclude-outliers", is_flag=True,
              help="Remove the shifts that stand out and repeat the study, in rounds.")
@click.option("--max-rounds", type=click.IntRange(1, 50), default=5, show_default=True,
              help="Cap on exclusion rounds.")
@click.option("--method", type=click.Choice(["sison-glaz", "goodman"]), default="sison-glaz",
              show_default=True, help="Simultaneous intervals for the proportions.")
@click.option("--name", default=None, help="Baseline name in the block [default: LINES-EFFECTIVE].")
@click.option("--effective", type=click.DateTime(["%Y-%m-%d"]), default=None,
              help="Effective date in the block [default: tomorrow, plant time].")
@click.option("--write", is_flag=True,
              help="Add the block to the config file (a backup of the old file is kept).")
@click.option("--format", "fmt", type=click.Choice(FORMATS), default="text", show_default=True)
@click.pass_context
def fit_cmd(ctx: click.Context, line: tuple[str, ...], lines: tuple[str, ...], since: dt.datetime,
            until: dt.datetime, exclude_outliers: bool, max_rounds: int, method: str,
            name: str | None, effective: dt.datetime | None, write: bool, fmt: str) -> None:
    """Phase I study of a history window, and a baseline block fitted from it."""
    from qcfit.baselines import baseline_block, fit_study
    from qcfit.store.migrate import check_schema

    a = app(ctx)
    config = a.config()
    chosen = _fit_lines(config, line, lines)
    first, last = since.date(), until.date()
    if first > last:
        raise InvalidArgumentError("--from", f"{first} is after --to {last}")
    engine = a.engine()
    check_schema(engine)
    win = _window(engine, config, chosen, first, last)
    study = fit_study(win.counts, win.units, shift_ids=win.shift_ids, categories=win.categories,
                      settings=_settings(config, method, exclude_outliers, max_rounds))
    now = _now()
    when = effective.date() if effective else now.astimezone(config.timezone).date() + dt.timedelta(1)
    name = name or _default_name(chosen, when)
    block = baseline_block(study, name=name, lines=chosen, effective=when, window=(first, last))
    written = None
    if write:
        from qcfit.baseline_write import add_baseline_block

        written = add_baseline_block(a.config_path, block, name=name, now=now,
                                     expected_hash=config.hash)
    current = _current(config, chosen, last, study)
    if fmt == "json":
        out = {"lines": chosen, "from": first.isoformat(), "to": last.isoformat(), "name": name,
               "effective": when.isoformat(), **study.to_dict(), "current_baseline": current,
               "toml": block,
               "written": None if written is None else
               {"path": str(written.path), "backup": str(written.backup)}}
        _echo_json(out)
        return
    click.echo(_study_text(study, config, chosen, (first, last), current))
    click.echo("")
    if written is None:
        click.echo(f"TOML block (paste it into {a.config_path.name}, or run again with --write):")
        click.echo("")
        click.echo(block.rstrip("\n"))
    else:
        click.echo(block.rstrip("\n"))
        click.echo("")
        click.echo(f"Added [baseline.{name}] to {written.path} (backup of the old file: "
                   f"{written.backup.name}).")


# --------------------------------------------------------------------------- text report


def _study_text(study: Any, config: Any, lines: list[str], window: tuple[dt.date, dt.date],
                current: dict[str, Any] | None) -> str:
    out = [f"Phase I fit of {', '.join(lines)} from {window[0]} to {window[1]}: "
           f"{len(study.window_shifts)} shifts in the window, {len(study.kept_shifts)} kept",
           f"Verdict: {study.verdict}", ""]
    out += _rounds_text(study)
    out += _stability_text(study)
    out += _estimates_text(study, config)
    if current is not None:
        rate = "" if current["rate_ratio"] is None else \
            f"; fitted rate / its rate = {current['rate_ratio']:.3f}"
        out.append(f"Against the baseline in force on {window[1]} ({current['name']}, effective "
                   f"{current['effective']}): Cohen's w of the fitted mix = "
                   f"{current['cohen_w']:.4f}{rate}")
    if study.warnings:
        out += ["", "Warnings:"] + [f"  - {w}" for w in study.warnings]
    return "\n".join(out)


def _rounds_text(study: Any) -> list[str]:
    out = ["Shifts that stand out from the pooled window:"]
    for r in study.rounds:
        found = f"{len(r.flagged)} stood out" if r.flagged else "none stood out"
        out.append(f"  round {r.round}: {r.shifts} shifts, {r.defects} defects, {found}")
    for f in study.flags:
        what = "excluded" if f.excluded else "kept"
        out.append(f"  {f.shift_id} ({what}): {f.reason}")
    if study.empty_shifts:
        out.append(f"  {len(study.empty_shifts)} kept shift(s) had no defects (used for the rate)")
    return out


def _stability_text(study: Any) -> list[str]:
    out = ["", "Stability of the kept shifts:"]
    h = study.homogeneity
    if h is None:
        out.append("  homogeneity: not tested (fewer than 2 shifts with defects)")
    else:
        out.append(f"  homogeneity of {h.shifts} shifts x categories: X2 = {h.statistic:.1f}, "
                   f"df = {h.dof}, p = {_p(h.pvalue)} ({h.method}); dispersion X2/df = "
                   f"{h.dispersion:.2f}; Cramer's V = {h.cramers_v:.3f} -> "
                   f"{'stable' if h.stable else 'NOT stable'}")
    c = study.change_point
    if c is None:
        out.append("  change point: not scanned (fewer than 4 shifts with defects)")
    else:
        out.append(f"  change point: largest split before {c.split_shift_id}, G2 = "
                   f"{c.statistic:.1f}, permutation p = {_p(c.pvalue)} ({c.permutations} "
                   f"permutations), w = {c.effect_size:.3f} -> "
                   f"{'no lasting change' if c.stable else 'the mix CHANGED there'}")
    return out


def _estimates_text(study: Any, config: Any) -> list[str]:
    p = study.proportions
    method = {"sison-glaz": "Sison-Glaz", "goodman": "Goodman"}[p.method]
    out = ["", f"Proportions of {p.defects} defects ({p.confidence:.0%} simultaneous "
               f"intervals, {method}):"]
    width = max(len(c) for c in p.categories)
    names = max(len(str(config.categories.get(c, ""))) for c in p.categories)
    for i, code in enumerate(p.categories):
        label = str(config.categories.get(code, ""))
        out.append(f"  {code:<{width}}  {label:<{names}}  {p.counts[i]:>8}  "
                   f"{p.proportions[i]:.4f}  [{p.lower[i]:.4f}, {p.upper[i]:.4f}]")
    r = study.rate
    if r is None:
        out.append("Rate: units inspected unknown; no baseline rate")
    else:
        out.append(f"Rate: {r.rate:.5g} defects per unit [{r.lower:.5g}, {r.upper:.5g}] "
                   f"({r.confidence:.0%} exact Poisson; {r.defects} defects in {r.units:.0f} "
                   f"units over {r.shifts} shifts)")
    w = study.power
    enough = "enough" if w.enough else f"NOT enough: about {w.more_shifts} more shift(s) needed"
    out.append(f"Power: {w.defects} defects detect a mix change of w = {w.min_effect_w:g} with "
               f"power {w.power:.3f} at level {w.alpha:g} (needs {w.defects_needed} for "
               f"{w.target_power:g}): {enough}; smallest w detectable: {w.detectable_w:.3f}")
    return out


def _p(p: float) -> str:
    return f"{p:.3g}" if p >= 1e-4 else f"{p:.1e}"
