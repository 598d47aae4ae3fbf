"""`corral sweep CONFIG --plants N [--grid KEY=a,b,c]`: Monte Carlo over the config's uncertainty.

Prints a readable report (or one JSON object with --json), writes PNG plots
into --out (default log.dir/sweeps). The numbers come from `runtime.offline.sweep`.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import sys
import time
from pathlib import Path
from typing import Any

from runtime.cli.common import UserError, common_config_args, force_arg, output_folder, verdict_gate
from runtime.config import load_config, rig_name
from runtime.offline.cluster import ClusterError, open_client, parse_cluster, run_sweep_chunked
from runtime.offline.sweep import ENGINES, parse_grid, plot_grid, plot_sweep, run_grid, run_sweep
from runtime.offline.verdict import decide


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments of `corral sweep`."""
    common_config_args(parser)
    parser.add_argument("--plants", type=int, default=None,
                        help="number of plants drawn from [plant.ranges] (default sweep.plants "
                             "or 1000)")
    parser.add_argument("--grid", action="append", default=[], metavar="KEY=v1,v2,...",
                        help="one sweep per setting, e.g. --grid adaptation.gamma=1,2,4,8 "
                             "(repeat once for a 2-D grid)")
    parser.add_argument("--seed", type=int, default=None, help="random seed (default sweep.seed)")
    parser.add_argument("--duration", type=float, default=None,
                        help="simulated seconds per plant (default commands.duration)")
    parser.add_argument("--workers", type=int, default=None,
                        help="threads for the compiled engine, processes for the others "
                             "(default: one per core)")
    parser.add_argument("--chunk", type=int, default=None,
                        help="plants per batch array (default sweep.chunk or 8000)")
    parser.add_argument("--engine", choices=ENGINES, default=None,
                        help="compiled (numba, parallel), fused (batched numpy), reference "
                             "(AdaptiveLaw + Pedestal), or auto (the fastest that can run "
                             "the config)")
    parser.add_argument("--out", type=Path, default=None,
                        help="folder for the PNG plots and the JSON report "
                             "(default log.dir/sweeps)")
    parser.add_argument("--cluster", metavar="ADDRESS|local:N", default=None,
                        help="run the chunks on a Dask scheduler (tcp://HOST:8786) or on a "
                             "local cluster of N worker processes (local:N); needs "
                             "pip install -e '.[cluster]' (docs/sweeps.md)")
    parser.add_argument("--resume", type=Path, default=None, metavar="PARTIAL",
                        help="continue an interrupted sweep from its partial results file "
                             "(same config and settings); only the missing chunks run")
    parser.add_argument("--no-plot", action="store_true", help="skip the PNG plots")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    force_arg(parser)


class ProgressBar:
    """A small progress bar on stderr (only drawn on a terminal)."""

    def __init__(self, label: str = "plants") -> None:
        self.label = label
        self.tty = sys.stderr.isatty()
        self.t0 = time.perf_counter()

    def __call__(self, done: int, total: int) -> None:
        if not self.tty:
            return
        width = 30
        frac = done / max(total, 1)
        bar = "#" * int(width * frac) + "." * (width - int(width * frac))
        el = time.perf_counter() - self.t0
        print(f"\r  {self.label} [{bar}] {done}/{total} {el:5.1f} s", end="", file=sys.stderr,
              flush=True)
        if done >= total:
            print("\r" + " " * 72 + "\r", end="", file=sys.stderr, flush=True)


def _pct(x: float | None) -> str:
    return "n/a" if x is None else f"{100 * x:5.1f} %"


def format_summary(s: dict[str, Any]) -> str:
    """The readable report of one sweep."""
    pc = s.get("margin_ratio_percentiles", {})
    lines = [
        f"corral sweep: {s['plants']} plants, {s['law']} law, gamma {s['gamma_max']:g}, "
        f"eps {s['eps']:.4g}",
        f"  {s['duration']:g} s at {1 / s['sample_period']:g} Hz, latency {s['latency_ticks']} "
        f"ticks, sensor noise {'on' if s['noise'] else 'off'}, engine {s.get('engine')}",
        f"  inside   {_pct(s['inside_fraction'])}   (no rule would trip)",
        f"  tripped  {_pct(s['trip_fraction'])}   first-out: "
        + (", ".join(f"{k} {v}" for k, v in s["trips_by_rule"].items() if v) or "none"),
        f"  diverged {_pct(s['diverged_fraction'])}",
        f"  bound held (ratio < 1 throughout) on {_pct(s['bound_held_fraction'])} of plants",
        "  worst margin ratio: max {} ; p50 {} p90 {} p99 {}".format(
            "n/a" if s["worst_margin_ratio"] is None else f"{s['worst_margin_ratio']:.3f}",
            *(f"{pc[k]:.3f}" if k in pc else "n/a" for k in ("p50", "p90", "p99"))),
        f"  {s['plant_steps_per_second'] / 1e6:.2f} M plant-steps/s, {s['wall_seconds']:.2f} s "
        f"wall, {s['workers']} workers",
    ]
    for c in s["worst_cases"][:3]:
        ratio = "non-finite" if c["max_margin_ratio"] is None else f"{c['max_margin_ratio']:.3f}"
        what = c["outcome"] + (f" ({c['first_rule']} at {c['trip_time']:.3f} s)"
                               if c["first_rule"] else "")
        params = ", ".join(f"{k}={v:.3g}" for k, v in c["params"].items())
        lines.append(f"  worst: plant {c['plant']} ratio {ratio}, {what}; {params}")
    return "\n".join(lines)


