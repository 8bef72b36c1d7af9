"""The SQLite book: schema versions, commit/list/show/release, check-and-hold under concurrency,
a commit killed mid-way. Small synthetic scenarios built in memory (invented data)."""
from __future__ import annotations

import contextlib
import json
import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest

from planner import book as bk
from planner.errors import InputError
from planner import workflows as wf

PY = sys.executable
TESTS = Path(__file__).resolve().parent
ROOT = TESTS.parent
UNIT = ["zone", "network", "daypart", "week"]


# --------------------------------------------------------------------------- synthetic scenario

def make_synthetic(folder, *, seed=0, zones=3, networks=3, dayparts=("prime", "day"), weeks=8,
                   avails=(3, 9), preempt=0.03, deals=None):
    """An invented in-memory scenario (inventory, deals) and a forecast table with the
    contract's columns (DEVELOPERS.md); returns (scenario, forecast)."""
    from planner.scenario import Deal, Mix

    rng = np.random.default_rng(seed)
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    zs = [f"z{i + 1}" for i in range(zones)]
    ns = [f"net{i + 1}" for i in range(networks)]
    idx = pd.MultiIndex.from_product([zs, ns, list(dayparts), range(1, weeks + 1)], names=UNIT)
    inv = idx.to_frame(index=False)
    inv["week"] = inv["week"].astype("int64")
    inv["avails"] = rng.integers(avails[0], avails[1] + 1, len(inv)).astype("int64")
    inv["rate"] = np.round(rng.uniform(40, 300, len(inv)), 2)
    inv["preempt_rate"] = preempt
    flight_mu = {k: rng.uniform(2_000, 20_000) for k in
                 pd.MultiIndex.from_product([zs, ns, list(dayparts)])}
    mu = np.array([flight_mu[(z, n, d)] for z, n, d in zip(inv.zone, inv.network, inv.daypart)])
    mu = mu * rng.uniform(0.9, 1.1, len(inv))
    fc = inv[UNIT].copy()
    fc["demo"] = "a25-54"
    fc["universe"] = 500_000.0
    fc["mean_impressions"] = mu
    fc["mean_rating"] = mu / 500_000.0
    fc["airing_sd"] = 0.35 * mu
    fc["level_sd_network"] = 0.08 * mu
    fc["level_sd_flight"] = 0.06 * mu
    fc["level_sd_week"] = 0.04 * mu
    fc["level_sd"] = np.sqrt(0.08 ** 2 + 0.06 ** 2 + 0.04 ** 2) * mu
    fc["q10_impressions"] = np.maximum(mu - 1.2816 * 0.37 * mu, 0)
    fc["q90_impressions"] = mu + 1.2816 * 0.37 * mu
    fc["history_weeks"] = 60
    capacity = float((inv["avails"] * (1 - preempt) * mu).sum())
    scn = SimpleNamespace(path=folder, name="synthetic (invented)", currency="USD", weeks=weeks,
                          inventory=inv, deals={}, dayparts=[SimpleNamespace(name=d) for d in dayparts],
                          capacity=capacity)
    for name, share, conf, price in (deals or [("alpha", 0.15, 0.95, 22.0), ("beta", 0.15, 0.90, 18.0)]):
        scn.deals[name] = Deal(name=name, advertiser="Invented Advertiser", demo="a25-54",
                               impressions=round(share * capacity), first_week=1, last_week=weeks,
                               price_cpm=price, confidence=conf, pad=None, mix=Mix(), path=folder / f"{name}.toml")
    return scn, fc


def synthetic_forecast(scenario, capacity=15e6, seed=0):
    """An invented forecast table (contract columns) for a loaded scenario: per demo, ratings
    scaled so the whole inventory delivers about `capacity` impressions in expectation."""
    rng = np.random.default_rng(seed)
    inv = scenario.inventory
    parts = []
    for demo in scenario.demos:
        fc = inv[UNIT + ["avails", "preempt_rate"]].copy()
        fc["demo"] = demo
        uni = scenario.universes[scenario.universes["demo"] == demo].set_index("zone")["universe"]
        fc["universe"] = fc["zone"].map(uni).astype(float)
        shape = rng.uniform(0.5, 1.5, len(fc)) * np.where(fc["daypart"] == "prime", 3.0, 1.0)
        scale = capacity / float((fc["avails"] * (1 - fc["preempt_rate"]) * fc["universe"] * shape).sum())
        fc["mean_rating"] = shape * scale
        mu = fc["mean_rating"] * fc["universe"]
        fc["mean_impressions"] = mu
        fc["airing_sd"] = 0.3 * mu
        fc["level_sd_network"] = 0.06 * mu
        fc["level_sd_flight"] = 0.05 * mu
        fc["level_sd_week"] = 0.04 * mu
        fc["level_sd"] = np.sqrt(0.06 ** 2 + 0.05 ** 2 + 0.04 ** 2) * mu
        fc["q10_impressions"] = np.maximum(mu - 1.2816 * 0.33 * mu, 0)
        fc["q90_impressions"] = mu + 1.2816 * 0.33 * mu
        fc["history_weeks"] = 60
        parts.append(fc.drop(columns=["avails", "preempt_rate"]))
    return pd.concat(parts, ignore_index=True)


