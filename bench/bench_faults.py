"""Fault-injection bench: does the test suite catch each fault of `bench/faults.py`?

For each fault: find its snippet `old` in every .py file under planner/, forecasting/ and
scenarios/ (by search, not by path: a fault is the same mistake wherever the code lives); it must
occur exactly once, else the fault is reported "not applicable" and the exit status is non-zero.
The repository is copied to a temporary folder once; each fault is written into the copy, the
tests run there (`python -m pytest -q -x -p no:cacheprovider SELECTION`, PYTHONPATH and cwd the
copy), and the file is restored. One table: fault, file, killed/survived, first failing test,
seconds. The unpatched copy is run first (baseline): a selection that fails without a fault
proves nothing, so the bench stops there.

    python bench/bench_faults.py                      # every fault, each on its own test selection
    python bench/bench_faults.py --only held-twice    # one fault (comma-separated names for more)
    python bench/bench_faults.py --tests quick        # the whole quick suite (-m "not slow"): which test kills it
    python bench/bench_faults.py --tests quick --all  # no -x: every test that fails under each fault
    python bench/bench_faults.py --only flight-short --select tests/test_deals.py::test_x   # does a new test kill it?
    python bench/bench_faults.py --list               # the faults and where their snippets are

Exit status: 0 every fault killed; 1 a fault survived, timed out or its run failed to start;
2 a fault's snippet was found 0 or 2+ times (not applicable); 3 the baseline failed.
"""
from __future__ import annotations

import argparse
import json
import os
import re
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from dataclasses import asdict, dataclass
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from faults import FAULTS, Fault, by_name  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
SOURCE_DIRS = ("planner", "forecasting", "scenarios")
QUICK = ("-m", "not slow", "tests")
#: left out of the copy: version control, caches, build output and per-scenario state
IGNORED = (".git", ".venv", "__pycache__", "*.pyc", ".pytest_cache", "*.egg-info", "build", "dist",
           "pledge-demo", "out", "forecast", "book.sqlite*", "worlds*.json", "worlds*.csv")


@dataclass
class Outcome:
    """What one fault did to its test run."""

    fault: str
    file: str | None
    result: str  # killed | survived | not applicable | timeout | error
    first_failure: str | None
    failures: list[str]
    seconds: float
    detail: str = ""


# ----------------------------------------------------------------------------- locating

def source_files(root: Path) -> list[Path]:
    """Every .py file under the source folders of `root`, sorted."""
    return sorted(p for d in SOURCE_DIRS for p in (root / d).rglob("*.py") if "__pycache__" not in p.parts)


def locate(root: Path, fault: Fault) -> list[tuple[Path, int]]:
    """(file, occurrences) of `fault.old` in the source files of `root` where it occurs."""
    hits = []
    for path in source_files(root):
        n = path.read_text(encoding="utf-8").count(fault.old)
        if n:
            hits.append((path, n))
    return hits


def not_applicable_reason(hits: list[tuple[Path, int]], root: Path) -> str | None:
    """Why the fault cannot be placed (its snippet is not found exactly once), or None."""
    total = sum(n for _, n in hits)
    if total == 1:
        return None
    where = ", ".join(f"{p.relative_to(root)} x{n}" for p, n in hits) or "nowhere"
    return f"not applicable: snippet found {total} times ({where}); update bench/faults.py"


# ----------------------------------------------------------------------------- running

def copy_repository(dest: Path) -> Path:
    """Copy the working tree (uncommitted changes included, state and caches left out) to `dest`."""
    shutil.copytree(ROOT, dest, ignore=shutil.ignore_patterns(*IGNORED))
    return dest


def test_env(copy: Path) -> dict:
    """Environment of a test run in `copy`: its packages first on the path, no bytecode written."""
    env = dict(os.environ)
    env["PYTHONPATH"] = str(copy)
    env["PYTHONDONTWRITEBYTECODE"] = "1"
    env.pop("PYTEST_ADDOPTS", None)
    return env