def main(args: argparse.Namespace) -> int:
    """Run the sweep (or the grid); exit 0 when every plant stayed inside, else 1.

    A single sweep prints the design verdict first and refuses a refused design unless
    --force; a grid runs every setting (it is how one looks for the window) and the
    refusals it reports are the closed form's."""
    cfg = load_config(args.config, args.overrides)
    kwargs = dict(plants=args.plants, seed=args.seed, duration=args.duration,
                  workers=args.workers, chunk=args.chunk, engine=args.engine)
    out = output_folder(args.out or Path(str(cfg.get("log.dir"))) / "sweeps",
                        "--out" if args.out else "log.dir")
    stamp = time.strftime("%Y%m%d-%H%M%S")
    name = rig_name(cfg)
    bar = ProgressBar()
    if args.grid and (getattr(args, "cluster", None) or getattr(args, "resume", None)):
        raise UserError("--cluster and --resume run one sweep, not a --grid; run one sweep "
                        "per setting (--set KEY=VALUE) or drop --cluster")
    if args.grid:
        axes = parse_grid(args.grid)
        grid = run_grid(cfg, axes, progress=bar, **kwargs)
        report: dict[str, Any] = dict(grid)
        if not args.no_plot:
            report["plot"] = str(plot_grid(grid, out / f"{name}-grid-{stamp}.png"))
        report["report_file"] = _write(out / f"{name}-grid-{stamp}.json", report)
        if args.json:
            print(json.dumps(report, indent=2))
        else:
            for e in grid["grid"]:
                setting = ", ".join(f"{k}={v}" for k, v in e["setting"].items())
                if e["refused"]:
                    print(f"[{setting}] REFUSED: " + "; ".join(e["reasons"]))
                else:
                    print(f"[{setting}] inside {_pct(e['inside_fraction'])}, tripped "
                          f"{_pct(e['trip_fraction'])}, diverged {_pct(e['diverged_fraction'])}, "
                          f"worst ratio {e['worst_margin_ratio']}")
            best = grid["best"]
            print("best setting: " + (", ".join(f"{k}={v}" for k, v in best["setting"].items())
                                      if best else "none (every setting refused)"))
            if "plot" in report:
                print(f"plot: {report['plot']}")
        best = grid["best"]
        return 0 if best and best["inside_fraction"] == 1.0 else 1
    if getattr(args, "cluster", None) or getattr(args, "resume", None):
        try:
            if args.cluster:
                parse_cluster(args.cluster)
        except ClusterError as exc:
            raise UserError(str(exc)) from None

    verdict = decide(cfg, suggest=not args.force)
    if not verdict_gate(verdict, args.force, args.json):
        return 1
    if getattr(args, "cluster", None) or getattr(args, "resume", None):
        result = _run_chunked(cfg, args, out / f"{name}-sweep-{stamp}.partial.jsonl", bar)
    else:
        result = run_sweep(cfg, progress=bar, **kwargs)
    summary = dict(result.summary)
    summary.update(verdict.to_json())
    if not args.no_plot:
        summary["plot"] = str(plot_sweep(result, out / f"{name}-sweep-{stamp}.png"))
    summary["report_file"] = _write(out / f"{name}-sweep-{stamp}.json", summary)
    if args.json:
        print(json.dumps(summary, indent=2))
    else:
        print(format_summary(summary))
        if "plot" in summary:
            print(f"  plot: {summary['plot']}")
    return 0 if summary["inside_fraction"] == 1.0 else 1


def _run_chunked(cfg: Any, args: argparse.Namespace, partial: Path, bar: ProgressBar) -> Any:
    """The sweep in chunks on a Dask cluster (or here, when only resuming), each finished
    chunk appended to a partial results file that --resume reads back."""
    resume = args.resume
    if resume is None:
        print(f"corral: partial results go to {partial} (continue an interrupted sweep with "
              f"--resume {partial})", file=sys.stderr)
    try:
        ctx = open_client(args.cluster) if args.cluster else contextlib.nullcontext(None)
        with ctx as client:
            result = run_sweep_chunked(
                cfg, client, plants=args.plants, seed=args.seed, duration=args.duration,
                chunk=args.chunk, engine=args.engine, threads=args.workers or 1,
                progress=bar, partial=None if resume else partial, resume=resume,
                describe=args.cluster or "here")
    except ClusterError as exc:
        raise UserError(str(exc)) from None
    done = resume or partial
    with contextlib.suppress(OSError):
        Path(done).unlink()  # complete: the report holds the results now
    result.summary["cluster"]["partial_file"] = None
    return result


def _write(path: Path, obj: dict[str, Any]) -> str:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(obj, indent=2))
    return str(path)
