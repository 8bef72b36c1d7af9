"""`bench/run`: run every benchmark, print ONE table (figure, target, measured, ratio), and write
bench/RESULTS.md with the machine it ran on. See bench/run --help."""
from __future__ import annotations

import argparse
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
import _measure as M  # noqa: E402

BENCH = Path(__file__).resolve().parent

# (name, script, extra args, adapter): scale benchmarks print {"rows": [...]}; the others print
# their own JSON (last stdout line), turned into rows by an adapter.
SCALE = ["ingest", "fit", "allocate", "stress"]
SCRIPTS = {"ingest": "bench_ingest.py", "fit": "bench_scale_fit.py", "allocate": "bench_scale_allocate.py",
           "stress": "bench_scale_stress.py", "demo-stress": "bench_stress.py", "demo-generate": "bench_generate.py",
           "demo-fit": "bench_fit.py", "demo-allocate": "bench_allocate.py", "calibration": "bench_calibration.py"}


#: the demo's own history and fourteen more generator seeds (same structure, other shocks)
CALIBRATION_SEEDS = "20261129," + ",".join(str(i) for i in range(1, 15))
DEFAULT = ["ingest", "stress", "allocate", "fit", "demo-stress", "demo-generate", "demo-fit", "calibration"]


def _generic_rows(name: str, out: dict) -> list[dict]:
    """Rows from another helper's benchmark JSON (target_seconds + a seconds figure)."""
    target = out.get("target_seconds")
    secs = None
    for key in ("seconds_best", "seconds", "fit_seconds", "total_seconds"):
        if isinstance(out.get(key), (int, float)):
            secs = float(out[key])
            break
    if secs is None and isinstance(out.get("steps"), list) and out["steps"]:
        secs = float(out["steps"][0].get("seconds", float("nan")))
    if secs is None:
        return [M.row(f"{name}", "", json.dumps(out)[:80], None)]
    met = out.get("meets_target")
    label = f"{int(out['draws']):,} draws" if isinstance(out.get("draws"), (int, float)) else "demo"
    return [M.row(f"{name} ({label})",
                  f"< {target:g} s" if target else "", f"{secs:.2f} s",
                  secs / target if target else None, met if isinstance(met, bool) else None)]


def run_one(name: str, args) -> tuple[list[dict], dict]:
    script = BENCH / SCRIPTS[name]
    if not script.exists():
        return [], {}
    cmd = [sys.executable, str(script)]
    if name in SCALE:
        cmd += ["--json", "--large", str(args.large)]
    elif name == "demo-fit":
        cmd += ["--json"]
    elif name == "calibration":
        cmd += ["--json", "--backtest", "--blocks", "2", "--seeds", CALIBRATION_SEEDS]
    env = dict(os.environ, PYTHONPATH=str(BENCH.parent))
    t0 = time.perf_counter()
    # Own process group, so a timeout stops the benchmark and the step it is running.
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env,
                            cwd=str(BENCH.parent), start_new_session=True)
    try:
        stdout, stderr = proc.communicate(timeout=args.timeout)
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)
        stdout, stderr = proc.communicate()
        wall = time.perf_counter() - t0
        return ([M.row(f"{name}: did not finish", f"(run stopped at {args.timeout:.0f} s)",
                       f"> {wall:.0f} s", None, False)], {"stderr": stderr[-3000:], "stopped_after_s": wall})
    wall = time.perf_counter() - t0
    lines = [ln for ln in stdout.strip().splitlines() if ln.startswith("{")]
    if proc.returncode != 0 or not lines:
        msg = (stderr.strip().splitlines() or ["no output"])[-1][:100]
        return [M.row(f"{name}: FAILED", "", msg, None, False)], {"stderr": stderr[-3000:]}
    out = json.loads(lines[-1])
    rows = out["rows"] if name in SCALE or "rows" in out else _generic_rows(name, out)
    details = out.get("details", out)
    details = dict(details) if isinstance(details, dict) else {"value": details}
    details["bench_wall_seconds"] = wall
    return rows, details


_PREFIX = {"ingest": "ingest", "stress": "stress", "naive": "stress", "check": "allocate",
           "allocation": "allocate", "forecast": "fit", "demo-stress": "demo-stress",
           "demo-generate": "demo-generate", "demo-fit": "demo-fit", "demo-allocate": "demo-allocate",
           "calibration": "calibration"}


def previous_results() -> tuple[list[dict], dict]:
    """Rows (tagged with their benchmark) and details of the last RESULTS.md, for --merge."""
    path = BENCH / "RESULTS.md"
    if not path.exists():
        return [], {}
    text = path.read_text()
    rows, bench = [], None
    for line in text.splitlines():
        if not line.startswith("| ") or line.startswith("| figure") or line.startswith("| ---"):
            continue
        cells = [c for c in line[2:-2].split(" | ")]
        if len(cells) != 5:
            continue
        fig, target, measured, ratio, met = cells
        if not fig.startswith(" "):
            bench = next((b for k, b in _PREFIX.items() if fig.split(":")[0].split(" ")[0] == k), bench)
        rows.append({"figure": fig, "target": target, "measured": measured,
                     "ratio": float(ratio) if ratio else None,
                     "met": None if not met else met == "yes", "bench": bench})
    details = {}
    if "## Details of each benchmark" in text:
        block = text.split("## Details of each benchmark", 1)[1].split("```")[1]
        try:
            details = json.loads(block)
        except ValueError:
            details = {}
    return rows, details


