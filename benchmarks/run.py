"""Run the wingwatch benchmarks and write the results (``python -m benchmarks``).

    python -m benchmarks                  # everything at full size (about 20 minutes)
    python -m benchmarks --quick          # every benchmark for a few seconds
    python -m benchmarks --only latency   # one benchmark (repeat --only for more)

Output: a rich table per benchmark on stdout, and in ``benchmarks/results/`` (or
``--results-dir``) a timestamped JSON file, ``latest.json`` and ``latest.md`` (the tables in
markdown with the machine described). Figures are ratios against baselines run in the same
process; nothing here asserts a time.
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # before numpy is imported

import argparse  # noqa: E402
import importlib  # noqa: E402
import json  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
import traceback  # noqa: E402
from pathlib import Path  # noqa: E402
from typing import Any  # noqa: E402

if __package__ in (None, ""):
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks import RESULTS_DIR, machine_info  # noqa: E402

__all__ = ["BENCHMARKS", "main", "run_benchmarks", "to_markdown"]

#: name -> module; run in this order (the cheap ones first)
BENCHMARKS: dict[str, str] = {
    "identify": "benchmarks.bench_identify",
    "pipeline": "benchmarks.bench_pipeline",
    "rig": "benchmarks.bench_rig",
    "latency": "benchmarks.bench_latency",
    "memory": "benchmarks.bench_memory",
}


def _fmt(v: Any) -> str:
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, float):
        if v != v:
            return "nan"
        a = abs(v)
        if a == 0:
            return "0"
        if a >= 1000:
            return f"{v:,.0f}"
        if a >= 10:
            return f"{v:.1f}"
        if a >= 0.01:
            return f"{v:.3f}"
        return f"{v:.2e}"
    return str(v)


def _print_rich(result: dict[str, Any]) -> None:
    from rich.console import Console
    from rich.table import Table

    con = Console(width=None if sys.stdout.isatty() else 130)
    con.rule(f"[bold]{result['name']}[/bold]: {result.get('title', '')}")
    for t in result.get("tables", []):
        tab = Table(title=t["title"], title_justify="left")
        for c in t["columns"]:
            tab.add_column(c, justify="left" if c == t["columns"][0] else "right")
        for r in t["rows"]:
            tab.add_row(*[_fmt(v) for v in r])
        con.print(tab)
    if result.get("targets"):
        tab = Table(title="targets", title_justify="left")
        for c in ("target", "measured", "threshold", "met"):
            tab.add_column(c, justify="left" if c == "target" else "right")
        for tg in result["targets"]:
            tab.add_row(tg["target"], _fmt(tg["value"]), f"{tg['direction']} {_fmt(tg['threshold'])}",
                        "[green]met[/green]" if tg["met"] else "[red]not met[/red]")
        con.print(tab)
    for n in result.get("notes", []):
        con.print(f"  note: {n}")
    if result.get("error"):
        con.print(f"[red]failed: {result['error']}[/red]")


def to_markdown(doc: dict[str, Any]) -> str:
    """The results document as markdown: machine, targets, then every table."""
    m = doc["machine"]
    load = m.get("load_average")
    load_end = doc.get("load_average_end")
    lines = [
        "# wingwatch benchmark results",
        "",
        f"- date: {m['date']} (mode: {'quick' if doc['quick'] else 'full'}, "
        f"wall time {doc['wall_s']:.0f} s)",
        f"- machine: {m['cpu_model']}, {m['cores']} cores ({m.get('cores_usable')} usable), "
        f"{m['system']}, {m['machine']}",
        f"- software: Python {m['python']}, numpy {m['numpy']}, wingwatch {m['wingwatch']} "
        f"(commit {m.get('commit')}"
        f"{', with uncommitted changes in ' + '/'.join(m['uncommitted_changes_in']) if m.get('uncommitted_changes_in') else ''}"
        f"), OPENBLAS_NUM_THREADS={m.get('openblas_num_threads')}",
        f"- load average (1, 5, 15 min) at start: {load}; at end: {load_end} "
        "(other jobs share these cores: absolute times are inflated, ratios less so)",
        "",
        "## Targets",
        "",
        "| benchmark | target | measured | threshold | met |",
        "|---|---|---|---|---|",
    ]
    for name, res in doc["results"].items():
        for tg in res.get("targets", []):
            lines.append(f"| {name} | {tg['target']} | {_fmt(tg['value'])} | {tg['direction']} "
                         f"{_fmt(tg['threshold'])} | {'met' if tg['met'] else '**not met**'} |")
    for name, res in doc["results"].items():
        lines += ["", f"## {name}: {res.get('title', '')}", ""]
        if res.get("error"):
            lines += [f"failed: `{res['error']}`", ""]
        for t in res.get("tables", []):
            lines += [f"**{t['title']}**", "", "| " + " | ".join(t["columns"]) + " |",
                      "|" + "---|" * len(t["columns"])]
            for r in t["rows"]:
                lines.append("| " + " | ".join(_fmt(v) for v in r) + " |")
            lines.append("")
        for n in res.get("notes", []):
            lines.append(f"- {n}")
    return "\n".join(lines).rstrip() + "\n"


def run_benchmarks(names: list[str], quick: bool) -> dict[str, dict[str, Any]]:
    results: dict[str, dict[str, Any]] = {}
    for name in names:
        mod = importlib.import_module(BENCHMARKS[name])
        t0 = time.perf_counter()
        try:
            res = mod.run(quick=quick)
        except Exception as exc:  # a broken benchmark is reported, the others still run
            res = {"name": name, "title": "", "tables": [], "summary": {}, "targets": [],
                   "notes": [], "error": f"{type(exc).__name__}: {exc}",
                   "traceback": traceback.format_exc()}
        res["wall_s"] = time.perf_counter() - t0
        results[name] = res
        _print_rich(res)
    return results


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m benchmarks", description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="each benchmark for a few seconds")
    ap.add_argument("--only", action="append", choices=sorted(BENCHMARKS), metavar="NAME",
                    help=f"run only this benchmark (repeatable): {', '.join(BENCHMARKS)}")
    ap.add_argument("--results-dir", default=str(RESULTS_DIR),
                    help="where to write the JSON and markdown (default: benchmarks/results)")
    ap.add_argument("--list", action="store_true", help="list the benchmarks and exit")
    args = ap.parse_args(argv)
    if args.list:
        for n, m in BENCHMARKS.items():
            print(f"{n:10s} {m}")
        return 0
    names = [n for n in BENCHMARKS if not args.only or n in args.only]
    machine = machine_info()
    t0 = time.perf_counter()
    results = run_benchmarks(names, args.quick)
    try:
        load_end = list(os.getloadavg())
    except OSError:
        load_end = None
    doc = {"suite": "wingwatch-benchmarks", "schema": 1, "quick": bool(args.quick),
           "only": args.only or [], "machine": machine, "load_average_end": load_end,
           "wall_s": time.perf_counter() - t0, "results": results}
    out = Path(args.results_dir)
    out.mkdir(parents=True, exist_ok=True)
    stamp = time.strftime("%Y%m%d-%H%M%S")
    text = json.dumps(doc, indent=2, default=float) + "\n"
    (out / f"results-{stamp}{'-quick' if args.quick else ''}.json").write_text(text)
    (out / "latest.json").write_text(text)
    (out / "latest.md").write_text(to_markdown(doc))
    print(f"wrote {out / 'latest.json'} and {out / 'latest.md'}")
    return 1 if any(r.get("error") for r in results.values()) else 0


if __name__ == "__main__":
    raise SystemExit(main())
