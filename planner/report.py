"""The HTML report: one self-contained file (inline CSS, plots as inline SVG images).

Two layers:

- `ReportData` and its parts are plain dataclasses of DataFrames, arrays and check payloads;
  `render_report(data) -> str` turns them into HTML and knows nothing of scenarios or solvers.
- `planner.workflows.build_report(scenario, ...)` gathers those parts (forecast, check, plan,
  book, stress, history); the helpers here (`deal_section`, `book_section`, `attach_stress`,
  `top_units`, ...) shape results into them without solving or reading anything.
  `write_report(data, path)` writes the file atomically.

Verdict figures are placed in elements carrying ``data-deal``, ``data-field`` and ``data-value``
(the exact number, as in ``pledge check --json``) so that tests and scripts can read them back.
"""
from __future__ import annotations

import base64
import html
import json
import math
import platform
from dataclasses import asdict, dataclass, field
from importlib import metadata
from pathlib import Path
from typing import Any, Sequence

import numpy as np
import pandas as pd

from planner import plots
from planner import terms as tm
from planner.atomic import write_text_atomic

CAUTIONS = (
    "Forecasts are estimates made from past audiences; actual delivery will differ, and the bands "
    "shown are themselves estimates.",
    "The contract terms decide what is owed on under-delivery (make-goods or refunds); the liability "
    "figures here are a model of those terms, not a statement of them.",
    "Check every plan against posted actuals as the flight airs, and have the people accountable for "
    "the money review it before anything is committed.",
)

_PACKAGES = ("pledge", "numpy", "pandas", "scipy", "pulp", "highspy", "scikit-learn", "matplotlib", "duckdb")


# --------------------------------------------------------------------------------------------
# Data handed to the renderer
# --------------------------------------------------------------------------------------------
@dataclass
class DealSection:
    """Everything the report shows about one deal.

    `verdict` is the deal's check payload (the object `pledge check --json` prints): keys
    ``deal, deliverable, guarantee, expected_impressions, probability_of_delivery, confidence,
    cost, revenue, margin, max_guarantee, binding`` and any others. `frontier` has
    ``guarantee, cost, probability``; `pacing` ``week, expected_impressions, p10, p90,
    even_pacing``; `spots` ``zone, network, daypart, week, spots, rate, cost,
    expected_impressions``; `delivery_draws` delivered impressions per stress draw.
    """

    name: str
    verdict: dict[str, Any]
    advertiser: str | None = None
    demo: str | None = None
    weeks: tuple[int, int] | None = None
    price_cpm: float | None = None
    in_book: bool = False
    frontier: pd.DataFrame | None = None
    frontier_relaxed: bool = False
    pacing: pd.DataFrame | None = None
    spots: pd.DataFrame | None = None
    delivery_draws: np.ndarray | None = None
    flags: list[str] = field(default_factory=list)  # where the figures come from; a deal file that differs
    probability_of_shortfall: float | None = None
    expected_shortfall: float | None = None
    expected_liability: float | None = None


@dataclass
class BookSection:
    """The stress test of the whole book: liability per draw (currency) and its tail."""

    liability_draws: np.ndarray
    var95: float
    cvar95: float
    expected_liability: float
    draws: int
    seed: int | None = None
    shocks: Sequence[str] = ()
    liability_basis: str = "refund"
    deals: Sequence[str] = ()
    extra: dict[str, Any] = field(default_factory=dict)
    deal_rows: list[dict] = field(default_factory=list)  # per deal: shortfall chance, liability, CVaR share
    network_rows: list[dict] = field(default_factory=list)  # networks whose level error drives the tail


@dataclass
class ForecastBand:
    """History against the forecast band for one unit (impressions of one spot)."""

    label: str
    history: pd.DataFrame  # week_start, impressions
    forecast: pd.DataFrame  # week_start, mean_impressions, q10_impressions, q90_impressions


@dataclass
class ReportData:
    """All the inputs of one report."""

    scenario_name: str
    scenario_path: str
    currency: str
    deals: list[DealSection]
    book: BookSection | None = None
    forecasts: list[ForecastBand] = field(default_factory=list)
    dayparts: list[str] | None = None
    seed: int | None = None
    notes: list[str] = field(default_factory=list)
    versions: dict[str, str] = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)  # cautions about these inputs in particular


