"""Plots for the HTML report, drawn with matplotlib and returned as SVG text.

Every function takes plain DataFrames or arrays and returns one self-contained SVG document
(a string). No pyplot state is used (``matplotlib.figure.Figure`` directly), so the functions
work the same under any backend, in a notebook or a headless server. Output is deterministic:
no dates in the metadata and a fixed hash salt for element ids.
"""
from __future__ import annotations

import io

import matplotlib
import matplotlib.dates as mdates
import numpy as np
import pandas as pd
from matplotlib.colors import LinearSegmentedColormap
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, PercentFormatter

# Our palette: ink, a deep teal for what we plan, amber for the band/targets, brick for risk.
INK = "#1d2733"
MUTED = "#6b7785"
GRID = "#e3e7ec"
TEAL = "#1f6f78"
TEAL_LIGHT = "#a9d3d6"
AMBER = "#d9922e"
BRICK = "#b5452b"
SAND = "#f4efe6"

_HEAT = LinearSegmentedColormap.from_list("pledge_heat", ["#f7fafa", "#a9d3d6", "#1f6f78", "#0f3b40"])

_RC = {
    "svg.fonttype": "none",          # real text in the SVG: small files, crisp, selectable
    "svg.hashsalt": "pledge-report",  # stable element ids: identical inputs, identical file
    "font.family": "sans-serif",
    "font.size": 9.5,
    "axes.edgecolor": MUTED,
    "axes.labelcolor": INK,
    "axes.titlesize": 10.5,
    "axes.titleweight": "bold",
    "axes.titlecolor": INK,
    "xtick.color": MUTED,
    "ytick.color": MUTED,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "legend.frameon": False,
    "legend.fontsize": 8.5,
}


def _short(value: float, _pos=None) -> str:
    """Compact axis label: 1.2M, 850k, 12."""
    a = abs(value)
    if a >= 1e9:
        return f"{value / 1e9:.1f}B"
    if a >= 1e6:
        return f"{value / 1e6:.2f}M" if a < 1e7 else f"{value / 1e6:.1f}M"
    if a >= 1e3:
        return f"{value / 1e3:.0f}k"
    return f"{value:.0f}"


SHORT = FuncFormatter(_short)


def _share(value: float, _pos=None) -> str:
    """A share of draws as a percentage with as many decimals as small values need."""
    if value <= 0:
        return "0%"
    pct = 100 * value
    digits = 0 if pct >= 1 else min(4, int(np.ceil(-np.log10(pct))))
    return f"{pct:.{digits}f}%"


_LABEL_BOX = dict(boxstyle="round,pad=0.2", fc="white", ec="none", alpha=0.85)


def _figure(width: float, height: float, *, left: float = 0.75, right: float = 0.2, bottom: float = 0.5,
            top: float = 0.35, wspace: float | None = None) -> Figure:
    """A figure with fixed margins in inches (a layout engine would draw every figure twice)."""
    with matplotlib.rc_context(_RC):
        fig = Figure(figsize=(width, height), dpi=100)
        fig.subplots_adjust(left=left / width, right=1 - right / width, bottom=bottom / height,
                            top=1 - top / height, wspace=wspace)
        return fig


def _svg(fig: Figure) -> str:
    buf = io.StringIO()
    with matplotlib.rc_context(_RC):
        fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": None}, facecolor="white")
    return buf.getvalue()


def _two_tone(ax, heights: np.ndarray, edges: np.ndarray, split: float, low: str, high: str) -> None:
    """A histogram drawn as two filled step outlines (one artist each, fast): bins whose centre is
    below `split` in colour `low`, the others in `high`."""
    centres = 0.5 * (edges[:-1] + edges[1:])
    below = centres < split
    for mask, colour in ((below, low), (~below, high)):
        if mask.any():
            ax.stairs(np.where(mask, heights, 0.0), edges, fill=True, color=colour, alpha=0.85, lw=0)


def _style(ax) -> None:
    ax.grid(True, axis="y", color=GRID, linewidth=0.8)
    ax.set_axisbelow(True)