def use_forecast(monkeypatch, table):
    """Make `planner.forecast_job.ensure_forecast` return `table` (no fitting in this test)."""
    import importlib
    import types

    try:
        mod = importlib.import_module("planner.forecast_job")
    except ModuleNotFoundError:
        mod = types.ModuleType("planner.forecast_job")
        monkeypatch.setitem(sys.modules, "planner.forecast_job", mod)
    monkeypatch.setattr(mod, "ensure_forecast",
                        lambda scenario, **kw: SimpleNamespace(table=table, fitted_now=False), raising=False)


def greedy_planner(need_spots, units=None, sleep=0.0):
    """A planner for commit_deal: `need_spots` whole spots from the units with avails left
    (first in key order, optionally only `units`); respects `held`."""

    def _plan(scenario, deal_name, *, held, **_kw):
        inv = scenario.inventory
        if units is not None:
            inv = inv.merge(units, on=UNIT)
        left = inv[UNIT + ["avails", "rate"]].merge(held, on=UNIT, how="left")
        left["left"] = left["avails"] - left["spots"].fillna(0).astype("int64")
        left = left[left["left"] > 0].sort_values(UNIT)
        take = np.minimum(left["left"].to_numpy(), np.maximum(need_spots - np.concatenate(
            [[0], np.cumsum(left["left"].to_numpy())[:-1]]), 0))
        left["spots"] = take
        spots = left[left["spots"] > 0][UNIT + ["spots", "rate"]].copy()
        spots["cost"] = spots["spots"] * spots["rate"]
        spots["expected_impressions"] = spots["spots"] * 1000.0
        if sleep:
            time.sleep(sleep)
        ok = int(spots["spots"].sum()) >= need_spots
        return SimpleNamespace(deliverable=ok, spots=spots, cost=float(spots["cost"].sum()),
                               expected_impressions=float(spots["expected_impressions"].sum()),
                               probability=0.95 if ok else 0.0, reason=None if ok else "not enough avails left")

    return _plan


def _scarce_units():
    return pd.DataFrame({"zone": ["z1", "z1", "z2"], "network": ["net1"] * 3, "daypart": ["prime"] * 3,
                         "week": [1, 2, 1]})


# --------------------------------------------------------------------------- schema

def test_new_book_has_current_schema_and_wal(tmp_path):
    path = tmp_path / "book.sqlite"
    conn = bk.open_book(path)
    assert conn.execute("PRAGMA journal_mode").fetchone()[0].lower() == "wal"
    versions = [r[0] for r in conn.execute("SELECT version FROM schema_version ORDER BY version")]
    assert versions == [v for v, _ in bk._MIGRATIONS] and versions[-1] == bk.SCHEMA_VERSION
    tables = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type='table'")}
    assert {"deals", "holds", "events", "postings", "schema_version"} <= tables
    conn.close()


def test_version_1_book_is_upgraded_on_open_and_keeps_its_deals(tmp_path):
    path = tmp_path / "old.sqlite"
    conn = sqlite3.connect(path)
    conn.execute("CREATE TABLE schema_version (version INTEGER NOT NULL, applied_at TEXT NOT NULL)")
    for sql in bk._MIGRATIONS[0][1]:
        conn.execute(sql)
    conn.execute("INSERT INTO schema_version VALUES (1, 'then')")
    conn.execute("INSERT INTO deals (name, demo, guarantee, price_cpm, first_week, last_week, committed_at, spots) "
                 "VALUES ('old', 'a25-54', 1e6, 20, 1, 4, 'then', 3)")
    conn.execute("INSERT INTO holds (deal, zone, network, daypart, week, spots) VALUES ('old','z1','net1','prime',1,3)")
    conn.commit()
    conn.close()
    deals = bk.list_deals(tmp_path, path)
    assert [d.name for d in deals] == ["old"]
    assert bk.held_spots(tmp_path, path)["spots"].tolist() == [3]
    conn = bk.open_book(path)
    assert bk._schema_version(conn) == bk.SCHEMA_VERSION
    assert "scenario_name" in [r[1] for r in conn.execute("PRAGMA table_info(deals)")]
    conn.close()


def test_version_2_book_gains_the_postings_table_with_cascade(tmp_path):
    path = tmp_path / "v2.sqlite"
    conn = sqlite3.connect(path)
    conn.execute("CREATE TABLE schema_version (version INTEGER NOT NULL, applied_at TEXT NOT NULL)")
    for version, statements in bk._MIGRATIONS[:2]:
        for sql in statements:
            conn.execute(sql)
        conn.execute("INSERT INTO schema_version VALUES (?, 'then')", (version,))
    conn.execute("INSERT INTO deals (name, demo, guarantee, price_cpm, first_week, last_week, committed_at, spots) "
                 "VALUES ('old', 'a25-54', 1e6, 20, 1, 4, 'then', 3)")
    conn.commit()
    conn.close()
    assert bk.read_postings(tmp_path, path).empty  # reading upgrades it
    conn = bk.open_book(path)
    assert bk._schema_version(conn) == bk.SCHEMA_VERSION
    fks = conn.execute("PRAGMA foreign_key_list(postings)").fetchall()
    assert [(r["table"], r["from"], r["to"], r["on_delete"]) for r in fks] == [("deals", "deal", "name", "CASCADE")]
    conn.close()
    assert [d.name for d in bk.list_deals(tmp_path, path)] == ["old"]