# --------------------------------------------------------------------------------------------
# Formatting
# --------------------------------------------------------------------------------------------
def _num(v: Any) -> float | None:
    if v is None:
        return None
    try:
        f = float(v)
    except (TypeError, ValueError):
        return None
    return f if math.isfinite(f) else None


def fmt_money(v: Any, currency: str) -> str:
    """'USD 1,234,567' (no decimals), or an em dash when missing."""
    f = _num(v)
    return "\u2014" if f is None else f"{currency} {f:,.0f}"


def fmt_count(v: Any) -> str:
    """'12,345,678', or an em dash when missing."""
    f = _num(v)
    return "\u2014" if f is None else f"{f:,.0f}"


def _imp(v: Any) -> str:
    return fmt_count(v) + (" imp." if _num(v) is not None else "")


def fmt_pct(v: Any, digits: int = 1) -> str:
    """A fraction as a percentage: 0.953 -> '95.3%'."""
    f = _num(v)
    return "\u2014" if f is None else f"{100 * f:.{digits}f}%"


def package_versions() -> dict[str, str]:
    """Versions of Python and the packages that produce the numbers."""
    out = {"python": platform.python_version()}
    for name in _PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            continue
    return out


def _esc(v: Any) -> str:
    return html.escape(str(v), quote=True)


def _attr_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    f = _num(v)
    if f is None:
        return ""
    return repr(f)


def _field(deal: str, key: str, value: Any, text: str) -> str:
    return (f'<span data-deal="{_esc(deal)}" data-field="{_esc(key)}" '
            f'data-value="{_esc(_attr_value(value))}">{_esc(text)}</span>')


def _img(svg: str, kind: str, deal: str | None, alt: str) -> str:
    data = base64.b64encode(svg.encode("utf-8")).decode("ascii")
    deal_attr = f' data-deal="{_esc(deal)}"' if deal else ""
    return (f'<figure class="plot"><img data-plot="{_esc(kind)}"{deal_attr} alt="{_esc(alt)}" '
            f'src="data:image/svg+xml;base64,{data}"></figure>')


def _binding_items(binding: Any) -> list[str]:
    if not binding:
        return []
    if isinstance(binding, (str, bytes)):
        return [str(binding)]
    items = []
    for b in binding:
        if isinstance(b, dict):
            items.append(str(b.get("text") or b.get("message") or b.get("description") or
                             "; ".join(f"{k}: {v}" for k, v in b.items())))
        else:
            items.append(str(b))
    return items


