"""`pledge forecast fit | backtest | show`: probabilistic daypart forecasts of a scenario."""
from __future__ import annotations

import contextlib
from pathlib import Path
from typing import Iterator

import typer

from forecasting.factors import LEVEL_FACTORS
from planner.cli import app
from planner.cli.common import info, out_console, print_json, progress
from planner.cli.output import open_folder
from planner.errors import InputError

forecast_app = typer.Typer(help="Fit, backtest and show the daypart forecasts of a scenario.",
                           no_args_is_help=True)
app.add_typer(forecast_app, name="forecast")

CAUTION = ("Forecasts are estimates from past audiences; contract terms decide what is owed. "
           "Review before committing.")


@contextlib.contextmanager
def _progress(description: str) -> Iterator:
    """A `(message, fraction)` callback driving the shared progress bar."""
    with progress(description, total=100) as advance:
        done = {"f": 0.0}

        def callback(message: str, fraction: float) -> None:
            step = max(0.0, min(fraction, 1.0) - done["f"]) * 100
            done["f"] = max(done["f"], min(fraction, 1.0))
            advance(step, description=f"{description}: {message}")

        yield callback


def _print_aligned(head: list[str], rows: list[list[str]]) -> None:
    """Plain aligned table on stdout (first column left, the rest right), any terminal width."""
    widths = [max(len(str(x)) for x in col) for col in zip(head, *rows)]

    def line(cells):
        return "  ".join(str(c).ljust(w) if i == 0 else str(c).rjust(w) for i, (c, w) in enumerate(zip(cells, widths)))

    out_console.print(line(head), markup=False, highlight=False, soft_wrap=True)
    out_console.print("  ".join("-" * w for w in widths), markup=False, highlight=False, soft_wrap=True)
    for r in rows:
        out_console.print(line(r), markup=False, highlight=False, soft_wrap=True)


def _engine(engine: str) -> str:
    if engine not in ("duckdb", "spark"):
        raise InputError(f"--engine {engine!r}: use duckdb or spark")
    return engine


@forecast_app.command("fit")
def fit_cmd(
    scenario: Path = typer.Argument(..., help="Scenario folder."),
    demo: str = typer.Option(None, "--demo", help="Fit one demo only (default: all demos)."),
    engine: str = typer.Option("duckdb", "--engine", help="History reduction engine: duckdb or spark."),
    seed: int = typer.Option(0, "--seed", min=0, help="Seed of every sample and model."),
    json_out: bool = typer.Option(False, "--json", help="Print one JSON object."),
) -> None:
    """Fit the forecast on the history and write <scenario>/forecast/ (table, model, meta)."""
    from planner.forecast_job import fit_forecast, shared_error_caution

    scn = open_folder(scenario)
    with _progress("forecast fit") as cb:
        res = fit_forecast(scn, demo=demo, engine=_engine(engine), seed=seed, progress=cb)
    meta = res.meta
    fit = meta["fit"]
    caution = shared_error_caution(meta, scenario)
    out = {"scenario": scn.name, "path": str(res.path), "rows": meta["rows"], "seed": seed,
           "history": meta["history"], "lead_gap_days": fit["lead_gap_days"], "folds": fit["folds"],
           "level_error": fit["level_error"], "calibration": fit["calibration"], "candidates": fit.get("candidates"),
           "seconds": meta["seconds"], "shared_error_caution": caution,
           "caution": CAUTION}
    if json_out:
        print_json(out)
        return
    le = fit["level_error"]
    _print_candidates(fit.get("candidates"))
    out_console.print(f"forecast written: {res.path} ({meta['rows']:,} unit-week rows)")
    out_console.print(f"history {meta['history']['first_day']} .. {meta['history']['last_day']}, "
                      f"lead gap {fit['lead_gap_days']} days, {fit['folds']} rolling-origin refits, "
                      f"{meta['seconds']['total']:.0f} s")
    out_console.print(f"level error (relative sd): common to all units {le.get('rel_sd_common', 0.0):.3f}; "
                      f"network {le['rel_sd_network']:.3f}; network-week "
                      f"{le.get('rel_sd_network_week', 0.0):.3f}; flight by daypart "
                      + ", ".join(f"{k} {v:.3f}" for k, v in le["rel_sd_flight_by_daypart"].items())
                      + "; unit-week by daypart "
                      + ", ".join(f"{k} {v:.3f}" for k, v in le["rel_sd_week_by_daypart"].items()))
    cal = fit["calibration"].get("leave_one_fold_out_coverage", {})
    if cal:
        out_console.print("held-out coverage of level bands: "
                          + ", ".join(f"{float(k):.0%} -> {v:.1%}" for k, v in cal.items()))
    totals = fit["calibration"].get("leave_one_fold_out_total", {})
    if totals:
        cal_fit = fit["calibration"]
        out_console.print("held-out total of each refit, actual / forecast - 1 (sd by the error law): "
                          + ", ".join(f"{d} {t['bias']:+.1%} ({t['bias_sd']:.1%})" for d, t in totals.items())
                          + f"; RMS in those sds {cal_fit['total_z_rms']:.2f} (about 1 if the law is right, "
                          f"chi-square p = {cal_fit['total_z_p']:.2f})")
        widened = float(le.get("common_widened_by_sd") or 0.0)
        if widened > 0:
            out_console.print(f"the refits' totals missed by more than the law allowed: the shift shared by all units "
                              f"was widened by an sd of {widened:.1%} (now {le['rel_sd_common']:.1%}) so that they are "
                              "within it; every chance of delivery includes it")
        if caution:
            out_console.print(f"[yellow]caution: {caution}[/yellow]")
    scale = le.get("sd_scale_by_daypart") or {}
    if scale and max(abs(v - 1.0) for v in scale.values()) > 0.01:
        out_console.print("error law carried from the refits' candidates to the plan weeks' (where a candidate could "
                          "not forecast in a refit, its combination erred differently): sds x "
                          + ", ".join(f"{k} {v:.2f}" for k, v in scale.items()))
    floor = float(le.get("common_floor_sd") or 0.0)
    if floor > 0 and floor >= float(le.get("rel_sd_common") or 0.0) - 1e-12:
        out_console.print(f"the candidate forecasts disagree about the plan weeks' total by an sd of {floor:.1%}: the "
                          "shift shared by all units is at least that, and every chance of delivery includes it")
    out_console.print(CAUTION)