def markdown(rows: list[dict]) -> str:
    lines = ["| figure | target | measured | ratio | met |", "| --- | --- | --- | --- | --- |"]
    for r in rows:
        ratio = "" if r["ratio"] is None else f"{r['ratio']:.3g}"
        met = "" if r["met"] is None else ("yes" if r["met"] else "**no**")
        lines.append(f"| {r['figure']} | {r['target']} | {r['measured']} | {ratio} | {met} |")
    return "\n".join(lines)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(prog="bench/run", description=(
        "Run the benchmarks and print one table. ratio: measured / target for a target (<= 1 meets "
        "it); for a side-by-side comparison, how many times faster (or the stated quotient)."))
    ap.add_argument("--large", type=Path, default=M.default_large(),
                    help="the large instance from bench/generate_large.py (default $PLEDGE_LARGE or "
                         "/work/large/national)")
    ap.add_argument("--only", default=None, help=f"comma list of {', '.join(SCRIPTS)}")
    ap.add_argument("--no-write", action="store_true", help="do not rewrite bench/RESULTS.md")
    ap.add_argument("--merge", action="store_true",
                    help="keep the other benchmarks' rows of the last RESULTS.md, replace those re-run")
    ap.add_argument("--timeout", type=float, default=1800.0,
                    help="stop a benchmark that runs longer than this many seconds (reported as such)")
    args = ap.parse_args(argv)
    names = args.only.split(",") if args.only else DEFAULT
    unknown = [n for n in names if n not in SCRIPTS]
    if unknown:
        ap.error(f"unknown benchmark(s) {', '.join(unknown)}")
    if any(n in SCALE for n in names) and not (args.large / "LARGE.json").exists():
        ap.error(f"{args.large}: no large instance (run: python bench/generate_large.py {args.large})")
    facts_start = M.machine_facts()
    t0 = time.perf_counter()
    rows, details = [], {}
    keep_rows, keep_details = previous_results() if args.merge else ([], {})
    keep_rows = [r for r in keep_rows if r.get("bench") not in names]
    keep_details = {k: v for k, v in keep_details.items() if k not in names}
    for name in names:
        print(f"running {name} ...", file=sys.stderr, flush=True)
        r, d = run_one(name, args)
        for row in r:
            row["bench"] = name
        rows += r
        if d:
            details[name] = d
        if not args.no_write:
            write_results(args, keep_rows + rows, {**keep_details, **details}, facts_start, t0, done=False)
    if args.merge:  # benchmark order of DEFAULT, the re-run ones in their place
        order = DEFAULT + [n for n in SCRIPTS if n not in DEFAULT]
        rows = sorted(keep_rows + rows, key=lambda r: order.index(r["bench"]) if r.get("bench") in order else 99)
        details = {**keep_details, **details}
    M.print_rows(rows)
    if not args.no_write:
        write_results(args, rows, details, facts_start, t0, done=True)
    return 0


def write_results(args, rows, details, facts_start, t0, done: bool) -> None:
    """Rewrite bench/RESULTS.md (also after each benchmark, so a stopped run leaves what it measured)."""
    facts = M.machine_facts()
    facts["load_avg_1m_at_start"] = facts_start.get("load_avg_1m")
    facts["total_seconds"] = round(time.perf_counter() - t0, 1)
    large = {}
    if (args.large / "LARGE.json").exists():
        large = json.loads((args.large / "LARGE.json").read_text())
    notes = BENCH / "notes.md"
    text = [
        "# Benchmark results (last run of `bench/run`)" + ("" if done else " - run in progress"),
        "",
        f"Command: `bench/run {' '.join(sys.argv[1:])}`".rstrip() + ". "
        f"Run {facts['date_utc']} on {facts.get('nproc')} CPUs ({facts.get('cpu', 'unknown CPU')}), "
        f"{facts.get('memory_gib')} GiB memory; load average {facts.get('load_avg_1m_at_start')} at the start "
        f"and {facts.get('load_avg_1m')} at the end (the machine may be shared: timings are wall clock).",
        "",
        "ratio: measured / target for a target (<= 1 meets it); for a side-by-side, the quotient shown "
        "in `measured` (how many times slower the alternative is). Memory is the whole-process peak "
        "resident set of the child process that ran the step (`os.wait4` rusage), not an estimate.",
        "",
        markdown(rows),
        "",
        "## Machine and versions",
        "",
        "```",
        json.dumps(facts, indent=2),
        "```",
        "",
        "## Large instance (bench/generate_large.py)",
        "",
        "```",
        json.dumps(large, indent=2),
        "```",
        "",
    ]
    if notes.exists():
        text += [notes.read_text().rstrip(), ""]
    text += ["## Details of each benchmark", "", "```", json.dumps(details, indent=1, default=str)[:60000], "```",
             "", "Invented data throughout; figures are measurements of this code on this machine, not promises.",
             ""]
    (BENCH / "RESULTS.md").write_text("\n".join(text))
    print(f"wrote {BENCH / 'RESULTS.md'}", file=sys.stderr)


if __name__ == "__main__":
    raise SystemExit(main())