def test_replace_holds_stores_postings_and_refuses_bad_ones(tmp_path):
    scn, _ = make_synthetic(tmp_path / "s")
    wf.commit_deal(scn, "alpha", planner=greedy_planner(3))
    holds = bk.get_deal(scn, "alpha").holds
    posted = holds[UNIT].assign(spots_aired=holds["spots"], impressions=1000.0 * holds["spots"])
    bad = posted.assign(impressions=-1.0)
    with pytest.raises(InputError, match="negative"):
        bk.replace_holds(scn, "alpha", holds, {"note": "x"}, postings=bad)
    with pytest.raises(InputError, match="lack column"):
        bk.replace_holds(scn, "alpha", holds, {"note": "x"}, postings=posted.drop(columns="impressions"))
    assert bk.read_postings(scn).empty and bk.events(scn)["action"].tolist() == ["commit"]
    bk.replace_holds(scn, "alpha", holds, {"note": "x"}, postings=posted)
    got = bk.get_deal(scn, "alpha").postings
    assert got["spots_aired"].sum() == holds["spots"].sum() and got["impressions"].sum() == 1000.0 * holds["spots"].sum()
    bk.replace_holds(scn, "alpha", holds, {"note": "x"}, postings=posted.iloc[:1])  # replaced, not added
    assert len(bk.read_postings(scn, deal="alpha")) == 1
    bk.replace_holds(scn, "alpha", holds, {"note": "x"})  # no postings given: kept
    assert len(bk.read_postings(scn, deal="alpha")) == 1


def test_newer_schema_is_refused(tmp_path):
    path = tmp_path / "new.sqlite"
    bk.open_book(path).close()
    conn = sqlite3.connect(path)
    conn.execute("INSERT INTO schema_version VALUES (99, 'future')")
    conn.commit()
    conn.close()
    with pytest.raises(InputError, match="newer"):
        bk.open_book(path)


def test_reading_a_missing_book_is_empty_and_creates_nothing(tmp_path):
    assert bk.held_spots(tmp_path).empty
    assert bk.list_deals(tmp_path) == []
    assert not (tmp_path / "book.sqlite").exists()
    with pytest.raises(InputError, match="not in the book"):
        bk.get_deal(tmp_path, "nope")


def test_not_a_database_is_input_error(tmp_path):
    bad = tmp_path / "book.sqlite"
    bad.write_text("this is not sqlite " * 100)
    with pytest.raises(InputError, match="not a readable book"):
        bk.held_spots(tmp_path)


# --------------------------------------------------------------------------- commit, list, show, release

def test_commit_list_show_release_roundtrip(tmp_path):
    scn, _ = make_synthetic(tmp_path / "s")
    plan = greedy_planner(10)
    r = wf.commit_deal(scn, "alpha", planner=plan)
    assert r.committed and r.summary["spots"] == 10
    r2 = wf.commit_deal(scn, "beta", planner=plan)
    assert r2.committed
    deals = bk.list_deals(scn)
    assert [d.name for d in deals] == ["alpha", "beta"]
    a = bk.get_deal(scn, "alpha")
    assert int(a.holds["spots"].sum()) == 10 and a.guarantee == scn.deals["alpha"].impressions
    held = bk.held_spots(scn)
    assert int(held["spots"].sum()) == 20
    assert list(held.columns) == ["zone", "network", "daypart", "week", "spots"]
    assert int(bk.held_spots(scn, exclude="alpha")["spots"].sum()) == 10
    # the second deal was planned against the first one's holds: never over avails
    assert bk.check_book(scn)["over_avails"] == 0
    with pytest.raises(InputError, match="already in the book"):
        wf.commit_deal(scn, "alpha", planner=plan)
    removed = bk.release_deal(scn, "alpha")
    assert removed.spots == 10
    assert [d.name for d in bk.list_deals(scn)] == ["beta"]
    assert int(bk.held_spots(scn)["spots"].sum()) == 10
    with pytest.raises(InputError, match="not in the book"):
        bk.release_deal(scn, "alpha")
    log = bk.events(scn)
    assert log["action"].tolist() == ["commit", "commit", "release"]


def test_unknown_deal_is_input_error(tmp_path):
    scn, _ = make_synthetic(tmp_path / "s")
    with pytest.raises(InputError, match="no deal named"):
        wf.commit_deal(scn, "gamma", planner=greedy_planner(1))


def test_undeliverable_deal_is_not_committed(tmp_path):
    scn, _ = make_synthetic(tmp_path / "s")
    total = int(scn.inventory["avails"].sum())
    r = wf.commit_deal(scn, "alpha", planner=greedy_planner(total + 1))
    assert not r.committed and "not enough" in r.reason
    assert bk.list_deals(scn) == [] and bk.held_spots(scn).empty