def _print_candidates(cands: dict | None) -> None:
    """Each candidate's weight and held-out CRPS by daypart, and the combination's CRPS."""
    if not cands:
        return
    names = cands["candidates"]
    out_console.print("candidate forecasts by daypart: weight in the combination (held-out CRPS, impressions "
                      "per spot, lower is better)")
    head = ["daypart"] + [n.replace("_", " ") for n in names] + ["combined"]
    rows = []
    for dp, w in cands["weights_by_daypart"].items():
        sc = cands["heldout_crps_by_daypart"].get(dp, {})
        crps = lambda n: f" ({sc[n]:,.0f})" if n in sc else " (-)"  # noqa: E731
        rows.append([dp] + [f"{w[n]:.2f}{crps(n)}" for n in names] + [f"({sc['combined']:,.0f})" if sc else "-"])
    _print_aligned(head, rows)


@forecast_app.command("backtest")
def backtest_cmd(
    scenario: Path = typer.Argument(..., help="Scenario folder."),
    holdout_weeks: int = typer.Option(13, "--holdout-weeks", help="Weeks at the end of the history held out."),
    demo: str = typer.Option(None, "--demo", help="Backtest one demo only."),
    lead_days: int = typer.Option(None, "--lead-days", min=0,
                                  help="Days between the cut-off and the first held-out day (default: the real "
                                       "forecast's lead, history end -> plan week 1)."),
    windows: int = typer.Option(1, "--windows",
                                help="Successive held-out blocks of --holdout-weeks ending the history, each "
                                     "scored by its own refit; scores are pooled (1 = the last block only)."),
    engine: str = typer.Option("duckdb", "--engine", help="History reduction engine: duckdb or spark."),
    seed: int = typer.Option(0, "--seed", min=0, help="Seed of every sample and model."),
    json_out: bool = typer.Option(False, "--json", help="Print one JSON object."),
) -> None:
    """Refit before a cut-off and score the held-out weeks (CRPS, WAPE, coverage) against baselines."""
    from planner.forecast_job import backtest_scenario

    scn = open_folder(scenario)
    with _progress("forecast backtest") as cb:
        s = backtest_scenario(scn, holdout_weeks=holdout_weeks, demo=demo, engine=_engine(engine), seed=seed,
                              gap_days=lead_days, windows=windows, progress=cb)
    if json_out:
        print_json(s)
        return
    if len(s["windows"]) == 1:
        h = s["holdout"]
        out_console.print(f"held out {h['first_day']} .. {h['last_day']} ({h['weeks']} weeks), cut-off "
                          f"{h['cutoff_day']}, lead gap {h['lead_gap_days']} days; {s['units']:,} unit-weeks scored "
                          "(unit-week mean impressions of one spot)")
        out_console.print(f"the bands' error law was estimated on its refits' held-out weeks {_law_windows(s['windows'][0])}")
    else:
        out_console.print(f"{len(s['windows'])} held-out blocks, lead gap {s['holdout']['lead_gap_days']} days, "
                          f"{s['units']:,} unit-weeks scored in all (unit-week mean impressions of one spot):")
        for j, wnd in enumerate(s["windows"], start=1):
            h, cov = wnd["holdout"], wnd["coverage"]
            out_console.print(f"  block {j}: {h['first_day']} .. {h['last_day']}, cut-off {h['cutoff_day']}; "
                              f"{wnd['units']:,} unit-weeks; coverage 50/80/95% {cov['0.5']:.1%} / "
                              f"{cov['0.8']:.1%} / {cov['0.95']:.1%} (calibrated: {_ranges(wnd)}); CRPS skill "
                              f"{wnd['crps_skill_vs_best_baseline']:.1%}; error law estimated on "
                              f"{_law_windows(wnd)}")
        out_console.print("pooled over the blocks:")
    head = ["forecast", "CRPS (impr.)", "WAPE", "bias", "50%", "80%", "95%"]
    rows = []

    def row(name: str, sc: dict) -> None:
        cov = sc["coverage"]
        rows.append([name, f"{sc['crps']:,.0f}", f"{sc['wape']:.1%}", f"{sc['bias']:+.1%}", f"{cov['0.5']:.1%}", f"{cov['0.8']:.1%}",
                     f"{cov['0.95']:.1%}"])

    row("model", s)
    for name, sc in s["baselines"].items():
        row(f"baseline {name}", sc)
    for dp, sc in s["by_daypart"].items():
        row(f"model, {dp}", sc)
    _print_aligned(head, rows)
    out_console.print(f"CRPS skill against the better baseline: {s['crps_skill_vs_best_baseline']:.1%}")
    cal = s["coverage_if_calibrated"]
    far = " / ".join(f"{v['share_as_far']:.0%}" for v in cal["levels"].values())
    out_console.print(f"coverage 50/80/95% a calibrated forecast would show on these unit-weeks (90% of draws of "
                      f"its own correlated errors): {_ranges(s)}; as far from nominal as measured in {far} of draws; "
                      f"within {cal['tolerance'] * 100:g} points of nominal at all three levels in {cal['share_within']:.0%}; "
                      f"its total bias would have an sd of {cal['bias_sd']:.1%} (measured {s['bias']:+.1%}, "
                      f"{cal['bias_z']:+.1f} sd)")
    out_console.print(f"sd of each level factor in these unit-weeks, measured (the law's): {_factor_sds(s)}")
    out_console.print(s["caution"])


