"""Make-good terms and the expected make-good (planner/terms.py) against outside references:
scipy.integrate.quad over the normal density, the published table of the standard normal loss
function, and hand-worked cases."""
from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import integrate, stats

from planner import terms as tm
from planner import workflows as wf
from planner.cli import main
from planner.terms import Terms


def _quad_owed(mean, sd, guarantee, terms):
    """E[owed(D)], D ~ normal(mean, sd), by scipy.integrate.quad of the contract's owed amount
    written here (not the code's): nothing at or above threshold x G, else min(G - D, cap x G)."""
    g, t, c = guarantee, terms.threshold, terms.cap

    def f(d):
        return (min(g - d, c * g) if d < t * g else 0.0) * stats.norm.pdf(d, mean, sd)

    lo, hi = mean - 12 * sd, min(t * g, mean + 12 * sd)
    if hi <= lo:
        return 0.0
    # break points where the integrand changes form, so quad sees smooth pieces
    pts = sorted({p for p in ((1 - c) * g, t * g) if lo < p < hi})
    val, _ = integrate.quad(f, lo, hi, points=pts or None, limit=200, epsabs=1e-10, epsrel=1e-10)
    return val


def test_normal_loss_matches_the_published_table_and_quad():
    """Fault caught: a wrong loss function (sign, or 1 - Phi swapped for Phi).

    Values of G_u(k), Silver, Pyke & Thomas, Inventory and Production Management in Supply
    Chains, table of the unit normal loss function (from memory, 4 decimals): G(0) = 0.3989,
    G(0.5) = 0.1978, G(1) = 0.0833, G(2) = 0.0085; and G(k) = integral of (z - k) phi(z) over z > k
    by scipy.integrate.quad at other k."""
    for k, table in ((0.0, 0.3989), (0.5, 0.1978), (1.0, 0.0833), (2.0, 0.0085)):
        assert float(tm.normal_loss(k)) == pytest.approx(table, abs=6e-5)
    for k in (-2.0, -0.7, 0.3, 1.6, 3.0):
        ref, _ = integrate.quad(lambda z: (z - k) * stats.norm.pdf(z), k, np.inf)
        assert float(tm.normal_loss(k)) == pytest.approx(ref, rel=1e-8, abs=1e-12)


CASES = [  # (mean, sd, guarantee, terms) in impressions
    (1.05e6, 8.0e4, 1.0e6, Terms()),                                    # any shortfall, no cap
    (1.00e6, 1.0e5, 1.0e6, Terms(threshold=0.9)),                       # owed only below 90%
    (0.85e6, 1.5e5, 1.0e6, Terms(threshold=0.9, cap=0.2)),              # cap binds below 80%
    (0.70e6, 2.0e5, 1.0e6, Terms(threshold=0.95, cap=0.02)),            # cap under the gap: always the cap
    (1.20e6, 5.0e4, 1.0e6, Terms(threshold=0.9, cap=0.5)),              # far above: next to nothing
    (0.30e6, 4.0e5, 1.0e6, Terms(cap=0.9)),                             # a negative tail, capped
]


@pytest.mark.parametrize("mean,sd,guarantee,terms", CASES)
def test_expected_owed_closed_form_matches_quad(mean, sd, guarantee, terms):
    """Fault caught: any slip in the closed form (threshold, cap, the phi terms, a wrong sign).
    Reference library: scipy.integrate.quad of the contract's owed amount times the normal density."""
    ref = _quad_owed(mean, sd, guarantee, terms)
    assert tm.expected_owed(mean, sd, guarantee, terms) == pytest.approx(ref, rel=1e-7, abs=1e-6)


def test_with_no_threshold_and_no_cap_it_is_sigma_times_the_loss_function():
    """The issue's reference form: E[(G - D)^+] = sigma L((mu - G) / sigma) (Silver, Pyke & Thomas),
    less the negative-delivery part sigma L(mu / sigma), here about 1e-40 of it."""
    mean, sd, g = 1.02e6, 6.0e4, 1.0e6
    assert tm.expected_owed(mean, sd, g, Terms()) == pytest.approx(sd * float(tm.normal_loss((mean - g) / sd)),
                                                                   rel=1e-9)