def test_book_option_points_elsewhere(tmp_path):
    scn, _ = make_synthetic(tmp_path / "s")
    other = tmp_path / "elsewhere" / "desk.sqlite"
    wf.commit_deal(scn, "alpha", other, planner=greedy_planner(4))
    assert other.exists() and not (scn.path / "book.sqlite").exists()
    assert [d.name for d in bk.list_deals(scn, other)] == ["alpha"]


def test_stale_plan_is_replanned_under_the_lock(tmp_path):
    """Another desk commits between our plan and our write: the check inside the transaction sees
    it and re-plans against the fresh holds, so no unit is over-held."""
    scn, _ = make_synthetic(tmp_path / "s", avails=(2, 2))
    scarce = _scarce_units()  # 3 units x 2 avails = 6 spots
    inner = greedy_planner(4, scarce)
    calls = {"n": 0}

    def racing_planner(scenario, deal_name, *, held, **kw):
        plan = inner(scenario, deal_name, held=held)
        calls["n"] += 1
        if calls["n"] == 1:  # the other desk commits right after our (now stale) plan
            assert wf.commit_deal(scenario, "beta", planner=greedy_planner(4, scarce)).committed
        return plan

    r = wf.commit_deal(scn, "alpha", planner=racing_planner)
    assert calls["n"] == 2  # planned again inside the transaction
    assert not r.committed and "another desk" in r.reason  # only 2 spots left of the 6
    assert bk.check_book(scn)["over_avails"] == 0
    assert [d.name for d in bk.list_deals(scn)] == ["beta"]
    # a smaller deal still fits after re-planning under the lock
    calls["n"] = 0
    bk.release_deal(scn, "beta")
    inner = greedy_planner(2, scarce)
    r = wf.commit_deal(scn, "alpha", planner=racing_planner)
    assert r.committed and r.replanned
    assert bk.check_book(scn)["over_avails"] == 0


def test_commit_with_the_real_allocator_respects_holds(tmp_path):
    from planner.workflows import plan_for_commit

    scn, fc = make_synthetic(tmp_path / "s", avails=(1, 3),
                             deals=[("alpha", 0.30, 0.95, 22.0), ("beta", 0.30, 0.95, 20.0), ("gamma", 0.30, 0.9, 20.0)])
    planner = plan_for_commit(fc, solver="highs")
    results = [wf.commit_deal(scn, n, planner=planner) for n in ("alpha", "beta", "gamma")]
    assert results[0].committed and results[1].committed
    assert not results[2].committed  # 90% of capacity at 95%+ confidence cannot all fit
    assert bk.check_book(scn)["over_avails"] == 0
    for r in results[:2]:
        assert r.summary["probability"] >= 0.95 - 1e-6


# --------------------------------------------------------------------------- concurrency

def _race_worker(folder: str, worker: int, n_deals: int, need: int, sleep: float) -> None:
    """Run in a subprocess: commit `n_deals` deals that compete for the same scarce units."""
    from planner.scenario import Deal, Mix

    scn, _ = make_synthetic(folder, avails=(2, 2))
    names = [f"w{worker}-{i}" for i in range(n_deals)]
    for n in names:
        scn.deals[n] = Deal(name=n, advertiser="Invented", demo="a25-54", impressions=1000.0 * need,
                            first_week=1, last_week=2, price_cpm=20.0, confidence=0.95, pad=None,
                            mix=Mix(), path=Path(folder) / f"{n}.toml")
    plan = greedy_planner(need, _scarce_units(), sleep=sleep)
    for n in names:
        r = wf.commit_deal(scn, n, planner=plan)
        print(json.dumps({"deal": n, "committed": r.committed, "replanned": r.replanned,
                          "spots": r.summary.get("spots")}), flush=True)


def _run_worker_cmd(folder, worker, n_deals, need, sleep):
    code = (f"import sys; sys.path.insert(0, {str(TESTS)!r}); import test_book as t; "
            f"t._race_worker({str(folder)!r}, {worker}, {n_deals}, {need}, {sleep})")
    return [PY, "-c", code]


def test_racing_processes_never_overhold(tmp_path):
    """3 processes x 10 rounds commit deals of 2 spots competing for 6 scarce spots (3 units x 2
    avails): exactly 3 deals fit; every deal reported committed is in the book, holds <= avails."""
    folder = tmp_path / "race"
    folder.mkdir()
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    procs = [subprocess.Popen(_run_worker_cmd(folder, w, 10, 2, 0.02), stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True, env=env, cwd=ROOT) for w in range(3)]
    reported = []
    for p in procs:
        out, err = p.communicate(timeout=240)
        assert p.returncode == 0, err
        reported += [json.loads(line) for line in out.splitlines() if line.startswith("{")]
    assert len(reported) == 30
    committed = {r["deal"] for r in reported if r["committed"]}
    scn, _ = make_synthetic(folder, avails=(2, 2))
    in_book = {d.name for d in bk.list_deals(scn)}
    assert committed == in_book
    assert len(in_book) == 3  # 6 scarce spots / 2 per deal: no more, and none lost
    held = bk.held_spots(scn)
    assert int(held["spots"].sum()) == 6
    assert bk.check_book(scn)["over_avails"] == 0
    assert bk.check_book(scn)["spot_count_mismatch"] == 0