def frontier_svg(frontier: pd.DataFrame, guarantee: float, confidence: float | None, currency: str,
                 max_guarantee: float | None = None, relaxed: bool = False) -> str:
    """Cost and probability of delivery against guarantee size.

    Parameters
    ----------
    frontier : DataFrame with ``guarantee`` (impressions), ``cost`` (currency, NaN where not
        deliverable) and ``probability`` (0..1) columns, one row per guarantee size.
    guarantee : the deal's guarantee, impressions (marked with a vertical line).
    confidence : the deal's required chance of delivery (marked on the probability axis).
    max_guarantee : the largest deliverable guarantee, impressions (marked when given).
    relaxed : the costs come from the linear relaxation (said in the legend).
    """
    with matplotlib.rc_context(_RC):
        fig = _figure(6.4, 3.5, right=0.75, bottom=1.05)
        ax = fig.add_subplot()
        f = frontier.sort_values("guarantee")
        ok = f["cost"].notna()
        ax.plot(f["guarantee"][ok], f["cost"][ok], color=TEAL, marker="o", ms=3.5, lw=2,
                label="least cost (linear relaxation)" if relaxed else "least cost")
        ax.set_xlabel("guarantee (impressions)")
        ax.set_ylabel(f"minimum cost ({currency})", color=TEAL)
        ax.xaxis.set_major_formatter(SHORT)
        ax.yaxis.set_major_formatter(SHORT)
        _style(ax)
        ax2 = ax.twinx()
        ax2.spines["right"].set_visible(True)
        ax2.plot(f["guarantee"], f["probability"], color=AMBER, lw=1.8, ls="-", marker="s", ms=3,
                 label="chance of delivery")
        ax2.set_ylim(0, 1.02)
        ax2.yaxis.set_major_formatter(PercentFormatter(1.0, decimals=0))
        ax2.set_ylabel("chance of delivery", color=AMBER)
        if confidence is not None:
            ax2.axhline(confidence, color=AMBER, lw=0.8, ls=":")
        ax.axvline(guarantee, color=INK, lw=1.2, ls="--", label="this deal's guarantee")
        if max_guarantee is not None and max_guarantee > 0:
            ax.axvline(max_guarantee, color=BRICK, lw=1.2, ls=":", label="largest deliverable")
        h1, l1 = ax.get_legend_handles_labels()
        h2, l2 = ax2.get_legend_handles_labels()
        fig.legend(h1 + h2, l1 + l2, loc="lower center", bbox_to_anchor=(0.5, 0.0), ncols=2)
        ax.set_title("Cost and chance of delivery by guarantee size", loc="left")
        return _svg(fig)


def pacing_svg(pacing: pd.DataFrame) -> str:
    """Expected delivery per plan week with its 10-90% band against even pacing.

    Parameters
    ----------
    pacing : DataFrame ``week, expected_impressions, p10, p90, even_pacing`` (impressions per week).
    """
    with matplotlib.rc_context(_RC):
        fig = _figure(6.4, 3.0)
        ax = fig.add_subplot()
        p = pacing.sort_values("week")
        w = p["week"].to_numpy()
        ax.bar(w, p["expected_impressions"], color=TEAL_LIGHT, width=0.7, label="expected delivery")
        ax.errorbar(w, p["expected_impressions"],
                    yerr=[p["expected_impressions"] - p["p10"], p["p90"] - p["expected_impressions"]],
                    fmt="none", ecolor=TEAL, elinewidth=1.4, capsize=3, label="10-90% band")
        ax.step(np.r_[w[0] - 0.5, w + 0.5], np.r_[p["even_pacing"].iloc[0], p["even_pacing"]],
                where="pre", color=AMBER, lw=1.8, ls="--", label="even pacing")
        ax.set_xticks(w)
        ax.set_ylim(0, 1.28 * float(max(p["p90"].max(), p["even_pacing"].max(), 1.0)))
        ax.set_xlabel("plan week")
        ax.set_ylabel("impressions")
        ax.yaxis.set_major_formatter(SHORT)
        _style(ax)
        ax.legend(loc="upper left", ncols=3)
        ax.set_title("Weekly pacing", loc="left")
        return _svg(fig)


def _wrap(name: str) -> str:
    return name.replace("_", "\n").replace("-", "\n").replace(" ", "\n")


def _grid(spots: pd.DataFrame, value: str, networks: list[str], dayparts: list[str]) -> pd.DataFrame:
    g = spots.groupby(["network", "daypart"], observed=True)[value].sum().unstack("daypart")
    return g.reindex(index=networks, columns=dayparts).fillna(0.0)


