"""Run every benchmark section in one go, print the tables, and write the result file
and the figures.

    python -m tests.bench                 # the published run (under 10 minutes on 2 cores)
    python -m tests.bench --size quick    # a shorter run
    python -m tests.bench --only core,drift --out /tmp/bench

Results go to ``<out>/results.json`` (machine, command, every table) and the figures to
``<out>/*.png``; ``<out>`` defaults to ``docs/benchmarks``.
"""

from __future__ import annotations

import argparse
import importlib
import json
import os
import platform
import subprocess
import sys
import time
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from .report import SIZES, markdown

# each section is the module tests.bench.<name>_bench, with run(size, out)
SECTIONS = ("core", "cost", "drift", "service", "mqtt", "ingest")


def commit() -> str | None:
    """The checked-out commit, when this is a git work tree."""
    try:
        out = subprocess.run(["git", "rev-parse", "--short", "HEAD"], capture_output=True, text=True, timeout=10)
    except OSError:
        return None
    return out.stdout.strip() or None if out.returncode == 0 else None


def machine() -> dict[str, Any]:
    import numpy
    from curvekeeper import __version__

    return {"python": platform.python_version(), "platform": platform.platform(), "machine": platform.machine(),
            "cpus": os.cpu_count(), "numpy": numpy.__version__, "curvekeeper": __version__}


def tables_page(result: dict[str, Any]) -> str:
    """Every table of the run in Markdown, with the run's machine and command."""
    m = result["machine"]
    parts = ["# Benchmark tables", "",
             f"Written by `{result['command'].strip()}` ({result['size']} size) on {result['taken_at']}"
             f" (commit {result.get('commit') or 'unknown'}): "
             f"{m['cpus']} cores, {m['machine']}, Python {m['python']}, numpy {m['numpy']}; "
             f"{result['seconds']} s in all. Interpretation: [README.md](README.md).", ""]
    for name, section in result["sections"].items():
        parts += [f"## {name}", ""]
        parts += [markdown(t) for t in section["tables"]]
        parts += [f"![{fig}]({fig})" for fig in section.get("figures", [])] + [""]
    return "\n".join(parts)


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="python -m tests.bench", description=__doc__,
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--size", choices=SIZES, default="full")
    p.add_argument("--only", default=",".join(SECTIONS), help=f"comma-separated sections of {', '.join(SECTIONS)}")
    p.add_argument("--out", type=Path, default=Path("docs/benchmarks"))
    args = p.parse_args(argv)
    names = [s.strip() for s in args.only.split(",") if s.strip()]
    unknown = sorted(set(names) - set(SECTIONS))
    if unknown:
        p.error(f"unknown section(s): {', '.join(unknown)}")
    result: dict[str, Any] = {"taken_at": datetime.now(UTC).isoformat(timespec="seconds"), "size": args.size,
                              "command": "python -m tests.bench " + " ".join(sys.argv[1:] if argv is None else argv),
                              "commit": commit(), "machine": machine(), "sections": {}}
    t_all = time.perf_counter()
    for name in names:
        module = importlib.import_module(f"tests.bench.{name}_bench")
        print(f"\n=== {name} ({args.size}) ===", flush=True)
        t0 = time.perf_counter()
        section = module.run(args.size, args.out)
        section["seconds"] = round(time.perf_counter() - t0, 1)
        result["sections"][name] = section
        print(f"\n({name}: {section['seconds']} s)", flush=True)
    result["seconds"] = round(time.perf_counter() - t_all, 1)
    args.out.mkdir(parents=True, exist_ok=True)
    (args.out / "results.json").write_text(json.dumps(result, indent=1, default=float) + "\n")
    (args.out / "tables.md").write_text(tables_page(result))
    print(f"\nall sections in {result['seconds']} s; results in {args.out / 'results.json'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
