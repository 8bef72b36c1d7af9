"""`pledge validate`: check a scenario folder against the data contract."""
from __future__ import annotations

from pathlib import Path

import typer
from rich.markup import escape

from planner.cli import app
from planner.cli.common import info, out_console, print_json
from planner.book import book_path, book_warnings, list_deals
from planner.cli.output import open_folder
from planner.scenario import validate_history


def scenario_summary(path: str | Path) -> dict:
    """Load and fully validate a scenario (history rows included); return a plain summary dict."""
    folder = Path(path)
    generated = not (folder / "history.parquet").exists() and not (folder / "history.csv").exists()
    sc = open_folder(folder)
    info("checking history rows ...")
    h = validate_history(sc)
    inv = sc.inventory
    return {
        "scenario": sc.name,
        "path": str(sc.path),
        "valid": True,
        "first_week": sc.first_week,
        "weeks": sc.weeks,
        "last_day": sc.week_end(sc.weeks),
        "currency": sc.currency,
        "preempt_rate": sc.preempt_rate,
        "zones": len(sc.zones),
        "markets": int(sc.zones["market"].nunique()),
        "networks": len(sc.networks),
        "genres": sorted(sc.networks["genre"].unique().tolist()),
        "dayparts": [{"name": d.name, "start": d.start, "end": d.end, "hours_per_day": d.hours,
                      "days": len(d.days), "wraps_midnight": d.wraps} for d in sc.dayparts],
        "demos": list(sc.demos),
        "units": int(len(inv[["zone", "network", "daypart"]].drop_duplicates())),
        "inventory_rows": int(len(inv)),
        "avails": int(inv["avails"].sum()),
        "deals": {name: {"advertiser": d.advertiser, "demo": d.demo, "impressions": d.impressions,
                         "weeks": [d.first_week, d.last_week], "price_cpm": d.price_cpm,
                         "confidence": d.confidence, "pad": d.pad, "risk_default_used": d.risk_default_used}
                  for name, d in sc.deals.items()},
        "history": {"file": Path(h.path).name, "generated_now": generated, "rows": h.rows, "series": h.series,
                    "start": h.start, "end": h.end, "days": h.days, "completeness": h.completeness,
                    "zero_share": h.zero_share, "short_series": len(h.short_series),
                    "short_series_list": h.short_series, "missing_series": h.missing_series},
        "book": {"path": str(book_path(sc)), "deals": len(list_deals(sc)), "warnings": book_warnings(sc)},
    }


@app.command("validate")
def validate(
    scenario: Path = typer.Argument(..., help="Scenario folder."),
    json_out: bool = typer.Option(False, "--json", help="Print one JSON object instead of a summary."),
) -> None:
    """Check every file of a scenario folder and print what it holds (exit 2 on a problem)."""
    s = scenario_summary(scenario)
    if json_out:
        print_json(s)
        return
    h = s["history"]
    lines = [
        f"[bold]{s['scenario']}[/bold]  ({s['path']})  valid",
        f"plan: {s['weeks']} weeks from {s['first_week']} to {s['last_day']}, currency {s['currency']}, "
        f"default preemption {s['preempt_rate']:.0%}",
        f"zones {s['zones']} in {s['markets']} markets, networks {s['networks']} ({', '.join(s['genres'])}), "
        f"demos {', '.join(s['demos'])}",
        "dayparts: " + ", ".join(f"{d['name']} {d['start']}-{d['end']}" for d in s["dayparts"]),
        f"units (zone x network x daypart) {s['units']:,}, inventory rows {s['inventory_rows']:,}, "
        f"avails {s['avails']:,} spots",
        f"history ({h['file']}): {h['rows']:,} rows, {h['series']} series, {h['start']} to {h['end']} "
        f"({h['days']} days), completeness {h['completeness']:.1%}, zeros {h['zero_share']:.1%}, "
        f"short series {h['short_series']}"
        + (f", sold zone x network x demo with no history {len(h['missing_series'])}" if h["missing_series"] else ""),
        f"deals {len(s['deals'])}:",
    ]
    for name, d in s["deals"].items():
        risk = f"pad {d['pad']:.0%}" if d["pad"] is not None else (
            f"confidence {d['confidence']:.0%}" + (" (default)" if d["risk_default_used"] else ""))
        lines.append(f"  {name}: {d['advertiser']}, {d['impressions']:,.0f} {d['demo']} impressions, "
                     f"weeks {d['weeks'][0]}-{d['weeks'][1]}, CPM {d['price_cpm']:.2f}, {risk}")
    if s["book"]["deals"]:
        lines.append(f"book {s['book']['path']}: {s['book']['deals']} committed deal(s)")
    lines += [f"[bold yellow]warning[/]: {escape(w)}" for w in s["book"]["warnings"]]
    lines.append("[dim]Invented data is for demonstration; forecasts are estimates and contract terms decide "
                 "what is owed.[/dim]")
    for line in lines:
        out_console.print(line, highlight=False, soft_wrap=True)