#: printed names of the level factors of the backtest's ``factor_sd``
FACTOR_LABELS = {f.name: f.label for f in LEVEL_FACTORS if f.measured}


def _factor_sds(scores: dict) -> str:
    """'network 9.5% (10.8%), ...; common: the law's 0.0%, one draw per block (see the bias)'."""
    fs = scores["factor_sd"]
    parts = [f"{label} {fs[k]['measured']:.1%} ({fs[k]['law']:.1%})" for k, label in FACTOR_LABELS.items()]
    unmeasured = [f"{f.label}: the law's {fs[f.name]['law']:.1%}" for f in LEVEL_FACTORS if not f.measured]
    return ", ".join(parts) + "; " + ", ".join(unmeasured) + ", one draw per block (see the bias)"


def _law_windows(window: dict) -> str:
    """'2026-02-01 .. 2026-05-02, ...': the held-out weeks of a block's refits."""
    return ", ".join(f"{a} .. {b}" for a, b in window["law_estimated_on"])


def _ranges(scores: dict) -> str:
    """'41-59% / 72-87% / 91-98%': the 5-95% ranges of `coverage_if_calibrated`."""
    return " / ".join(f"{v['low']:.0%}-{v['high']:.0%}" for v in scores["coverage_if_calibrated"]["levels"].values())