def check_copy_is_imported(copy: Path) -> None:
    """Stop unless `import planner` in a test run resolves into the copy (not an editable install)."""
    out = subprocess.run([sys.executable, "-c", "import planner, forecasting, scenarios; "
                          "print(planner.__file__); print(forecasting.__file__); print(scenarios.__file__)"],
                         cwd=copy, env=test_env(copy), capture_output=True, text=True, check=True).stdout
    for line in out.split():
        if not Path(line).resolve().is_relative_to(copy.resolve()):
            sys.exit(f"bench_faults: the copy's packages are not the ones imported ({line}); check PYTHONPATH")


FAILED = re.compile(r"^(?:FAILED|ERROR) (\S+)", re.M)


def failures(output: str) -> list[str]:
    """Test ids pytest's short summary lists as failed or in error, in order."""
    return FAILED.findall(output)


def run_tests(copy: Path, selection: list[str], *, stop_first: bool, timeout: float) -> tuple[int | None, str, float]:
    """(pytest exit status or None on timeout, its output, seconds) of one run in `copy`."""
    cmd = [sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", "-rfE"]
    cmd += ["-x"] if stop_first else []
    t0 = time.perf_counter()
    try:
        p = subprocess.run(cmd + selection, cwd=copy, env=test_env(copy), capture_output=True, text=True,
                           timeout=timeout)
    except subprocess.TimeoutExpired as exc:
        out = (exc.stdout or b"").decode() if isinstance(exc.stdout, bytes) else (exc.stdout or "")
        return None, out, time.perf_counter() - t0
    return p.returncode, p.stdout + p.stderr, time.perf_counter() - t0


def selection_of(fault: Fault, args) -> list[str]:
    """pytest arguments of the fault's test run: --select, the quick suite, or its own tests."""
    if args.select:
        return args.select.split(",")
    return list(QUICK) if args.tests == "quick" else list(fault.tests)


def judge(fault: Fault, rel: str, rc: int | None, output: str, seconds: float) -> Outcome:
    """The outcome of one fault's run from pytest's exit status (1 failed, 2 interrupted by an
    error such as an import failure the fault caused, 0 passed, else a run that did not work)."""
    failed = failures(output)
    if rc is None:
        return Outcome(fault.name, rel, "timeout", failed[0] if failed else None, failed, seconds)
    if rc in (1, 2) and failed:
        return Outcome(fault.name, rel, "killed", failed[0], failed, seconds)
    if rc == 0:
        return Outcome(fault.name, rel, "survived", None, [], seconds)
    tail = " | ".join(output.strip().splitlines()[-3:])
    return Outcome(fault.name, rel, "error", None, failed, seconds, f"pytest exit {rc}: {tail}")


def inject_and_run(copy: Path, fault: Fault, args) -> Outcome:
    """Put `fault` into `copy`, run its tests, restore the file."""
    hits = locate(copy, fault)
    reason = not_applicable_reason(hits, copy)
    if reason:
        return Outcome(fault.name, None, "not applicable", None, [], 0.0, reason)
    path = hits[0][0]
    rel = str(path.relative_to(copy))
    original = path.read_text(encoding="utf-8")
    path.write_text(original.replace(fault.old, fault.new, 1), encoding="utf-8")
    try:
        rc, output, seconds = run_tests(copy, selection_of(fault, args), stop_first=not args.all,
                                        timeout=args.timeout)
    finally:
        path.write_text(original, encoding="utf-8")
    return judge(fault, rel, rc, output, seconds)


def baseline(copy: Path, faults: list[Fault], args) -> tuple[bool, str, float]:
    """Run every selection used, unpatched: (passed, output tail, seconds)."""
    if args.select:
        selection = args.select.split(",")
    elif args.tests == "quick":
        selection = list(QUICK)
    else:
        selection = sorted({t for f in faults for t in f.tests})
    rc, output, seconds = run_tests(copy, selection, stop_first=True, timeout=args.timeout)
    return rc == 0, "\n".join(output.strip().splitlines()[-15:]), seconds


# ----------------------------------------------------------------------------- report

def table(outcomes: list[Outcome]) -> str:
    """Markdown table of the outcomes."""
    rows = ["| fault | file | result | first failing test | s |", "| --- | --- | --- | --- | ---: |"]
    for o in outcomes:
        what = o.first_failure or (o.detail if o.result != "survived" else "")
        rows.append(f"| {o.fault} | {o.file or '-'} | {o.result} | {what} | {o.seconds:.1f} |")
    return "\n".join(rows)


def exit_status(outcomes: list[Outcome]) -> int:
    """0 all killed; 2 any not applicable; else 1 when any survived, timed out or failed to run."""
    if any(o.result == "not applicable" for o in outcomes):
        return 2
    return 0 if all(o.result == "killed" for o in outcomes) else 1


def chosen(only: str | None) -> list[Fault]:
    """The faults named by --only (comma-separated), else all."""
    if not only:
        return list(FAULTS)
    known = by_name()
    names = [n.strip() for n in only.split(",") if n.strip()]
    unknown = [n for n in names if n not in known]
    if unknown:
        sys.exit(f"bench_faults: unknown fault(s) {', '.join(unknown)}; known: {', '.join(known)}")
    return [known[n] for n in names]


def list_faults(faults: list[Fault]) -> int:
    """Print each fault, where its snippet is, and its tests; non-zero when one is not applicable."""
    status = 0
    for f in faults:
        hits = locate(ROOT, f)
        reason = not_applicable_reason(hits, ROOT)
        where = reason or str(hits[0][0].relative_to(ROOT))
        status = 2 if reason else status
        print(f"{f.name:30s} {where}\n    {f.description}\n    tests: {' '.join(f.tests)}")
    return status


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--only", help="comma-separated fault names (default: all)")
    ap.add_argument("--tests", choices=("selection", "quick"), default="selection",
                    help="each fault's own tests (default) or the whole quick suite (-m 'not slow')")
    ap.add_argument("--select", help="comma-separated test files or node ids to run instead (e.g. a new test)")
    ap.add_argument("--all", action="store_true", help="run the tests to the end (no -x): every failing test")
    ap.add_argument("--json", action="store_true", help="print the outcomes as JSON")
    ap.add_argument("--timeout", type=float, default=1200.0, help="seconds per test run (default 1200)")
    ap.add_argument("--no-baseline", action="store_true", help="skip the unpatched run")
    ap.add_argument("--list", action="store_true", help="list the faults and where their snippets are")
    args = ap.parse_args(argv)
    # a terminated bench stops its test run and removes its copy (SystemExit unwinds through
    # subprocess.run, which kills the child, and through the temporary folder's cleanup)
    signal.signal(signal.SIGTERM, lambda *_: sys.exit(143))
    faults = chosen(args.only)
    if args.list:
        return list_faults(faults)
    with tempfile.TemporaryDirectory(prefix="pledge-faults-") as tmp:
        copy = copy_repository(Path(tmp) / "repo")
        check_copy_is_imported(copy)
        if not args.no_baseline:
            ok, tail, seconds = baseline(copy, faults, args)
            print(f"baseline ({args.tests}): {'passed' if ok else 'FAILED'} in {seconds:.1f} s", file=sys.stderr)
            if not ok:
                print(tail, file=sys.stderr)
                return 3
        outcomes = []
        for f in faults:
            o = inject_and_run(copy, f, args)
            print(f"{o.fault}: {o.result} {o.first_failure or o.detail} ({o.seconds:.1f} s)", file=sys.stderr)
            outcomes.append(o)
    print(json.dumps([asdict(o) for o in outcomes], indent=2) if args.json else table(outcomes))
    status = exit_status(outcomes)
    if status == 2:
        print("bench_faults: NOT APPLICABLE: " + "; ".join(f"{o.fault}: {o.detail}" for o in outcomes
                                                           if o.result == "not applicable"), file=sys.stderr)
    return status


if __name__ == "__main__":
    sys.exit(main())