def _locked(path: Path) -> bool:
    conn = sqlite3.connect(path, timeout=0, isolation_level=None)
    try:
        conn.execute("BEGIN IMMEDIATE")
        conn.execute("ROLLBACK")
        return False
    except sqlite3.OperationalError:
        return True
    finally:
        conn.close()


def test_commit_killed_midway_leaves_the_book_as_before(tmp_path):
    folder = tmp_path / "kill"
    scn, _ = make_synthetic(folder, avails=(2, 2))
    wf.commit_deal(scn, "alpha", planner=greedy_planner(2, _scarce_units()))
    before = bk.held_spots(scn)
    code = (f"import sys; sys.path.insert(0, {str(TESTS)!r}); import test_book as t; "
            f"from planner import workflows as wf; scn, _ = t.make_synthetic({str(folder)!r}, avails=(2, 2)); "
            f"wf.commit_deal(scn, 'beta', planner=t.greedy_planner(3, t._scarce_units()))")
    env = {**os.environ, "PYTHONPATH": str(ROOT), bk._SLEEP_ENV: "300"}
    p = subprocess.Popen([PY, "-c", code], env=env, cwd=ROOT, stderr=subprocess.PIPE)
    path = folder / "book.sqlite"
    deadline = time.time() + 180
    while not _locked(path):  # wait until the child holds the write lock, its rows written
        assert p.poll() is None and time.time() < deadline
        time.sleep(0.05)
    p.send_signal(signal.SIGKILL)
    p.wait(timeout=10)
    assert p.returncode == -signal.SIGKILL
    pd.testing.assert_frame_equal(bk.held_spots(scn), before)
    assert [d.name for d in bk.list_deals(scn)] == ["alpha"]
    chk = bk.check_book(scn)
    assert chk["integrity"] == "ok" and chk["orphan_holds"] == 0 and chk["spot_count_mismatch"] == 0
    # the book still works: the same commit now goes through
    assert wf.commit_deal(scn, "beta", planner=greedy_planner(3, _scarce_units())).committed
    assert int(bk.held_spots(scn)["spots"].sum()) == 5


def test_killed_after_commit_keeps_the_deal(tmp_path):
    folder = tmp_path / "kill2"
    make_synthetic(folder)
    code = (f"import sys, os, signal; sys.path.insert(0, {str(TESTS)!r}); import test_book as t; "
            f"from planner import workflows as wf; scn, _ = t.make_synthetic({str(folder)!r}); "
            f"wf.commit_deal(scn, 'alpha', planner=t.greedy_planner(5)); os.kill(os.getpid(), signal.SIGKILL)")
    p = subprocess.run([PY, "-c", code], env={**os.environ, "PYTHONPATH": str(ROOT)}, cwd=ROOT)
    assert p.returncode == -signal.SIGKILL
    scn, _ = make_synthetic(folder)
    assert [d.name for d in bk.list_deals(scn)] == ["alpha"]
    assert int(bk.held_spots(scn)["spots"].sum()) == 5


# --------------------------------------------------------------------------- command line

def _cli(capsys, *argv):
    from planner.cli import main

    code = main(list(argv))
    out = capsys.readouterr()
    return code, out.out, out.err


def test_cli_book_list_show_release(tmp_path, capsys):
    scn, _ = make_synthetic(tmp_path / "s")
    wf.commit_deal(scn, "alpha", planner=greedy_planner(6))
    code, out, _ = _cli(capsys, "book", "list", str(scn.path), "--json")
    assert code == 0
    listed = json.loads(out)
    assert [d["name"] for d in listed["deals"]] == ["alpha"] and listed["deals"][0]["spots"] == 6
    code, out, _ = _cli(capsys, "book", "show", str(scn.path), "alpha", "--json")
    assert code == 0 and sum(h["spots"] for h in json.loads(out)["holds"]) == 6
    code, out, _ = _cli(capsys, "book", "list", str(scn.path))
    assert code == 0 and "alpha" in out
    code, out, _ = _cli(capsys, "book", "show", str(scn.path), "alpha")
    assert code == 0 and "holds by week" in out
    code, _, err = _cli(capsys, "book", "show", str(scn.path), "nope")
    assert code == 2 and "not in the book" in err
    code, out, _ = _cli(capsys, "book", "release", str(scn.path), "alpha", "--json")
    assert code == 0 and json.loads(out) == {"released": "alpha", "spots_freed": 6, "warnings": []}
    code, out, _ = _cli(capsys, "book", "list", str(scn.path), "--json")
    assert json.loads(out)["deals"] == []
    code, _, err = _cli(capsys, "book", "list", str(tmp_path / "missing"))
    assert code == 2 and "not a scenario folder" in err


def test_cli_book_option(tmp_path, capsys):
    scn, _ = make_synthetic(tmp_path / "s")
    other = tmp_path / "desk.sqlite"
    wf.commit_deal(scn, "alpha", other, planner=greedy_planner(2))
    code, out, _ = _cli(capsys, "book", "list", str(scn.path), "--book", str(other), "--json")
    assert code == 0 and [d["name"] for d in json.loads(out)["deals"]] == ["alpha"]
    code, out, _ = _cli(capsys, "book", "list", str(scn.path), "--json")
    assert json.loads(out)["deals"] == []