@forecast_app.command("show")
def show_cmd(
    scenario: Path = typer.Argument(..., help="Scenario folder."),
    zone: str = typer.Option(..., "--zone", help="Zone."),
    network: str = typer.Option(..., "--network", help="Network."),
    demo: str = typer.Option(None, "--demo", help="Demo (default: the scenario's first)."),
    json_out: bool = typer.Option(False, "--json", help="Print one JSON object."),
) -> None:
    """Print one zone x network's daypart forecasts with their bands (fits first if needed)."""
    from planner.forecast_job import ensure_forecast

    scn = open_folder(scenario)
    if zone not in set(map(str, scn.zone_names)):
        raise InputError(f"--zone {zone!r}: not in zones.csv")
    if network not in set(map(str, scn.network_names)):
        raise InputError(f"--network {network!r}: not in networks.csv")
    demo = demo or scn.demos[0]
    if demo not in scn.demos:
        raise InputError(f"--demo {demo!r}: not a demo of the scenario (known: {', '.join(scn.demos)})")
    with _progress("forecast") as cb:
        res = ensure_forecast(scn, progress=cb)
    if res.fitted_now:
        info("the forecast was fitted now")
    t = res.table
    t = t[(t["zone"] == zone) & (t["network"] == network) & (t["demo"] == demo)]
    if t.empty:
        raise InputError(f"no forecast rows for zone {zone}, network {network}, demo {demo} "
                         "(no inventory for this unit?)")
    order = {d.name: i for i, d in enumerate(scn.dayparts)}
    t = t.assign(_o=t["daypart"].map(order)).sort_values(["_o", "week"]).drop(columns="_o")
    if json_out:
        print_json({"zone": zone, "network": network, "demo": demo, "rows": t.to_dict(orient="records"),
                    "caution": CAUTION})
        return
    head = ["daypart", "week", "rating pts", "mean", "10%", "90%", "airing sd", "level sd", "history wks"]
    rows = [[r.daypart, str(r.week), f"{100 * r.mean_rating:.3f}", f"{r.mean_impressions:,.0f}",
             f"{r.q10_impressions:,.0f}", f"{r.q90_impressions:,.0f}", f"{r.airing_sd:,.0f}",
             f"{r.level_sd:,.0f}", f"{r.history_weeks:.0f}"] for r in t.itertuples(index=False)]
    out_console.print(f"{zone} x {network}, demo {demo}: impressions of one 30-second spot "
                      "(mean, 10% and 90% quantiles; sds of one airing and of the unit-week level)",
                      markup=False, highlight=False)
    _print_aligned(head, rows)
    out_console.print(CAUTION)


@forecast_app.command("hindcast")
def hindcast_cmd(
    scenario: Path = typer.Argument(..., help="Scenario folder."),
    apply: bool = typer.Option(False, "--apply",
                               help="Widen the cached forecast's shared level sds by the scale the replayed deals "
                                    "call for (never narrower)."),
    seed: int = typer.Option(0, "--seed", min=0, help="Seed of the forecast and of the preemption draws."),
    solver: str = typer.Option("highs", "--solver", help="Allocator's solver: highs or cbc."),
    json_out: bool = typer.Option(False, "--json", help="Print one JSON object."),
) -> None:
    """Replay deals shaped like the scenario's at past origins and count how often their claimed
    chances of delivery came true (a reliability table)."""
    from planner.deals import check_solver
    from planner.hindcast import hindcast_scenario

    check_solver(solver)
    scn = open_folder(scenario)
    if not scn.deals:
        raise InputError(f"{scenario}: no deals/*.toml to shape the replayed deals on")
    with _progress("forecast hindcast") as cb:
        s = hindcast_scenario(scn, seed=seed, solver=solver, apply=apply, progress=cb)
    s = {k: v for k, v in s.items() if k != "fit_key"}
    s["caution"] = ("Replayed deals measure past weeks: future errors can be larger. " + CAUTION)
    if json_out:
        print_json(s)
        return
    if not s.get("deals"):
        out_console.print("no deal could be replayed (no deliverable plan at any origin)")
        return
    out_console.print(f"{s['deals']} deals replayed at {s['origins']} past origins (about {s['effective_deals']:.1f} "
                      f"independent outcomes: deals at one origin share its shocks, correlation "
                      f"{s['intra_origin_correlation']:.2f})")
    head = ["claimed chance", "deals", "mean claim", "came true", "+- 2 se"]
    rows = [[f"{b['low']:.0%}-{b['high']:.0%}", str(b["deals"]),
             f"{b['mean_claimed']:.1%}" if b["deals"] else "-", f"{b['realised']:.1%}" if b["deals"] else "-",
             f"{2 * b['se']:.1%}" if b["deals"] else "-"] for b in s["reliability"]]
    _print_aligned(head, rows)
    c95 = s["claimed_95"]
    if c95["deals"]:
        out_console.print(f"claimed at 95%: {c95['deals']} deals, delivered in {c95['realised']:.1%}")
    out_console.print(f"deal totals: delivered / expected - 1 = {s['deal_total_bias']:+.1%}; z RMS {s['z_rms']:.2f} "
                      f"(1 if the law is right); PIT deciles {s['pit_histogram']}")
    sel = s["selection"]
    se = f" (se {sel['se']:.1%} over {sel['origins']} origins)" if sel["origins"] > 1 else ""
    out_console.print(f"the plans delivered {sel['gap']:+.1%}{se} beyond what the units they could buy delivered "
                      f"together (a plan picks the units whose forecast runs high); planned delivery x "
                      f"{s['deal_factor_to_apply']:.3f} after shrinking by its noise"
                      + (", applied to the cached forecast" if apply else " (--apply applies it)"))
    out_console.print(f"scale of the shared level factors that makes the PIT uniform: {s['shared_scale']:.2f}; "
                      f"shrunk for the ~{s['effective_deals']:.0f} independent outcomes behind it: "
                      f"{s['scale_to_apply']:.2f}"
                      + (", applied to the cached forecast" if apply else
                         " (--apply widens the cached forecast by it)"))
    out_console.print(s["caution"])