# --------------------------------------------------------------------------------------------
# Rendering
# --------------------------------------------------------------------------------------------
_CSS = """
:root { --ink:#1d2733; --muted:#6b7785; --line:#dfe4ea; --teal:#1f6f78; --teal-soft:#e6f2f3;
        --amber:#d9922e; --brick:#b5452b; --brick-soft:#f8e9e5; --paper:#fbfaf7; }
* { box-sizing: border-box; }
body { margin:0; background:var(--paper); color:var(--ink);
       font: 14px/1.45 "Helvetica Neue", Arial, "Liberation Sans", sans-serif; }
header.top { background:var(--ink); color:#fff; padding:18px 32px 14px; }
header.top h1 { margin:0; font-size:22px; letter-spacing:.2px; }
header.top .sub { color:#c7d0da; font-size:13px; margin-top:4px; }
main { max-width:1180px; margin:0 auto; padding:18px 32px 40px; }
h2 { font-size:18px; margin:30px 0 10px; padding-bottom:4px; border-bottom:2px solid var(--line); }
h3 { font-size:15px; margin:18px 0 8px; }
.caution { background:#fff7e8; border-left:4px solid var(--amber); padding:10px 16px; margin:14px 0;
           font-size:13px; }
.caution ul { margin:4px 0 0 18px; padding:0; }
.summary { width:100%; border-collapse:collapse; background:#fff; font-size:13px; }
.summary th, .summary td { padding:6px 10px; border-bottom:1px solid var(--line); text-align:right;
                            white-space:nowrap; }
.summary th:first-child, .summary td:first-child { text-align:left; }
.summary thead th { background:#eef1f4; font-weight:600; }
.deal { background:#fff; border:1px solid var(--line); border-radius:6px; margin:22px 0; padding:0 0 12px; }
.deal > header { display:flex; align-items:baseline; gap:14px; padding:12px 18px; border-bottom:1px solid var(--line); }
.deal > header h2 { margin:0; border:0; padding:0; font-size:18px; }
.deal > header .meta { color:var(--muted); font-size:13px; }
.badge { display:inline-block; padding:2px 10px; border-radius:12px; font-size:12px; font-weight:700;
         letter-spacing:.3px; text-transform:uppercase; }
.badge.yes { background:var(--teal-soft); color:var(--teal); }
.badge.no { background:var(--brick-soft); color:var(--brick); }
.badge.held { background:#eef1f4; color:var(--muted); }
.tiles { display:grid; grid-template-columns:repeat(auto-fill, minmax(190px, 1fr)); gap:10px; padding:14px 18px 4px; }
.tile { border:1px solid var(--line); border-radius:5px; padding:8px 12px; }
.tile .k { color:var(--muted); font-size:11.5px; text-transform:uppercase; letter-spacing:.4px; }
.tile .v { font-size:18px; font-weight:600; margin-top:2px; white-space:nowrap; }
.tile.risk .v { color:var(--brick); }
.binding { margin:6px 18px 0; font-size:13px; }
.binding ul { margin:4px 0 0 18px; padding:0; }
.plots { display:grid; grid-template-columns:1fr 1fr; gap:8px 18px; padding:6px 18px; }
.plots .wide { grid-column: 1 / -1; }
figure.plot { margin:0; }
figure.plot img { width:100%; height:auto; display:block; }
.bands { display:grid; grid-template-columns:repeat(3, 1fr); gap:10px; }
.empty { color:var(--muted); font-style:italic; padding:6px 0; }
.book { background:#fff; border:1px solid var(--line); border-radius:6px; padding:10px 18px 14px; }
footer { color:var(--muted); font-size:12px; margin-top:30px; border-top:1px solid var(--line); padding-top:10px; }
footer table td { padding:1px 12px 1px 0; }
@media (max-width: 820px) { .plots, .bands { grid-template-columns:1fr; } }
@media print { body { background:#fff; } .deal, .book { break-inside: avoid; } }
"""


def _tile(deal: str, key: str, label: str, value: Any, text: str, cls: str = "") -> str:
    return (f'<div class="tile {cls}"><div class="k">{_esc(label)}</div>'
            f'<div class="v">{_field(deal, key, value, text)}</div></div>')


