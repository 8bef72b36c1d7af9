#!/usr/bin/env python
"""Re-run the README tour and rewrite each ``$ command`` block's output in place.

Runs every fenced block whose first line starts with ``$ `` in order, in a fresh working folder
(the tour starts with ``pledge demo``), with the project's ``pledge`` on the PATH. ``pledge demo``
blocks keep standard error (its progress lines, as shown); other commands show standard output
only. A block ending in ``... (N more lines)`` keeps as many head lines as it had. Invented data.

Usage: python bench/recapture_readme.py [--readme README.md] [--workdir /tmp/pledge-tour]
"""
from __future__ import annotations

import argparse
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
MORE = re.compile(r"^\.\.\. \((\d+) more lines\)$")


def run(cmd: str, cwd: Path) -> str:
    env = dict(os.environ, PATH=f"{Path(sys.executable).parent}{os.pathsep}{os.environ['PATH']}")
    merge = cmd.startswith("pledge demo")
    p = subprocess.run(["bash", "-c", cmd], cwd=cwd, env=env, text=True,
                       stdout=subprocess.PIPE, stderr=subprocess.STDOUT if merge else subprocess.PIPE)
    return p.stdout.rstrip("\n")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--readme", default=str(ROOT / "README.md"))
    ap.add_argument("--workdir", default="/tmp/pledge-tour")
    args = ap.parse_args(argv)
    work = Path(args.workdir)
    shutil.rmtree(work, ignore_errors=True)
    work.mkdir(parents=True)
    lines = Path(args.readme).read_text().split("\n")
    out, i = [], 0
    while i < len(lines):
        out.append(lines[i])
        if lines[i].startswith("```") and i + 1 < len(lines) and lines[i + 1].startswith("$ "):
            j = i + 1
            block = []
            while not lines[j].startswith("```"):
                block.append(lines[j])
                j += 1
            cmds = [b for b in block if b.startswith("$ ")]
            more = next((MORE.match(b) for b in block if MORE.match(b)), None)
            for k, cmd in enumerate(cmds):
                text = run(cmd[2:], work)
                out.append(cmd)
                body = text.split("\n") if text else []
                if more is not None and k == len(cmds) - 1:
                    kept = len(block) - block.index(cmd) - 2
                    if len(body) > kept:
                        body = body[:kept] + [f"... ({len(body) - kept} more lines)"]
                out.extend(body)
                print(f"ran: {cmd[2:]}", file=sys.stderr)
            i = j
            continue
        i += 1
    Path(args.readme).write_text("\n".join(out))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