def money_map_svg(spots: pd.DataFrame, currency: str, dayparts: list[str] | None = None) -> str:
    """Expected impressions and cost by network x daypart, as two heat maps side by side.

    Parameters
    ----------
    spots : the buy plan, ``network, daypart, cost, expected_impressions`` (any other columns ignored).
    dayparts : column order (the scenario's daypart order); defaults to the plan's.
    """
    if dayparts is None:
        dayparts = list(dict.fromkeys(spots["daypart"]))
    dayparts = [d for d in dayparts if d in set(spots["daypart"])] or list(dict.fromkeys(spots["daypart"]))
    networks = (spots.groupby("network")["cost"].sum().sort_values(ascending=False).index.tolist())
    with matplotlib.rc_context(_RC):
        height = max(2.6, 1.2 + 0.3 * len(networks))
        fig = _figure(9.6, height, left=1.35, bottom=0.62, right=0.1, wspace=0.06)
        axes = fig.subplots(1, 2, sharey=True)
        for ax, value, title, fmt in (
            (axes[0], "expected_impressions", "Expected impressions", _short),
            (axes[1], "cost", f"Cost ({currency})", _short),
        ):
            g = _grid(spots, value, networks, dayparts)
            vals = g.to_numpy(dtype=float)
            vmax = vals.max() if vals.size and vals.max() > 0 else 1.0
            ax.imshow(vals, cmap=_HEAT, aspect="auto", vmin=0, vmax=vmax)
            ax.set_yticks(range(len(networks)), networks)
            for spine in ax.spines.values():
                spine.set_visible(False)
            ax.tick_params(length=0)
            for (i, j), v in np.ndenumerate(vals):
                if v > 0:
                    ax.text(j, i, fmt(v), ha="center", va="center", fontsize=7.5,
                            color="white" if v > 0.55 * vmax else INK)
            share = vals.sum(axis=0) / max(vals.sum(), 1e-12)
            ax.set_xticks(range(len(dayparts)), [f"{_wrap(d)}\n{s:.0%}" for d, s in zip(dayparts, share)],
                          rotation=0, fontsize=7.5)
            ax.set_title(title, loc="left")
        return _svg(fig)


def delivery_svg(draws: np.ndarray, guarantee: float, probability_of_shortfall: float | None = None) -> str:
    """Distribution of a deal's delivered impressions from the stress test.

    Parameters
    ----------
    draws : delivered impressions, one per Monte Carlo draw, shape (n_draws,).
    guarantee : impressions promised (the line); the shortfall side is shaded.
    probability_of_shortfall : shown in the label; computed from `draws` when None.
    """
    draws = np.asarray(draws, dtype=float)
    if probability_of_shortfall is None:
        probability_of_shortfall = float(np.mean(draws < guarantee))
    with matplotlib.rc_context(_RC):
        fig = _figure(6.4, 2.9)
        ax = fig.add_subplot()
        lo, hi = np.quantile(draws, [0.0005, 0.9995])
        lo, hi = min(lo, guarantee), max(hi, guarantee)
        pad = 0.04 * (hi - lo or 1.0)
        bins = np.linspace(lo - pad, hi + pad, 61)
        counts, edges = np.histogram(draws, bins=bins)
        _two_tone(ax, counts / max(counts.sum(), 1), edges, guarantee, BRICK, TEAL)
        ax.axvline(guarantee, color=INK, lw=1.5, ls="--")
        ax.annotate(f"guarantee\nshortfall chance {probability_of_shortfall:.1%}", (guarantee, 0.97),
                    xycoords=("data", "axes fraction"), xytext=(-6, 0), textcoords="offset points",
                    ha="right", va="top", fontsize=8.5, color=BRICK, bbox=_LABEL_BOX)
        ax.set_xlabel("delivered impressions")
        ax.set_ylabel("share of draws")
        ax.xaxis.set_major_formatter(SHORT)
        ax.yaxis.set_major_formatter(PercentFormatter(1.0, decimals=0))
        _style(ax)
        ax.set_title("Delivery in the stress test", loc="left")
        return _svg(fig)


#: title words of each liability basis (`planner.stress.LIABILITY_BASES`)
BASIS_TITLE = {"refund": "Refund liability (shortfall x price CPM)",
               "makegood": "Make-good liability (shortfall x plan cost per impression)"}