def _verdict_panel(d: DealSection, currency: str) -> str:
    v = d.verdict
    name = d.name
    deliverable = bool(v.get("deliverable"))
    badge = (f'<span class="badge {"yes" if deliverable else "no"}" data-deal="{_esc(name)}" '
             f'data-field="deliverable" data-value="{"true" if deliverable else "false"}">'
             f'{"deliverable" if deliverable else "not deliverable"}</span>')
    held = '<span class="badge held">in the book</span>' if d.in_book else ""
    meta = []
    if d.advertiser:
        meta.append(_esc(d.advertiser))
    if d.demo:
        meta.append(f"demo {_esc(d.demo)}")
    if d.weeks:
        meta.append(f"weeks {d.weeks[0]}\u2013{d.weeks[1]}")
    if d.price_cpm is not None:
        meta.append(f"price {currency} {d.price_cpm:,.2f} CPM")
    margin = _num(v.get("margin"))
    revenue = _num(v.get("revenue"))
    margin_pct = _num(v.get("margin_pct"))
    if margin_pct is None and margin is not None and revenue:
        margin_pct = margin / revenue
    elif margin_pct is not None and abs(margin_pct) > 1.5:  # given in percent points
        margin_pct = margin_pct / 100.0
    conf = _num(v.get("confidence"))
    prob = _num(v.get("probability_of_delivery"))
    tiles = [
        _tile(name, "guarantee", "guarantee", v.get("guarantee"), _imp(v.get("guarantee"))),
        _tile(name, "expected_impressions", "expected delivery", v.get("expected_impressions"),
              _imp(v.get("expected_impressions"))),
        _tile(name, "probability_of_delivery", "chance of delivery", prob, fmt_pct(prob),
              "risk" if (prob is not None and conf is not None and prob < conf - 1e-9) else ""),
        _tile(name, "confidence", "required chance" if conf is not None else "risk margin", conf, fmt_pct(conf) if conf is not None
              else ("pad " + fmt_pct(v.get("pad"), 0) if v.get("pad") is not None else "\u2014")),
        _tile(name, "cost", "expected cost (spots that air)", v.get("cost"), fmt_money(v.get("cost"), currency)
              + (f" \u00b1 {fmt_money(v.get('cost_sd'), currency)}" if _num(v.get("cost_sd")) is not None else "")),
        _tile(name, "revenue", "revenue", revenue, fmt_money(revenue, currency)),
        _tile(name, "margin", "margin" + (f" ({margin_pct:.1%} of revenue)" if margin_pct is not None else ""),
              margin, fmt_money(margin, currency), "risk" if (margin is not None and margin < 0) else ""),
        _tile(name, "max_guarantee", "largest deliverable guarantee", v.get("max_guarantee"),
              _imp(v.get("max_guarantee"))),
    ]
    if _num(v.get("expected_makegood_cost")) is not None:
        net = v.get("margin_net_of_makegoods")
        tiles.append(_tile(name, "expected_makegood_cost", "expected make-good cost", v.get("expected_makegood_cost"),
                           fmt_money(v.get("expected_makegood_cost"), currency)))
        tiles.append(_tile(name, "margin_net_of_makegoods", "margin net of make-goods", net, fmt_money(net, currency),
                           "risk" if (_num(net) is not None and float(net) < 0) else ""))
    if _num(v.get("cost_cpm")) is not None:
        tiles.append(_tile(name, "cost_cpm", "cost CPM", v.get("cost_cpm"), f"{currency} {float(v['cost_cpm']):,.2f}"))
    if _num(v.get("cpm_needed")) is not None:
        tiles.append(_tile(name, "cpm_needed", f"CPM for {fmt_pct(v.get('target_margin'), 0)} margin",
                           v.get("cpm_needed"), f"{currency} {float(v['cpm_needed']):,.2f}"))
    items = _binding_items(v.get("binding"))
    label = "From the book" if d.in_book else "What binds"
    binding = (f'<div class="binding"><b>{label}:</b><ul>' +
               "".join(f'<li data-deal="{_esc(name)}" data-field="binding">{_esc(t)}</li>' for t in items) +
               "</ul></div>") if items else \
        '<div class="binding"><b>What binds:</b> nothing at this guarantee.</div>'
    notes = []
    if v.get("risk_default_used") or v.get("default_confidence_used"):
        notes.append("No risk margin in the deal file: the default required chance was used.")
    if d.probability_of_shortfall is not None:
        notes.append(f"Stress test of the book: shortfall chance {fmt_pct(d.probability_of_shortfall)}, "
                     f"expected shortfall {fmt_count(d.expected_shortfall)} imp., "
                     f"expected liability {fmt_money(d.expected_liability, currency)}.")
    notes_html = "".join(f'<div class="binding">{_esc(n)}</div>' for n in notes)
    sep = " \u00b7 "
    return (f'<header><h2>{_esc(name)}</h2>{badge}{held}<span class="meta">{sep.join(meta)}</span></header>'
            f'<div class="tiles">{"".join(tiles)}</div>{binding}{notes_html}')


