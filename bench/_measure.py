"""Measure one benchmark step in its own process: wall time and whole-process peak memory.

Each measured step runs as a child process (``python bench/<script>.py --step NAME ...``) that
prints one JSON object as its last stdout line. The parent waits for that child alone with
`os.wait4`, whose resource usage gives the child's peak resident set size (``ru_maxrss``,
KiB on Linux), including threads (DuckDB's workers) and any waited-for descendants. So memory is
measured, per step, never estimated.
"""
from __future__ import annotations

import json
import os
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path

GIB = 1024 ** 3
ROOT = Path(__file__).resolve().parents[1]


def run_step(argv: list[str], *, env: dict | None = None, timeout: float | None = None) -> dict:
    """Run `argv` (a Python script and its arguments) as a child; return its JSON result.

    The result gains ``wall_seconds`` (parent clock, process start to exit) and
    ``peak_rss_bytes`` (the child's whole-process peak) and ``cpu_seconds`` (user + system). Raises RuntimeError on failure. With
    `timeout`, a child still running is killed; if it had printed a (partial) JSON result, that
    is returned with ``timed_out: True``.
    """
    cmd = [sys.executable, *map(str, argv)]
    full_env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    full_env.setdefault("OMP_NUM_THREADS", "2")
    if env:
        full_env.update(env)
    with tempfile.TemporaryFile("w+") as out:
        t0 = time.perf_counter()
        proc = subprocess.Popen(cmd, stdout=out, stderr=None, env=full_env, cwd=str(ROOT))
        deadline = None if timeout is None else t0 + timeout
        timed_out = False
        while True:
            pid, status, usage = os.wait4(proc.pid, os.WNOHANG)
            if pid:
                break
            if deadline is not None and time.perf_counter() > deadline:
                proc.kill()
                pid, status, usage = os.wait4(proc.pid, 0)
                timed_out = True
                break
            time.sleep(0.05)
        wall = time.perf_counter() - t0
        proc.returncode = os.waitstatus_to_exitcode(status)
        out.seek(0)
        text = out.read()
    lines = [ln for ln in text.strip().splitlines() if ln.startswith("{")]
    if timed_out and lines:  # a step that reports as it goes: keep what it measured
        result = json.loads(lines[-1])
        result.update(wall_seconds=wall, peak_rss_bytes=int(usage.ru_maxrss) * 1024, timed_out=True,
                      cpu_seconds=usage.ru_utime + usage.ru_stime)
        return result
    if proc.returncode != 0:
        raise RuntimeError(f"step failed (exit {proc.returncode}): {' '.join(cmd)}\n{text[-2000:]}")
    lines = [ln for ln in text.strip().splitlines() if ln.startswith("{")]
    if not lines:
        raise RuntimeError(f"step printed no JSON result: {' '.join(cmd)}\n{text[-2000:]}")
    result = json.loads(lines[-1])
    result["wall_seconds"] = wall
    result["peak_rss_bytes"] = int(usage.ru_maxrss) * 1024
    result["cpu_seconds"] = usage.ru_utime + usage.ru_stime  # user + system, all threads
    return result


def emit(result: dict) -> None:
    """Print a step's result as the last stdout line (the parent parses it)."""
    sys.stdout.write(json.dumps(result, default=float) + "\n")
    sys.stdout.flush()


def machine_facts() -> dict:
    """nproc, memory, CPU model, Python and library versions, date (UTC)."""
    facts = {"nproc": os.cpu_count(), "python": platform.python_version(),
             "date_utc": time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime())}
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemTotal:"):
                facts["memory_gib"] = round(int(line.split()[1]) * 1024 / GIB, 1)
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                facts["cpu"] = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    try:
        facts["load_avg_1m"] = round(os.getloadavg()[0], 2)
    except OSError:
        pass
    import importlib

    for lib in ("numpy", "pandas", "duckdb", "pyarrow", "highspy", "pulp", "sklearn", "pyspark"):
        try:
            facts[lib] = importlib.import_module(lib).__version__
        except Exception:  # noqa: BLE001 - optional libraries
            pass
    return facts


def gib(n_bytes: float) -> float:
    return n_bytes / GIB


def row(figure: str, target: str, measured: str, ratio: float | None, met: bool | None = None) -> dict:
    """One line of the `bench/run` table. `ratio`: measured / target for a target (<= 1 meets it),
    or the side-by-side factor for a comparison (how many times faster)."""
    return {"figure": figure, "target": target, "measured": measured,
            "ratio": None if ratio is None else float(ratio), "met": met}


def print_rows(rows: list[dict], file=None) -> None:
    """Aligned table of rows (figure, target, measured, ratio, met)."""
    file = file or sys.stdout
    head = ("figure", "target", "measured", "ratio", "met")
    cells = [[r["figure"], r["target"], r["measured"],
              "" if r["ratio"] is None else f"{r['ratio']:.3g}",
              "" if r["met"] is None else ("yes" if r["met"] else "NO")] for r in rows]
    widths = [max(len(h), *(len(c[i]) for c in cells)) if cells else len(h) for i, h in enumerate(head)]
    fmt = "  ".join(f"{{:<{w}}}" for w in widths)
    print(fmt.format(*head), file=file)
    print(fmt.format(*("-" * w for w in widths)), file=file)
    for c in cells:
        print(fmt.format(*c), file=file)


def default_large() -> Path:
    """The large instance folder: $PLEDGE_LARGE or /work/large/national."""
    return Path(os.environ.get("PLEDGE_LARGE", "/work/large/national"))
