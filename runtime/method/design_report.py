"""The design report: a `Design` in words and units, for `corral design`.

What does not live here: the design itself (`runtime.method.design`), the verdict
(`runtime.offline.verdict`, passed in).
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray

from runtime.method.design import Design
from runtime.method.sampled import SAMPLED_LIMIT

Array = NDArray[np.float64]


def format_design(d: Design, verdict: Any = None) -> str:
    """A human-readable design report with units; `verdict` a `runtime.offline.verdict.Verdict`."""
    rig = d.rig
    lines = [
        f"corral design: rig {rig.name!r}" + (f" (simulated {rig.sim})" if rig.sim else ""),
        "  states  " + _named(rig.states, rig.state_units),
        "  inputs  " + _named(rig.inputs, rig.input_units),
        "",
        "Baseline (LQR) gain K1 [input units per state unit]:",
        _indent(_mat(d.K1)),
        "Tracking gain K2 (unit DC gain on the tracked outputs):",
        _indent(_mat(d.K2)),
        "Closed-loop poles of A_r = A - B K1 [rad/s]:",
        _indent(", ".join(_fmt_pole(p) for p in sorted(d.poles, key=lambda z: z.real))),
        "Lyapunov matrix P (A_r' P + P A_r + R = 0):",
        _indent(_mat(d.P)),
        "",
        "Error bound:",
        f"  eps = {d.eps:.5g} (in ||e||_P)"
        + ("" if abs(d.eps - d.eps_from_limits) < 1e-12
           else f"; the limits alone allow {d.eps_from_limits:.5g}"),
        f"  binding state: {d.binding_state} (its limit is reached first)",
        "  per-state limit and guaranteed envelope:",
    ]
    for s, u, lim, env in zip(rig.states, rig.state_units, d.limits, d.envelope, strict=True):
        mark = "  <- binds" if s == d.binding_state else ""
        lines.append(f"    {s:>10}: limit {lim:9.4g} {u:6}  envelope +-{env:9.4g} {u}{mark}")
    lines += [
        f"  c_bar = lambda_min(R)/lambda_max(P) = {d.c_bar:.4g} 1/s",
        *_wider_lines(d),
        "",
        "Sampled-data checks:",
        f"  sample period {d.Ts * 1e3:.4g} ms ({1 / d.Ts:.4g} Hz), reference model by exact ZOH",
        f"  law {d.law}" + (f" (barrier {d.barrier})" if d.law == "barrier" else "")
        + f", gamma max {float(np.max(d.gamma)):.4g}, regressors: {', '.join(d.regressor_names)}",
        f"  regressor bound ||sigma_bar|| <= {d.regressor_bound:.4g} over the operating range",
        f"  sampled loop (update with e_k, then u_k): one-tick map spectral radius "
        f"{d.sampled_radius:.5f} (stable below 1; Ts * g limit {SAMPLED_LIMIT:g})",
        f"  nominal per-step adaptation gain g = {d.step_gain:.4g}; runtime guard "
        f"adaptation.step_gain_cap {d.step_gain_cap:.3g} (at the trip level g = "
        f"{d.step_gain_at_trip:.4g})",
        "",
    ]
    if verdict is None:
        lines.append("Verdict (closed form): " + ("not refused" if d.feasible else "REFUSED"))
        lines += [f"  reason: {r}" for r in d.reasons]
    else:
        lines.append(f"Verdict: {verdict.verdict} (by the {verdict.basis})")
        lines.append(f"  {verdict.reason}")
        if verdict.fix:
            lines.append(f"  fix: {verdict.fix}")
    lines += [f"  warning: {w}" for w in d.warnings]
    lines.append("")
    lines.append("The bound is a continuous-time guarantee, not a hardware guarantee: watch the "
                 "measured margin.")
    return "\n".join(lines)


def _wider_lines(d: Design) -> list[str]:
    """Report lines for the time-varying bound and the radial basis (when present)."""
    lines = []
    b = d.extras.get("bound")
    if b:
        lines.append(f"  bound schedule {b['kind']}: eps0 {b['eps0']:.4g} -> eps_inf "
                     f"{b['eps_inf']:.4g}, narrowing rate {b['alpha']:.4g} 1/s (admissible "
                     f"<= c_bar/2 = {b['alpha_max']:.4g} 1/s)")
    cov = d.extras.get("rbf_coverage")
    if cov:
        lines.append(f"  radial basis: {d.basis.size} terms, covers "
                     f"{100 * cov['covered_fraction']:.2f} % of the admitted region "
                     f"(worst activation {cov['worst_activation']:.2g})")
    res = d.extras.get("residual_check")
    if res:
        lines.append(f"  residual d_max {res['d_max']:.3g}: needs eps > {res['eps_needed']:.4g} "
                     + ("(met)" if res["ok"] else "(NOT met, see warning)"))
    return lines


def _named(names: tuple[str, ...], units: tuple[str, ...]) -> str:
    return ", ".join(f"{s} [{u}]" for s, u in zip(names, units, strict=True))


def _fmt_pole(p: complex) -> str:
    if abs(p.imag) < 1e-9:
        return f"{p.real:.4g}"
    return f"{p.real:.4g}{p.imag:+.4g}j"


def _mat(M: Array) -> str:
    """A matrix for the report (no change to numpy's global print options)."""
    return np.array2string(np.asarray(M), precision=4, suppress_small=True, max_line_width=100)


def _indent(text: str) -> str:
    return "\n".join("  " + line for line in text.splitlines())