def _deal_plots(d: DealSection, data: ReportData) -> str:
    v = d.verdict
    parts = []
    guarantee = _num(v.get("guarantee")) or 0.0
    if d.frontier is not None and len(d.frontier):
        parts.append(_img(plots.frontier_svg(d.frontier, guarantee, _num(v.get("confidence")), data.currency,
                                             _num(v.get("max_guarantee")), d.frontier_relaxed),
                          "frontier", d.name, "cost and chance of delivery by guarantee size"))
    if d.pacing is not None and len(d.pacing):
        parts.append(_img(plots.pacing_svg(d.pacing), "pacing", d.name, "weekly pacing"))
    if d.delivery_draws is not None and len(d.delivery_draws):
        parts.append(_img(plots.delivery_svg(d.delivery_draws, guarantee, d.probability_of_shortfall),
                          "delivery", d.name, "delivery distribution in the stress test"))
    if d.spots is not None and len(d.spots) and float(d.spots["spots"].sum()) > 0:
        parts.append(_zone_table(d.spots, data.currency))
        parts.append(_img(plots.money_map_svg(d.spots[d.spots["spots"] > 0], data.currency, data.dayparts),
                          "money", d.name, "expected impressions and cost by network and daypart")
                     .replace('class="plot"', 'class="plot wide"'))
        totals = d.spots
        parts.append(f'<div class="wide binding">Buy plan: {fmt_count(totals["spots"].sum())} spots in '
                     f'{int((totals["spots"] > 0).sum()):,} unit-weeks, {fmt_money(totals["cost"].sum(), data.currency)}, '
                     f'{fmt_count(totals["expected_impressions"].sum())} expected impressions.</div>')
    if not parts:
        return '<div class="plots"><div class="empty wide">No plan: the deal is not deliverable as written.</div></div>'
    return f'<div class="plots">{"".join(parts)}</div>'


def _zone_table(spots: pd.DataFrame, currency: str) -> str:
    """The plan by zone: spots, cost, expected impressions and the plan's CPM."""
    z = spots.groupby("zone", observed=True)[["spots", "cost", "expected_impressions"]].sum()
    z = z[z["spots"] > 0].sort_values("cost", ascending=False)
    if len(z) > 7:  # the largest six and the rest, so the table stays beside its plot
        rest = z.iloc[6:].sum().rename(f"{len(z) - 6} other zones")
        z = pd.concat([z.iloc[:6], rest.to_frame().T])
    rows = "".join(
        f"<tr><td>{_esc(zone)}</td><td>{fmt_count(r.spots)}</td><td>{fmt_money(r.cost, currency)}</td>"
        f"<td>{fmt_count(r.expected_impressions)}</td>"
        f"<td>{(1000 * r.cost / r.expected_impressions) if r.expected_impressions else float('nan'):,.2f}</td></tr>"
        for zone, r in z.iterrows())
    return ('<div><h3>Where the money goes, by zone</h3><table class="summary"><thead><tr><th>zone</th>'
            f'<th>spots</th><th>cost</th><th>expected imp.</th><th>CPM ({_esc(currency)})</th></tr></thead>'
            f'<tbody>{rows}</tbody></table></div>')


def _summary_table(data: ReportData) -> str:
    rows = []
    c = data.currency
    for d in data.deals:
        v = d.verdict
        ok = bool(v.get("deliverable"))
        rows.append(
            "<tr>"
            f"<td>{_esc(d.name)}</td>"
            f"<td>{'yes' if ok else 'no'}{' (booked)' if d.in_book else ''}</td>"
            f"<td>{fmt_count(v.get('guarantee'))}</td>"
            f"<td>{fmt_money(v.get('cost'), c)}</td>"
            f"<td>{fmt_money(v.get('margin'), c)}</td>"
            f"<td>{fmt_pct(v.get('probability_of_delivery'))}</td>"
            f"<td>{fmt_count(v.get('max_guarantee'))}</td>"
            "</tr>")
    return ('<table class="summary"><thead><tr><th>deal</th><th>deliverable</th><th>guarantee (imp.)</th>'
            f'<th>expected cost</th><th>margin</th><th>chance of delivery</th><th>largest guarantee (imp.)</th>'
            f'</tr></thead><tbody>{"".join(rows)}</tbody></table>')