def liability_svg(draws: np.ndarray, var95: float, cvar95: float, currency: str, basis: str = "refund") -> str:
    """Distribution of the book's liability on its `basis` with VaR95 and CVaR95 marked.

    Parameters
    ----------
    draws : book liability per Monte Carlo draw, in `currency`, shape (n_draws,), >= 0.
    var95, cvar95 : the 95% value at risk and conditional value at risk (Rockafellar & Uryasev 2000).
    basis : "refund" or "makegood", named in the title.
    """
    draws = np.asarray(draws, dtype=float)
    zero_share = float(np.mean(draws <= 0))
    with matplotlib.rc_context(_RC):
        fig = _figure(9.6, 3.0)
        ax = fig.add_subplot()
        hi = max(float(np.quantile(draws, 0.999)), cvar95, var95, 1.0)
        bins = np.linspace(0, hi * 1.05, 61)
        counts, edges = np.histogram(np.clip(draws, 0, None), bins=bins)
        _two_tone(ax, counts / max(counts.sum(), 1), edges, var95, TEAL, BRICK)
        if zero_share > 0.2:  # a tall spike at zero would flatten the rest: show it on a log scale
            ax.set_yscale("log")
        ax.axvline(var95, color=INK, lw=1.4, ls="--")
        ax.axvline(cvar95, color=BRICK, lw=1.4, ls="-")
        ax.annotate(f"VaR95 {_short(var95)}", (var95, 0.97), xycoords=("data", "axes fraction"),
                    xytext=(4, 0), textcoords="offset points", ha="left", va="top", fontsize=8.5, color=INK,
                    bbox=_LABEL_BOX)
        ax.annotate(f"CVaR95 {_short(cvar95)}", (cvar95, 0.80), xycoords=("data", "axes fraction"),
                    xytext=(4, 0), textcoords="offset points", ha="left", va="top", fontsize=8.5, color=BRICK,
                    bbox=_LABEL_BOX)
        ax.set_xlabel(f"book liability ({currency})")
        ax.set_ylabel("share of draws")
        ax.xaxis.set_major_formatter(SHORT)
        ax.yaxis.set_major_formatter(FuncFormatter(_share))
        _style(ax)
        ax.set_title(f"{BASIS_TITLE.get(basis, basis)} of the book (none in {zero_share:.0%} of draws)", loc="left")
        return _svg(fig)


def forecast_band_svg(history: pd.DataFrame, forecast: pd.DataFrame, title: str) -> str:
    """One unit's history against its forecast band.

    Parameters
    ----------
    history : DataFrame ``week_start`` (date), ``impressions`` (mean impressions of one spot that week).
    forecast : DataFrame ``week_start``, ``mean_impressions``, ``q10_impressions``, ``q90_impressions``
        (one spot, impressions).
    """
    with matplotlib.rc_context(_RC):
        fig = _figure(4.6, 2.7, left=0.6, bottom=0.75, top=0.3)
        ax = fig.add_subplot()
        h = history.sort_values("week_start").tail(78)  # the last year and a half is enough context
        f = forecast.sort_values("week_start")
        hx = pd.to_datetime(h["week_start"])
        fx = pd.to_datetime(f["week_start"])
        ax.plot(hx, h["impressions"], color=MUTED, lw=1.1, label="history (weekly mean)")
        ax.fill_between(fx, f["q10_impressions"], f["q90_impressions"], color=AMBER, alpha=0.3, lw=0,
                        label="forecast 10-90%")
        ax.plot(fx, f["mean_impressions"], color=AMBER, lw=1.8, label="forecast mean")
        ax.set_ylabel("impressions per spot")
        ax.yaxis.set_major_formatter(SHORT)
        ax.set_ylim(bottom=0)
        _style(ax)
        for label in ax.get_xticklabels():
            label.set_rotation(0)
        ax.xaxis.set_major_locator(mdates.MonthLocator(bymonth=(1, 4, 7, 10)))
        ax.xaxis.set_major_formatter(mdates.DateFormatter("%b %y"))
        fig.legend(loc="lower center", bbox_to_anchor=(0.5, 0.0), ncols=3, fontsize=7.5)
        ax.set_title(title, loc="left", fontsize=9.5)
        return _svg(fig)