def test_delivery_exactly_at_the_threshold_owes_nothing_and_the_cap_holds():
    """Faults caught: `<=` for `<` at the threshold, only the part below the threshold owed, a cap
    not applied or applied to the threshold. Hand-worked: G = 1,000,000, threshold 0.9, cap 0.25."""
    t = Terms(threshold=0.9, cap=0.25)
    g = 1_000_000.0
    d = np.array([1_000_000.0, 900_000.0, 899_999.0, 800_000.0, 750_000.0, 400_000.0, 0.0])
    assert tm.owed(d, g, t).tolist() == [0.0, 0.0, 100_001.0, 200_000.0, 250_000.0, 250_000.0, 250_000.0]
    # a plan with no spread delivering exactly the threshold owes nothing; 1 impression less owes the lot
    assert tm.expected_owed(900_000.0, 0.0, g, t) == 0.0
    assert tm.expected_owed(899_999.0, 0.0, g, t) == 100_001.0
    # the expectation never exceeds the cap, however bad the plan (quad agrees in CASES)
    assert tm.expected_owed(1.0e5, 1.0e5, g, t) <= 0.25 * g + 1e-6


def test_makegood_cost_margin_and_net_cpm_hand_worked():
    """Faults caught: ADUs valued at the CPM or cash at the plan's cost, 'both' not the dearer, the
    margin not net of the make-good, the net CPM ignoring that cash grows with the price.

    Hand-worked (sd 0, so owed is exact): G = 100,000, the plan delivers 85,000 for cost 850
    (0.01 per delivered impression), threshold 0.9, so 15,000 owed; price CPM 20, revenue 2,000.
    Units: 15,000 x 0.01 = 150, margin net 2,000 - 850 - 150 = 1,000. Cash: 15,000 x 0.020 = 300,
    net 850. Both: the dearer, 300. Target margin 20%: units CPM = 1000 (850 + 150) / 80,000 =
    12.50; cash CPM = 1000 x 850 / (80,000 - 15,000) = 13.0769...; both 13.0769..."""
    common = dict(mean=85_000.0, sd=0.0, guarantee=100_000.0, cost=850.0, revenue=2_000.0, price_cpm=20.0,
                  target_margin=0.2)
    units = tm.makegood_summary(terms=Terms(settlement="units", threshold=0.9), **common)
    cash = tm.makegood_summary(terms=Terms(settlement="cash", threshold=0.9), **common)
    both = tm.makegood_summary(terms=Terms(settlement="both", threshold=0.9), **common)
    assert units["expected_shortfall_impressions"] == pytest.approx(15_000.0)
    assert units["expected_makegood_cost"] == pytest.approx(150.0)
    assert units["margin_net_of_makegoods"] == pytest.approx(1_000.0)
    assert units["cpm_needed_net_of_makegoods"] == pytest.approx(12.5)
    assert cash["expected_makegood_cost"] == pytest.approx(300.0)
    assert cash["margin_net_of_makegoods"] == pytest.approx(850.0)
    assert cash["cpm_needed_net_of_makegoods"] == pytest.approx(850_000.0 / 65_000.0)
    assert both["expected_makegood_cost"] == pytest.approx(300.0)
    assert both["cpm_needed_net_of_makegoods"] == pytest.approx(850_000.0 / 65_000.0)
    # cash owed beyond what any price can carry: no CPM reaches the target
    huge = tm.makegood_summary(**{**common, "mean": 10_000.0, "target_margin": 0.2},
                               terms=Terms(settlement="cash"))
    assert huge["cpm_needed_net_of_makegoods"] is None