def _book_section(data: ReportData) -> str:
    b = data.book
    if b is None:
        return '<h2>The book</h2><div class="empty">No deals committed to the book: no stress test.</div>'
    c = data.currency
    shocks = ", ".join(b.shocks) if b.shocks else "none"
    tiles = "".join(
        _tile("_book", key, f"{label} of {b.liability_basis} liability (\u00b1 s.e.)", value,
              f"{fmt_money(value, c)} \u00b1 {fmt_count(b.extra.get(key + '_se'))}", cls)
        + f'<span hidden data-deal="_book" data-field="{key}_se" '
          f'data-value="{_esc(_attr_value(b.extra.get(key + "_se")))}"></span>'
        for key, label, value, cls in (("expected_liability", "expected value", b.expected_liability, ""),
                                       ("var95", "VaR95", b.var95, "risk"), ("cvar95", "CVaR95", b.cvar95, "risk"))
    ) + _tile("_book", "draws", "Monte Carlo draws", b.draws, fmt_count(b.draws))
    img = _img(plots.liability_svg(b.liability_draws, b.var95, b.cvar95, c, b.liability_basis), "liability", None,
               f"book {b.liability_basis} liability distribution")
    deals = ", ".join(b.deals) if b.deals else "\u2014"
    rows = "".join(
        f"<tr><td>{_esc(r['deal'])}</td><td>{fmt_pct(r['probability_of_shortfall'])}</td>"
        f"<td>{fmt_count(r['expected_shortfall'])}</td><td>{fmt_money(r['expected_liability'], c)}</td>"
        f"<td>{fmt_money(r['expected_margin'], c)}</td>"
        f"<td>{fmt_pct(r['tail_contribution'] / b.cvar95) if b.cvar95 > 0 else chr(0x2014)}</td></tr>"
        for r in b.deal_rows)
    table = ('<table class="summary"><thead><tr><th>deal</th><th>shortfall chance</th><th>expected shortfall (imp.)</th>'
             '<th>expected liability</th><th>expected margin</th><th>share of CVaR95</th></tr></thead>'
             f'<tbody>{rows}</tbody></table>') if rows else ""
    nets = ("<div class='binding'>Networks whose audience level drives the tail (liability from their level "
            "error in the draws beyond VaR95): " + ", ".join(
                f"{_esc(n['network'])} {fmt_money(n['tail_liability'], c)}" for n in b.network_rows) + ".</div>"
            ) if b.network_rows else ""
    return (f'<h2>The book</h2><div class="book"><div class="binding">Deals in the book: {_esc(deals)}. '
            f'Liability basis: {_esc(b.liability_basis)}. Shocks: {_esc(shocks)}. Seed: {_esc(b.seed)}.</div>'
            f'<div class="tiles">{tiles}</div><div class="plots"><div class="wide">{img}</div>'
            f'<div class="wide">{table}</div>{nets}</div></div>')


def _forecast_section(data: ReportData) -> str:
    if not data.forecasts:
        return ""
    imgs = "".join(_img(plots.forecast_band_svg(f.history, f.forecast, f.label), "forecast", None,
                        f"forecast band {f.label}") for f in data.forecasts)
    return ('<h2>Forecast bands</h2><div class="binding">Mean impressions of one spot per week: '
            'history, then the forecast with its 10\u201390% band, for the units carrying most of the plans.</div>'
            f'<div class="bands">{imgs}</div>')


def _cautions() -> str:
    return ('<div class="caution" data-section="cautions"><b>Before you rely on these figures</b><ul>'
            + "".join(f"<li>{_esc(c)}</li>" for c in CAUTIONS) + "</ul></div>")


def _warnings(data: ReportData) -> str:
    if not data.warnings:
        return ""
    return ('<div class="caution" data-section="warnings"><b>This forecast in particular</b><ul>'
            + "".join(f"<li>{_esc(w)}</li>" for w in data.warnings) + "</ul></div>")