def test_replace_holds_refuses_to_overhold(tmp_path):
    scn, _ = make_synthetic(tmp_path / "s", avails=(2, 2))
    scarce = _scarce_units()
    wf.commit_deal(scn, "alpha", planner=greedy_planner(2, scarce))
    wf.commit_deal(scn, "beta", planner=greedy_planner(2, scarce))
    before = bk.held_spots(scn)
    too_many = scarce.assign(spots=2)  # alpha would take all 6 scarce spots while beta holds 2
    with pytest.raises(InputError, match="exceed the avails"):
        bk.replace_holds(scn, "alpha", too_many, {"note": "test"})
    pd.testing.assert_frame_equal(bk.held_spots(scn), before)  # rolled back
    ok = scarce.iloc[[2]].assign(spots=2)  # z2: 2 spots where beta holds none
    bk.replace_holds(scn, "alpha", ok, {"note": "test"})
    assert bk.get_deal(scn, "alpha").spots == 2
    assert bk.check_book(scn) == {**bk.check_book(scn), "over_avails": 0, "spot_count_mismatch": 0}


def test_check_of_a_booked_deal_counts_its_own_holds_as_available(tmp_path):
    """Re-checking a committed deal competes only with the other deals' holds."""
    from planner.workflows import check_deal
    from planner.workflows import plan_for_commit

    scn, fc = make_synthetic(tmp_path / "s", avails=(1, 3), deals=[("alpha", 0.60, 0.95, 22.0)])
    before = check_deal(scn, "alpha", solver="highs", forecast=fc)
    assert wf.commit_deal(scn, "alpha", planner=plan_for_commit(fc, solver="highs")).committed
    after = check_deal(scn, "alpha", solver="highs", forecast=fc)
    assert after.deliverable and before.deliverable
    assert after.cost == pytest.approx(before.cost, rel=0.01)


def test_fast_hold_read_equals_sql_order_by(tmp_path):
    """The one-scan columnar read of holds gives exactly what a plain SELECT ... ORDER BY gives
    (SQLite's BINARY collation order), also when a name holds the separator (row-by-row path)."""
    path = tmp_path / "book.sqlite"
    conn = bk.open_book(path)
    rng = np.random.default_rng(3)
    deals = ["zeta", "Alpha", "beta\x1fodd"]
    conn.execute("BEGIN")  # one transaction: the autocommit connection would sync the file once per row
    for d in deals:
        conn.execute("INSERT INTO deals (name, demo, guarantee, price_cpm, first_week, last_week, committed_at) "
                     "VALUES (?, 'hh', 1, 1, 1, 2, '2026-01-01')", (d,))
    rows = {(d, f"z{rng.integers(0, 30)}", rng.choice(["Net-b", "net-a", "Ñet"]), rng.choice(["prime", "day"]),
             int(rng.integers(1, 14))) for d in deals for _ in range(400)}
    conn.executemany("INSERT INTO holds (deal, zone, network, daypart, week, spots) VALUES (?, ?, ?, ?, ?, ?)",
                     [(*r, int(rng.integers(1, 5))) for r in sorted(rows, key=lambda r: rng.random())])
    conn.execute("COMMIT")
    cols = ["deal", "zone", "network", "daypart", "week", "spots"]
    sql = "SELECT " + ", ".join(cols) + " FROM holds {} ORDER BY deal, week, zone, network, daypart"
    for deal in (None, "zeta", "beta\x1fodd"):
        where, args = ("", ()) if deal is None else ("WHERE deal = ?", (deal,))
        ref = pd.DataFrame([tuple(r) for r in conn.execute(sql.format(where), args)], columns=cols)
        got = bk._holds_of(conn, deal, columns=cols[1:])
        assert got[cols].astype({c: object for c in cols[:4]}).reset_index(drop=True).equals(
            ref.astype({c: object for c in cols[:4]}))
    assert bk._holds_columns(conn, cols, "", ()) is None  # the separator forces the row path
    conn.close()


# --------------------------------------------------------------------------- issue 19: a book that is what it says

