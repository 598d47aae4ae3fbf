"""Wall time of `corral tune` for a stated budget (prints figures; no assertions).

Budget: 12 trials, 16 plants per trial, 10 s of the pitch stand's commands per plant,
gains, clamp margin and eps searched; the baseline measured in the same run is one sweep of
the same 16 plants, so the ratio says how many sweeps a search costs.
"""

from __future__ import annotations

import time
from pathlib import Path

from runtime.config import load_config
from runtime.offline.sweep import run_sweep
from runtime.offline.tune import tune

ROOT = Path(__file__).resolve().parent.parent
TRIALS, PLANTS = 12, 16


def main() -> None:
    cfg = load_config(ROOT / "configs" / "pitch-stand.toml",
                      ["commands.duration=10.0", "log.dir=/tmp/corral-bench-tune"])
    run_sweep(cfg, plants=2)  # compile or load the kernel outside the timings
    t0 = time.perf_counter()
    run_sweep(cfg, plants=PLANTS)
    sweep_s = time.perf_counter() - t0
    t0 = time.perf_counter()
    res = tune(cfg, trials=TRIALS, plants=PLANTS, seed=1)
    tune_s = time.perf_counter() - t0
    feasible = sum(c.feasible for c in res.candidates)
    print(f"budget: {TRIALS} trials x {PLANTS} plants x 10 s simulated, then a confirming "
          f"sweep of preflight.plants")
    print(f"one sweep of {PLANTS} plants: {sweep_s:.2f} s")
    print(f"corral tune: {tune_s:.1f} s wall ({tune_s / sweep_s:.0f} sweeps), "
          f"{feasible}/{len(res.candidates)} feasible, best "
          f"{None if res.best is None else res.best.settings}")


if __name__ == "__main__":
    main()