def render_report(data: ReportData) -> str:
    """Render the report as one self-contained HTML document (str)."""
    versions = data.versions or package_versions()
    deals = "".join(f'<section class="deal" data-deal-section="{_esc(d.name)}">{_verdict_panel(d, data.currency)}'
                    f"{_deal_plots(d, data)}</section>" for d in data.deals)
    notes = "".join(f'<div class="binding">{_esc(n)}</div>' for n in data.notes)
    ver = "".join(f"<tr><td>{_esc(k)}</td><td>{_esc(v)}</td></tr>" for k, v in versions.items())
    payload = {"scenario": data.scenario_name, "seed": data.seed, "currency": data.currency,
               "deals": [d.name for d in data.deals], "versions": versions}
    meta_json = json.dumps(payload).replace("</", "<\\/")
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>pledge report: {_esc(data.scenario_name)}</title>
<style>{_CSS}</style></head>
<body>
<header class="top"><h1>Deal and book report: {_esc(data.scenario_name)}</h1>
<div class="sub">{len(data.deals)} deal(s) \u00b7 currency {_esc(data.currency)} \u00b7 impressions are in each deal's demo \u00b7 made by pledge {_esc(versions.get("pledge", ""))}</div></header>
<main>
{_cautions()}
{_warnings(data)}
{notes}
<h2>Deals at a glance</h2>
{_summary_table(data)}
{deals}
{_book_section(data)}
{_forecast_section(data)}
{_cautions()}
<footer><div>Scenario <b>{_esc(data.scenario_name)}</b> at {_esc(data.scenario_path)} \u00b7 seed {_esc(data.seed)}</div>
<table>{ver}</table></footer>
<script type="application/json" id="report-meta">{meta_json}</script>
</main></body></html>
"""


def write_report(data: ReportData, path: str | Path) -> Path:
    """Render `data` and write it to `path` atomically (whole or not at all, mode 0666 & ~umask).
    Returns the path."""
    return write_text_atomic(path, render_report(data))


# --------------------------------------------------------------------------------------------
# Shaping results into report data (no solving, no reading)
# --------------------------------------------------------------------------------------------
def top_units(plans: dict[str, tuple[str, pd.DataFrame]], n: int = 3) -> list[tuple[str, str, str, str]]:
    """The `n` units (zone, network, daypart, demo) carrying most expected impressions in the plans.

    `plans` maps deal name to (demo, spots DataFrame). Distinct networks are preferred.
    """
    rows = []
    for demo, spots in plans.values():
        if spots is None or spots.empty:
            continue
        g = spots.groupby(["zone", "network", "daypart"], observed=True)["expected_impressions"].sum()
        rows.append(g.rename("imp").reset_index().assign(demo=demo))
    if not rows:
        return []
    allu = pd.concat(rows).groupby(["zone", "network", "daypart", "demo"], observed=True)["imp"].sum()
    allu = allu.sort_values(ascending=False, kind="stable").reset_index()
    first = allu.drop_duplicates("network")
    picked = pd.concat([first, allu]).drop_duplicates(["zone", "network", "daypart", "demo"]).head(n)
    return [tuple(r) for r in picked[["zone", "network", "daypart", "demo"]].itertuples(index=False)]


def book_section(stress: Any) -> BookSection:
    """The book part of the report from a `planner.stress.StressResult`."""
    b = stress.book
    return BookSection(
        liability_draws=np.asarray(stress.book_liability, dtype=float), var95=float(b["var95"]),
        cvar95=float(b["cvar95"]), expected_liability=float(b["expected_liability"]), draws=int(stress.draws),
        seed=stress.seed, shocks=list(stress.shocks or ()), liability_basis=stress.liability_basis,
        deals=list(stress.deal_names), extra={k: v for k, v in b.items()},
        deal_rows=[{"deal": d.deal, "probability_of_shortfall": d.probability_of_shortfall,
                    "expected_shortfall": d.expected_shortfall, "expected_liability": d.expected_liability,
                    "expected_margin": d.expected_margin, "tail_contribution": d.tail_contribution}
                   for d in stress.deals],
        network_rows=[dict(n) for n in (stress.networks or [])[:5] if n.get("tail_liability", 0) > 0])


def attach_stress(section: DealSection, stress: Any) -> None:
    """Copy a deal's stress figures and delivery draws into its section (no-op if not in the stress)."""
    names = list(getattr(stress, "deal_names", []) or [])
    if section.name not in names:
        return
    j = names.index(section.name)
    if stress.delivery is not None:
        section.delivery_draws = np.asarray(stress.delivery[:, j], dtype=float)
    ds = next((d for d in stress.deals if d.deal == section.name), None)
    if ds is not None:
        section.probability_of_shortfall = ds.probability_of_shortfall
        section.expected_shortfall = ds.expected_shortfall
        section.expected_liability = ds.expected_liability


