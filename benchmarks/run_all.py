#!/usr/bin/env python3
"""Run every benchmark with one command and list the figures that have goals.

    python benchmarks/run_all.py            # the full run (about 3 minutes on 2 cores)
    python benchmarks/run_all.py --quick    # a short smoke run (about a minute)
    python benchmarks/run_all.py --only signal_quality
    python benchmarks/run_all.py --only core_throughput --only signal_quality --only fuzz_decoders

The last line is the in-process part alone (under a minute): the two daemon benchmarks
start real daemon processes on pseudo-terminals and take most of the full run's time.

Each benchmark runs in its own Python process (so one cannot warm up or slow down the
next) and prints one ``name: value unit`` line per figure; lines starting with ``#``
are comments. At the end the figures that carry a goal are listed again with whether
the goal was met. A missed goal is reported, not failed: benchmarks are measurements.
The exit status is non-zero only when a benchmark itself crashed.

docs/performance.md records the figures with date, machine and command.
"""

from __future__ import annotations

import argparse
import operator
import re
import subprocess
import sys
import time
from collections.abc import Sequence
from pathlib import Path

HERE = Path(__file__).resolve().parent

#: name -> (arguments for the full run, arguments for --quick)
BENCHMARKS: dict[str, tuple[list[str], list[str]]] = {
    "core_throughput": ([], ["--quick"]),
    "signal_quality": ([], ["--quick"]),
    "fuzz_decoders": (["--chunks", "300000"], ["--chunks", "20000"]),
    "daemon_latency": ([], ["--quick"]),
    "daemon_load": ([], ["--quick"]),
}

FIGURE = re.compile(
    r"^(?P<name>[A-Za-z0-9_]+): (?P<value>\S+) (?P<unit>\S+)(?:\s+# goal (?P<goal>.+))?$"
)
GOAL = re.compile(r"^(?P<op><=|>=|<|>)\s*(?P<limit>[0-9.eE+-]+)$")
OPS = {"<": operator.lt, "<=": operator.le, ">": operator.gt, ">=": operator.ge}


def goal_met(value: str, goal: str) -> str:
    """'yes', 'NO' or '?' (goal or value not understood)."""
    m = GOAL.match(goal.strip())
    try:
        v = float(value)
    except ValueError:
        return "?"
    if not m:
        return "?"
    return "yes" if OPS[m["op"]](v, float(m["limit"])) else "NO"


def run_one(name: str, args: Sequence[str]) -> tuple[int, list[re.Match[str]], float]:
    """Run one benchmark, echoing its output live; return status, figure lines, seconds."""
    cmd = [sys.executable, str(HERE / f"{name}.py"), *args]
    print(f"## {name}: {' '.join(cmd[1:])}", flush=True)
    t0 = time.perf_counter()
    figures = []
    with subprocess.Popen(cmd, stdout=subprocess.PIPE, text=True, bufsize=1) as proc:
        assert proc.stdout is not None
        for line in proc.stdout:
            print(line, end="", flush=True)
            m = FIGURE.match(line.rstrip("\n"))
            if m:
                figures.append(m)
    seconds = time.perf_counter() - t0
    print(f"## {name}: exit {proc.returncode}, {seconds:.1f} s", flush=True)
    return proc.returncode, figures, seconds


def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true", help="a short smoke run of every benchmark")
    ap.add_argument("--only", choices=list(BENCHMARKS), action="append", help="run only these")
    args = ap.parse_args(argv)
    failed = []
    goals = []
    t0 = time.perf_counter()
    for name in args.only or list(BENCHMARKS):
        full, quick = BENCHMARKS[name]
        status, figures, _ = run_one(name, quick if args.quick else full)
        if status != 0:
            failed.append(name)
        goals += [m for m in figures if m["goal"]]
    print(f"## all benchmarks: {time.perf_counter() - t0:.1f} s{' (quick)' if args.quick else ''}")
    if goals:
        print("## figures with goals:")
        width = max(len(m["name"]) for m in goals)
        for m in goals:
            met = goal_met(m["value"], m["goal"])
            print(
                f"##   {m['name']:<{width}}  {m['value']:>10} {m['unit']:<11} "
                f"goal {m['goal']:<10} met: {met}"
            )
    if failed:
        print(f"## crashed: {', '.join(failed)}", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
