"""Law tick speed: numpy reference `AdaptiveLaw.step` (one plant) vs compiled `FastLaw.step`.

Prints median and p99 microseconds per tick for N_bar = 8 and N_bar = 50
named-term regressors and for a 50-term Gaussian radial basis (bias plus a 7 x 7
grid on the two angles, with the augmented regressor: N_bar = 52), all measured
in the same run on the same measurements, and the ratio. Figures only, no
pass/fail. Run: `python bench/bench_law.py [--ticks 20000]`.

What does not live here: correctness (tests/test_fast.py checks the two agree).
"""

from __future__ import annotations

import argparse
import gc
import time
from pathlib import Path

import numpy as np

from runtime.config import load_config
from runtime.kernels.fast import FastLaw, warm_up
from runtime.method.design import Design, design_from_config
from runtime.method.law import AdaptiveLaw

DEMO = Path(__file__).resolve().parents[1] / "configs" / "pedestal-sim.toml"
STATES = ("az", "el", "az_rate", "el_rate")


def terms(count: int) -> list[str]:
    """`count` basis terms from the vocabulary (repeating once it runs out)."""
    vocab = ["bias", *STATES]
    vocab += [f"{f}:{s}" for f in ("sin", "cos", "abs", "tanh") for s in STATES]
    vocab += [f"{a}*{b}" for a in STATES for b in STATES]
    return [vocab[i % len(vocab)] for i in range(count)]


def design_with(n_reg: int) -> Design:
    """The demo design with n_reg regressors (no augmentation) and a feasible gamma."""
    cfg = load_config(DEMO, [f"basis.terms={terms(n_reg)!r}".replace("'", '"'),
                             "adaptation.unknown_effectiveness=false", "adaptation.gamma=0.05"])
    return design_from_config(cfg)


def design_rbf() -> Design:
    """The demo design with a 50-term radial basis: bias plus 7 x 7 centres over (az, el)."""
    cfg = load_config(DEMO, ['basis.kind="rbf"', 'basis.terms=["bias"]',
                             'basis.rbf_states=["az","el"]', "basis.rbf_per_axis=7",
                             "basis.rbf_span=[1.0,1.0]"])
    return design_from_config(cfg)


def time_calls(fn: object, xs: np.ndarray, cs: np.ndarray) -> np.ndarray:
    """Per-call nanoseconds of fn(x, c) over the given measurements (gc off while timing)."""
    out = np.empty(len(xs))
    clock = time.perf_counter_ns
    gc.disable()
    try:
        for k in range(len(xs)):
            x, c = xs[k], cs[k]
            t0 = clock()
            fn(x, c)  # type: ignore[operator]
            out[k] = clock() - t0
    finally:
        gc.enable()
    return out


def main() -> None:
    """Measure and print the table."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--ticks", type=int, default=20000, help="ticks timed per law")
    args = ap.parse_args()
    compile_s = warm_up()
    rng = np.random.default_rng(0)
    print(f"kernel load/compile: {compile_s:.2f} s (cached after the first run)")
    print(f"{'N_bar':>5} {'law':>22} {'median us':>10} {'p99 us':>8}   (rbf52: 50-term radial "
          "basis + 2 augmented)")
    for label, d in (("8", design_with(8)), ("50", design_with(50)),
                     ("rbf52", design_rbf())):
        n_reg = label
        xs = rng.normal(size=(args.ticks, 4)) * 0.3 * d.limits
        cs = rng.normal(size=(args.ticks, 2)) * 0.1
        ref = AdaptiveLaw(d)
        st = ref.init_state(np.zeros(4))
        fl = FastLaw(d)
        fl.init_state(np.zeros(4))
        t_ref = time_calls(lambda x, c, ref=ref, st=st: ref.step(st, x, c), xs, cs) / 1e3
        t_fast = time_calls(fl.step, xs, cs) / 1e3
        for name, tt in (("numpy AdaptiveLaw.step", t_ref), ("FastLaw.step", t_fast)):
            print(f"{n_reg:>5} {name:>22} {np.median(tt):>10.2f} {np.percentile(tt, 99):>8.2f}")
        print(f"{n_reg:>5} {'ratio numpy/fast':>22} {np.median(t_ref) / np.median(t_fast):>10.1f}"
              f" {np.percentile(t_ref, 99) / np.percentile(t_fast, 99):>8.1f}")


if __name__ == "__main__":
    main()