def test_check_and_plan_report_the_expected_makegood(small_fitted, fitted_copy, capsys, tmp_path):
    """Faults caught: check/plan not using the deal's terms or the plan's own delivery law, JSON keys
    renamed, the margin not net of the make-good. Reference: quad over the normal law of the
    reported expected delivery and sd (scipy.integrate), valued by hand at the reported cost per
    expected impression (ADUs)."""
    folder = fitted_copy(small_fitted, tmp_path / "s")
    deal = "small-comfortable"
    text = (folder / "deals" / "comfortable.toml").read_text()
    (folder / "deals" / "comfortable.toml").write_text(text + '\n[terms]\nsettlement = "units"\nthreshold = 0.97\n')
    assert main(["check", str(folder), deal, "--json", "--solver", "highs", "--target-margin", "0.2"]) == 0
    r = json.loads(capsys.readouterr().out)
    assert r["deliverable"]
    terms = Terms(settlement="units", threshold=0.97)
    assert r["makegood_terms"] == terms.as_dict()
    assert r["expected_shortfall_impressions"] > 1e-3 * r["guarantee"]  # not a vacuous zero
    ref = _quad_owed(r["expected_impressions"], r["sd_impressions"], r["guarantee"], terms)
    assert r["expected_shortfall_impressions"] == pytest.approx(ref, rel=1e-6, abs=1e-3)
    cost_mg = ref * r["cost"] / r["expected_impressions"]
    assert r["expected_makegood_cost"] == pytest.approx(cost_mg, rel=1e-6, abs=1e-6)
    assert r["margin_net_of_makegoods"] == pytest.approx(r["revenue"] - r["cost"] - cost_mg, rel=1e-9, abs=1e-6)
    room = r["guarantee"] * 0.8
    assert r["cpm_needed_net_of_makegoods"] == pytest.approx(1000 * (r["cost"] + cost_mg) / room, rel=1e-6)
    assert main(["plan", str(folder), deal, "--json", "--solver", "highs", "--out", str(folder / "p.csv")]) == 0
    p = json.loads(capsys.readouterr().out)
    for k in ("expected_shortfall_impressions", "expected_makegood_cost", "margin_net_of_makegoods"):
        assert p[k] == pytest.approx(r[k], rel=1e-9) and p["totals"][k] == p[k]
    assert p["cost_sd"] > 0
    # the answer in words carries the same figures
    assert main(["check", str(folder), deal, "--solver", "highs"]) == 0
    out = capsys.readouterr().out
    assert "expected make-good cost" in out and "margin net of make-goods" in out
    assert f"{r['expected_makegood_cost']:,.0f}" in out and "owed below 97% of the guarantee" in out


def test_the_report_values_a_booked_deal_on_its_committed_terms():
    """Fault caught: the report's make-good of a booked deal not from its held plan and committed
    terms. Reference: quad over the held plan's normal law (scipy.integrate), cash at the CPM."""
    from types import SimpleNamespace

    from planner.report import book_verdict

    terms = Terms(settlement="cash", threshold=0.95, cap=0.3)
    booked = SimpleNamespace(cost=9_000.0, revenue=12_000.0, guarantee=1.0e6, price_cpm=12.0,
                             expected_impressions=1.01e6, sd=6.0e4, probability=0.6, confidence=None, pad=0.01,
                             spots=100, first_week=1, last_week=4, demo="hh", committed_at="x",
                             terms={"terms": terms.as_dict()})
    v = book_verdict(booked)
    ref = _quad_owed(1.01e6, 6.0e4, 1.0e6, terms)
    assert v["expected_shortfall_impressions"] == pytest.approx(ref, rel=1e-7)
    assert v["expected_makegood_cost"] == pytest.approx(ref * 12.0 / 1000, rel=1e-7)
    assert v["margin_net_of_makegoods"] == pytest.approx(12_000.0 - 9_000.0 - ref * 0.012, rel=1e-9)


def test_an_undeliverable_deal_has_no_makegood_figures(small_fitted, fitted_copy, tmp_path):
    """Fault caught: make-good figures invented for a deal with no plan."""
    folder = fitted_copy(small_fitted, tmp_path / "s")
    r = wf.check_deal(wf.open_scenario(folder), "small-too-big", solver="highs")
    assert not r.deliverable
    assert r.expected_shortfall_impressions is None and r.expected_makegood_cost is None
    assert r.margin_net_of_makegoods is None