def check_payload(result: Any) -> dict:
    """The JSON object of a check result, exactly as `pledge check --json` prints its numbers."""
    if isinstance(result, dict):
        return dict(result)
    for attr in ("to_json", "as_dict", "to_dict"):
        if hasattr(result, attr):
            return dict(getattr(result, attr)())
    return asdict(result)


def frontier_frame(rows: Any) -> pd.DataFrame | None:
    """Frontier rows (dicts with guarantee, cost, probability_of_delivery) as a DataFrame
    ``guarantee, cost, probability`` (impressions, currency, 0..1; NaN where not deliverable)."""
    if rows is None:
        return None
    f = pd.DataFrame(rows) if not isinstance(rows, pd.DataFrame) else rows.copy()
    if f.empty or "guarantee" not in f:
        return None
    if "probability" not in f and "probability_of_delivery" in f:
        f["probability"] = f["probability_of_delivery"]
    out = pd.DataFrame({c: pd.to_numeric(f.get(c), errors="coerce").astype(float)
                        for c in ("guarantee", "cost", "probability")})
    return out


def deal_section(scenario: Any, name: str, check: Any, plan: Any, in_book: bool, extra: Any = ()) -> DealSection:
    """The report's section of one deal from its check (with its frontier rows, plus `extra` rows)
    and its plan (None, or not deliverable: no spots or pacing)."""
    deal = scenario.deals[name]
    verdict = check_payload(check)
    rows = list(verdict.get("frontier") or []) + list(extra or [])
    spots = pacing = None
    if plan is not None and getattr(plan, "deliverable", True):
        spots = plan.spots
        pacing = plan.pacing
    return DealSection(
        name=name, verdict=verdict, advertiser=getattr(deal, "advertiser", None), demo=deal.demo,
        weeks=(int(deal.first_week), int(deal.last_week)), price_cpm=float(deal.price_cpm), in_book=in_book,
        frontier=frontier_frame(rows or None), pacing=pacing, spots=spots,
        frontier_relaxed=any(isinstance(r, dict) and r.get("relaxed") for r in rows))


def _book_makegood(booked: Any) -> dict:
    """The held plan's expected make-good under the terms it was committed on (`planner.terms`;
    the defaults for a deal committed before terms were stored); {} without the plan's figures."""
    terms = tm.terms_from_dict((getattr(booked, "terms", None) or {}).get("terms"))
    mean, sd, cost = (_num(getattr(booked, k, None)) for k in ("expected_impressions", "sd", "cost"))
    if mean is None or sd is None or cost is None:
        return {}
    mg = tm.makegood_summary(mean=mean, sd=sd, guarantee=float(booked.guarantee), cost=cost,
                             revenue=float(booked.revenue), price_cpm=float(booked.price_cpm), terms=terms)
    return {k: mg[k] for k in ("expected_shortfall_impressions", "expected_makegood_cost", "margin_net_of_makegoods")}


def book_verdict(booked: Any) -> dict:
    """A booked deal's answer as the book holds it (the keys of `pledge check --json` the report
    shows): its committed terms, the held plan's cost, expected delivery, sd and chance of
    delivery as committed (or as its last re-plan stored them); money in the scenario currency."""
    cost = booked.cost
    revenue = booked.revenue
    return {**_book_makegood(booked), "deliverable": True, "verdict": "held in the book", "guarantee": booked.guarantee,
            "price_cpm": booked.price_cpm, "confidence": booked.confidence, "pad": booked.pad,
            "risk_rule": "pad" if booked.pad is not None else "confidence",
            "expected_impressions": booked.expected_impressions, "sd_impressions": booked.sd,
            "probability_of_delivery": booked.probability, "cost": cost,
            "cost_sd": (getattr(booked, "summary", None) or {}).get("cost_sd"), "revenue": revenue,
            "margin": None if cost is None else revenue - cost,
            "margin_pct": None if cost is None or not revenue else (revenue - cost) / revenue,
            "cost_cpm": None if cost is None else 1000 * cost / booked.guarantee, "spots": booked.spots,
            "first_week": booked.first_week, "last_week": booked.last_week, "demo": booked.demo,
            "committed_at": booked.committed_at, "source": "book"}