def test_a_zero_byte_book_is_refused_not_read_as_empty(tmp_path, capsys):
    """QA finding: a 0-byte book file was taken for an empty book and a fresh schema written
    into it (every deal then looked easier). It is not a book: refused, exit 2, left as it was."""
    from planner.cli import main

    scn, _ = make_synthetic(tmp_path / "s")
    empty = scn.path / "book.sqlite"
    empty.write_bytes(b"")
    for call in (lambda: bk.held_spots(scn), lambda: bk.list_deals(scn), lambda: bk.check_book(scn),
                 lambda: wf.commit_deal(scn, "alpha", planner=greedy_planner(2))):
        with pytest.raises(InputError, match="not a book"):
            call()
    assert empty.stat().st_size == 0
    assert main(["book", "list", str(scn.path)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: ") and "not a book" in err and str(empty) in err
    assert empty.stat().st_size == 0


def test_a_new_book_appears_whole(tmp_path):
    """A new book is made beside its path and moved into place with its schema, so a concurrent
    reader never sees the 0-byte file SQLite would leave while creating it (now refused)."""
    path = tmp_path / "b" / "book.sqlite"
    bk.open_book(path).close()
    conn = sqlite3.connect(path)
    assert conn.execute("SELECT MAX(version) FROM schema_version").fetchone()[0] == bk.SCHEMA_VERSION
    conn.close()
    assert sorted(p.name for p in path.parent.iterdir() if not p.name.startswith("book.sqlite")) == []


@contextlib.contextmanager
def read_only(*folders):
    """Make `folders` read-only for the block: chmod a-w (or, for root, who ignores modes, the
    immutable attribute, chattr +i); skip the test when the platform allows neither."""
    done = []
    try:
        for f in folders:
            f = Path(f)
            if os.geteuid() != 0:
                os.chmod(f, 0o555)
                done.append(("chmod", f))
            elif subprocess.run(["chattr", "+i", str(f)], capture_output=True).returncode == 0:
                done.append(("chattr", f))
            else:
                pytest.skip("cannot make a folder read-only here (root without chattr)")
            probe = f / ".probe"
            try:
                probe.write_text("x")
            except OSError:
                continue
            probe.unlink()
            pytest.skip("the folder stayed writable")
        yield
    finally:
        for how, f in reversed(done):
            if how == "chmod":
                os.chmod(f, 0o755)
            else:
                subprocess.run(["chattr", "-i", str(f)], capture_output=True)


def test_a_read_only_folder_still_answers_reads(tmp_path):
    """QA finding: in a read-only scenario folder every read failed with "not a readable book
    (unable to open database file)" (WAL needs its index file beside the book). Reads now work
    from a read-only connection with the same answers; a write says the folder is read-only."""
    scn, _ = make_synthetic(tmp_path / "s")
    wf.commit_deal(scn, "alpha", planner=greedy_planner(5))
    before = (bk.held_spots(scn), [d.name for d in bk.list_deals(scn)], bk.get_deal(scn, "alpha").holds,
              bk.check_book(scn), bk.events(scn)[["deal", "action"]])
    listing = sorted(p.name for p in scn.path.iterdir())
    with read_only(scn.path):
        after = (bk.held_spots(scn), [d.name for d in bk.list_deals(scn)], bk.get_deal(scn, "alpha").holds,
                 bk.check_book(scn), bk.events(scn)[["deal", "action"]])
        pd.testing.assert_frame_equal(after[0], before[0])
        assert after[1] == before[1] and after[3] == before[3]
        pd.testing.assert_frame_equal(after[2], before[2])
        pd.testing.assert_frame_equal(after[4], before[4])
        with pytest.raises(InputError, match="read-only"):
            wf.commit_deal(scn, "beta", planner=greedy_planner(5))
        with pytest.raises(InputError, match="read-only"):
            bk.release_deal(scn, "alpha")
        assert sorted(p.name for p in scn.path.iterdir()) == listing
    assert [d.name for d in bk.list_deals(scn)] == ["alpha"]


def test_units_held_over_their_avails_are_flagged_everywhere_and_book_check_exits_3(
        small_scenario, scenario_copy, monkeypatch, capsys):
    """QA finding: avails cut below existing holds: validate said valid, check, stress and report
    were silent, book check printed "NOT consistent" and exited 0. Every command that reads the
    book now says how many units and spots are held over their avails; book check exits 3."""
    from planner.cli import main
    from planner.scenario import load_scenario

    folder = scenario_copy(small_scenario)
    scn = load_scenario(folder)
    use_forecast(monkeypatch, synthetic_forecast(scn))
    assert main(["book", "commit", str(folder), "small-comfortable", "--solver", "highs"]) == 0
    held = bk.held_spots(scn)
    cut = held.nlargest(2, "spots")  # two held units lose all but one avail
    inv = pd.read_csv(folder / "inventory.csv")
    key = inv.set_index(UNIT).index
    hit = key.isin(cut.set_index(UNIT).index)
    inv.loc[hit, "avails"] = 1
    inv.to_csv(folder / "inventory.csv", index=False)
    over = int(cut["spots"].sum()) - 2
    capsys.readouterr()
    assert main(["book", "check", str(folder)]) == 3
    assert "NOT consistent" in capsys.readouterr().out
    runs = {
        "validate": ["validate", str(folder)],
        "check": ["check", str(folder), "small-tight", "--solver", "highs"],
        "plan": ["plan", str(folder), "small-tight", "--solver", "highs", "--out", str(folder / "p.csv")],
        "stress": ["stress", str(folder), "--draws", "2000"],
        "list": ["book", "list", str(folder)],
        "show": ["book", "show", str(folder), "small-comfortable"],
        "events": ["book", "events", str(folder)],
        "report": ["report", str(folder), "--out", str(folder / "r.html"), "--draws", "2000", "--solver", "highs"],
    }
    want = f"the book holds more spots than the avails in 2 unit(s), {over:,} spot(s) over"
    for name, argv in runs.items():
        assert main(["--quiet", *argv]) == 0, name
        out = capsys.readouterr().out
        assert want in " ".join(out.split()), (name, out)
    for name, argv in runs.items():
        if name == "plan":
            continue
        assert main([*argv, "--json"]) == 0, name
        js = json.loads(capsys.readouterr().out)
        warnings = js["book"]["warnings"] if name == "validate" else js["warnings"]
        assert any(w.startswith(want) for w in warnings), name


def test_events_record_the_os_user_and_book_events_shows_the_audit_trail(tmp_path, monkeypatch, capsys):
    """Each commit, release and re-plan records who did it (the operating-system user);
    `pledge book events` lists time, action, deal and user, oldest first."""
    import getpass

    monkeypatch.setattr(getpass, "getuser", lambda: "desk-tester")
    scn, _ = make_synthetic(tmp_path / "s")
    wf.commit_deal(scn, "alpha", planner=greedy_planner(4))
    holds = bk.get_deal(scn, "alpha").holds
    bk.replace_holds(scn, "alpha", holds, {"note": "re-plan"})
    bk.release_deal(scn, "alpha")
    log = bk.events(scn)
    assert log["action"].tolist() == ["commit", "rebalance", "release"]
    assert log["user"].tolist() == ["desk-tester"] * 3 and set(log["deal"]) == {"alpha"}
    code, out, _ = _cli(capsys, "book", "events", str(scn.path), "--json")
    assert code == 0
    rows = json.loads(out)["events"]
    assert [(r["action"], r["deal"], r["user"]) for r in rows] == [
        ("commit", "alpha", "desk-tester"), ("rebalance", "alpha", "desk-tester"), ("release", "alpha", "desk-tester")]
    assert all(r["at"].endswith("+00:00") for r in rows)  # UTC, ISO 8601
    code, out, _ = _cli(capsys, "book", "events", str(scn.path))
    lines = [ln for ln in out.splitlines() if "alpha" in ln]
    assert len(lines) == 3 and all("desk-tester" in ln for ln in lines) and "release" in lines[-1]


def test_version_3_book_is_upgraded_and_its_old_events_have_no_user(tmp_path):
    path = tmp_path / "v3.sqlite"
    conn = sqlite3.connect(path)
    conn.execute("CREATE TABLE schema_version (version INTEGER NOT NULL, applied_at TEXT NOT NULL)")
    for version, statements in bk._MIGRATIONS[:3]:
        for sql in statements:
            conn.execute(sql)
        conn.execute("INSERT INTO schema_version VALUES (?, 'then')", (version,))
    conn.execute("INSERT INTO deals (name, demo, guarantee, price_cpm, first_week, last_week, committed_at, spots) "
                 "VALUES ('old', 'a25-54', 1e6, 20, 1, 4, 'then', 3)")
    conn.execute("INSERT INTO events (at, deal, action, detail_json) VALUES ('then', 'old', 'commit', '{}')")
    conn.commit()
    conn.close()
    log = bk.events(tmp_path, path)
    assert log["user"].tolist() == [None] and log["action"].tolist() == ["commit"]
    old = bk.list_deals(tmp_path, path)[0]
    assert old.terms == {}
    conn = bk.open_book(path)
    assert bk._schema_version(conn) == bk.SCHEMA_VERSION == 4
    conn.close()


def test_a_deal_file_that_differs_from_its_commit_is_named_key_by_key(tmp_path):
    from dataclasses import replace

    from planner.scenario import Mix

    scn, _ = make_synthetic(tmp_path / "s")
    wf.commit_deal(scn, "alpha", planner=greedy_planner(4))
    booked = bk.get_deal(scn, "alpha")
    deal = scn.deals["alpha"]
    assert bk.terms_differ(booked, deal) == []
    edited = replace(deal, impressions=deal.impressions + 1000, mix=Mix(max_network_share=0.4))
    diff = bk.terms_differ(booked, edited)
    assert diff == [f"impressions: {deal.impressions:,.0f} in the book, {deal.impressions + 1000:,.0f} in the file",
                    "mix.max_network_share: None in the book, 0.4 in the file"]
    back = bk.deal_from_book(booked)
    assert bk.terms_differ(booked, back) == [] and back.mix == deal.mix


def test_make_good_terms_are_stored_with_the_commit(tmp_path):
    """Faults caught: a deal's make-good terms lost at commit (the book's deal would fall back to
    the defaults) or a change of terms in the file not named."""
    from dataclasses import replace

    from planner.terms import Terms

    scn, _ = make_synthetic(tmp_path / "s")
    mine = Terms(settlement="cash", threshold=0.9, window_weeks=6, cap=0.5)
    scn.deals["alpha"] = replace(scn.deals["alpha"], terms=mine)
    wf.commit_deal(scn, "alpha", planner=greedy_planner(4))
    booked = bk.get_deal(scn, "alpha")
    assert bk.deal_from_book(booked).terms == mine
    edited = replace(scn.deals["alpha"], terms=replace(mine, threshold=0.95))
    assert bk.terms_differ(booked, edited) == ["terms.threshold: 0.9 in the book, 0.95 in the file"]
