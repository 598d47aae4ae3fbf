"""The design calculator: baseline gains, reference model, P, eps and the sampled-data checks.

Plain functions on numpy arrays (`lqr`, `tracking_gain`, `lyapunov`,
`eps_from_limits`, `zoh`) and `design_from_config`, which ties them together
for a rig and returns a frozen `Design`. Dimension and feasibility problems
raise `ConfigError` naming the config field and the fix.

The plain functions live in `runtime.method.gains` (K1, K2, P, eps) and
`runtime.method.sampled` (ZOH, the sampled-data closed form), the nominal model in
`runtime.method.rig` (`RigModel`, `rig_model`); this module re-exports them. The
report in words: `runtime.method.design_report`.

What does not live here: the update law that uses the design (`runtime.method.law`)
and anything that does I/O.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from numpy.typing import NDArray

from runtime.config import Config, ConfigError
from runtime.method.barrier import BARRIERS, get_barrier
from runtime.method.basis import Basis, basis_from_config
from runtime.method.bound import schedule_from_config
from runtime.method.gains import (
    Poles,
    controllability_rank,
    eps_from_limits,
    lqr,
    lyapunov,
    tracking_gain,
)
from runtime.method.rbf import coverage, envelope_points, residual_eps
from runtime.method.rig import RigModel, rig_model
from runtime.method.sampled import SAMPLED_LIMIT, sampled_spectral_radius, zoh

__all__ = [
    "INPUT_SCALES", "SAMPLED_LIMIT", "Design", "Poles", "RigModel", "controllability_rank",
    "design_from_config", "eps_from_limits", "input_regressor_scale", "lqr", "lyapunov",
    "rig_model", "sampled_spectral_radius", "tracking_gain", "zoh",
]

Array = NDArray[np.float64]


INPUT_SCALES = ("u_max", "none")


def input_regressor_scale(cfg: Config, rig: RigModel) -> Array:
    """`adaptation.input_regressor_scale`: "u_max" (default), "none", a number or one per input.

    The augmented regressor carries u_n / scale. With "u_max" every entry is at most 1,
    the size of the basis terms over a unit operating range, so one scalar gamma suits
    them all; the effectiveness weights then learn (u_max / 1)^2 times slower than with
    "none" at the same gamma (docs/sampled-data.md, "Choices").
    """
    key = "adaptation.input_regressor_scale"
    raw = cfg.get(key)
    if raw == "u_max":
        return np.asarray(rig.input_limits, dtype=float)
    if raw == "none":
        return np.ones(rig.m)
    if isinstance(raw, str):
        raise ConfigError(key, f"unknown scale {raw!r}.",
                          'use "u_max", "none", a positive number or one per input.')
    return np.broadcast_to(cfg.vector(key, rig.m, positive=True), (rig.m,)).astype(float)


# ---------------------------------------------------------------- the design
@dataclass(frozen=True)
class Design:
    """Everything the runtime needs from the design step, plus the checks."""

    rig: RigModel
    basis: Basis
    Q: Array
    R_u: Array
    R: Array
    K1: Array
    K2: Array
    A_r: Array
    B_r: Array
    P: Array
    PB: Array
    limits: Array
    eps: float
    eps_from_limits: float
    binding_state: str
    envelope: Array
    poles: Poles
    c_bar: float
    Ts: float
    A_d: Array
    B_d: Array
    law: str
    barrier: str
    gamma: Array
    clamp_margin: float
    augment: bool
    state_range: Array
    regressor_bound: float
    lam_max_BPB: float
    step_gain: float
    step_gain_at_trip: float
    step_gain_cap: float
    feasible: bool
    reasons: tuple[str, ...]
    warnings: tuple[str, ...]
    extras: dict[str, Any] = field(default_factory=dict)
    input_scale: Array | None = None
    """The nominal input enters the augmented regressor as u_n / input_scale (m,);
    `adaptation.input_regressor_scale`. None: the input limits (the default)."""
    sampled_radius: float = 0.0
    """Spectral radius of the one-tick map at the nominal gain (`sampled_spectral_radius`)."""

    @property
    def n_regressors(self) -> int:
        """Regressor length N_bar (basis terms plus the augmentation)."""
        return self.basis.size + (self.rig.m if self.augment else 0)

    def to_json(self) -> dict[str, Any]:
        """A JSON-ready dict with the documented keys (units in `units`)."""

        def mat(M: Array) -> Any:
            return np.asarray(M).tolist()

        poles = [[float(p.real), float(p.imag)] for p in self.poles]
        out = {
            "rig": self.rig.name,
            "states": list(self.rig.states),
            "state_units": list(self.rig.state_units),
            "inputs": list(self.rig.inputs),
            "A": mat(self.A), "B": mat(self.rig.B), "C": mat(self.rig.C),
            "K1": mat(self.K1), "K2": mat(self.K2), "A_r": mat(self.A_r), "B_r": mat(self.B_r),
            "P": mat(self.P), "R": mat(self.R), "Q": mat(self.Q), "R_u": mat(self.R_u),
            "limits": mat(self.limits),
            "eps": self.eps, "eps_from_limits": self.eps_from_limits,
            "binding_state": self.binding_state,
            "envelope": mat(self.envelope),
            "poles": poles,
            "c_bar": self.c_bar,
            "sample_period": self.Ts,
            "A_d": mat(self.A_d), "B_d": mat(self.B_d),
            "law": self.law, "barrier": self.barrier,
            "gamma": mat(self.gamma),
            "regressors": list(self.regressor_names),
            "step_gain": self.step_gain,
            "step_gain_at_trip": self.step_gain_at_trip,
            "step_gain_cap": self.step_gain_cap,
            "sampled_radius": self.sampled_radius,
            "input_regressor_scale": mat(self.regressor_scale),
            "feasible": self.feasible,
            "reasons": list(self.reasons),
            "warnings": list(self.warnings),
        }
        out.update(self.extras)
        return out

    @property
    def A(self) -> Array:
        """Nominal A."""
        return self.rig.A

    @property
    def regressor_scale(self) -> Array:
        """Divisor of the nominal input in the augmented regressor (m,)."""
        return self.rig.input_limits if self.input_scale is None else self.input_scale

    @property
    def regressor_names(self) -> tuple[str, ...]:
        """Names of sigma_bar's entries."""
        aug = tuple(f"u_n:{u}" for u in self.rig.inputs) if self.augment else ()
        return self.basis.names + aug


def _sample_box(state_range: Array, count: int, rng: np.random.Generator) -> Array:
    """Points of the operating box: corners (up to 2^n), centre and uniform samples."""
    n = state_range.size
    pts = [np.zeros(n)]
    if n <= 10:
        corners = np.array(np.meshgrid(*[[-1.0, 1.0]] * n, indexing="ij")).reshape(n, -1).T
        pts.extend(corners * state_range)
    pts.extend(rng.uniform(-1, 1, size=(count, n)) * state_range)
    return np.array(pts)


def design_from_config(cfg: Config) -> Design:
    """Run the whole design for a config. Raises ConfigError with a fix on any problem."""
    rig = rig_model(cfg)
    n, m = rig.n, rig.m
    A, B, C = rig.A, rig.B, rig.C
    if controllability_rank(A, B) < n:
        raise ConfigError(
            "rig.B", f"the pair (A, B) is not controllable (rank "
            f"{controllability_rank(A, B)} of {n}); no state feedback can place all poles.",
            "check that every state is reachable from some input (B and A's coupling).",
        )
    Q = cfg.weight_matrix("design.Q", n)
    R_u = cfg.weight_matrix("design.R_u", m)
    R = cfg.weight_matrix("design.R", n)
    K1, _X, poles = lqr(A, B, Q, R_u)
    A_r = A - B @ K1
    if np.max(np.linalg.eigvals(A_r).real) >= 0:
        raise ConfigError("design.Q", "the closed loop A - B K1 is not Hurwitz.",
                          "use positive definite Q and R_u on a stabilisable model.")
    if C.shape[0] != m:
        raise ConfigError("rig.C", f"selects {C.shape[0]} tracked outputs but the rig has "
                          f"{m} inputs; unit DC gain needs as many outputs as inputs.",
                          f"give C with {m} rows.")
    try:
        K2 = tracking_gain(A_r, B, C)
    except np.linalg.LinAlgError:
        raise ConfigError("rig.C", "C A_r^-1 B is singular: the tracked outputs cannot all "
                          "be held at a command.", "track outputs the inputs can move.") from None
    B_r = B @ K2
    P = lyapunov(A_r, R)
    limits = cfg.vector("design.limits", n)
    eps_lim, bind, _env = eps_from_limits(P, limits)
    eps_cfg = cfg.get("adaptation.eps")
    if eps_cfg == "from_limits":
        eps = eps_lim
    else:
        eps = cfg.number("adaptation.eps", positive=True)
    envelope = eps * np.sqrt(np.diag(np.linalg.inv(P)))
    if eps_cfg != "from_limits" and eps > eps_lim * (1 + 1e-9):
        # The guarantee is the ellipsoid e'Pe <= eps^2; its extent on state i is
        # eps sqrt((P^-1)_ii). Beyond design.limits the bound promises nothing the limits
        # ask for, so the design is refused rather than run with a warning.
        worst = int(np.argmax(envelope / limits))
        unit = rig.state_units[worst]
        raise ConfigError(
            "adaptation.eps",
            f"{eps:.4g} gives a guaranteed envelope of +-{envelope[worst]:.3g} {unit} on "
            f"{rig.states[worst]}, beyond its limit {limits[worst]:.3g} {unit} "
            "(design.limits).",
            f"lower adaptation.eps to {eps_lim:.4g} or less (or \"from_limits\"), or widen "
            f"design.limits for {rig.states[worst]}.")
    c_bar = float(np.min(np.linalg.eigvalsh(R)) / np.max(np.linalg.eigvalsh(P)))

    Ts = cfg.number("loop.period")
    A_d, B_d = zoh(A_r, B_r, Ts)

    basis = basis_from_config(cfg, rig.states)
    law = cfg.choice("adaptation.law")
    barrier = cfg.choice("adaptation.barrier", tuple(BARRIERS))
    augment = cfg.flag("adaptation.unknown_effectiveness")
    n_reg = basis.size + (m if augment else 0)
    gamma = cfg.vector("adaptation.gamma", n_reg)
    clamp_margin = cfg.number("adaptation.clamp_margin")
    cap = cfg.number("adaptation.step_gain_cap")

    state_range = (cfg.vector("design.state_range", n)
                   if cfg.has("design.state_range") or rig.spec is None
                   else np.array(rig.spec.state_limits, dtype=float))
    pts = _sample_box(state_range, 2000, np.random.default_rng(1))
    sig = basis.evaluate(pts)
    sq = np.sum(sig * sig, axis=-1)
    input_scale = input_regressor_scale(cfg, rig)
    if augment:  # |u_n_i| <= u_max_i enters as u_n_i / scale_i (the input regressor scale)
        sq = sq + float(np.sum((rig.input_limits / input_scale) ** 2))
    regressor_bound = float(np.sqrt(np.max(sq)))
    lam_bpb = float(np.max(np.linalg.eigvalsh(B.T @ P @ B)))
    phi_d0 = 1.0 / eps if law == "barrier" else 1.0
    bar = get_barrier(barrier)
    trip_level = cfg.number("watchdog.margin_trip")
    phi_d_trip = float(bar.phi_d(trip_level * eps, eps)) if law == "barrier" else 1.0
    g0 = Ts * float(np.max(gamma)) * phi_d0 * regressor_bound**2 * lam_bpb
    g_trip = g0 * phi_d_trip / phi_d0

    reasons: list[str] = []
    warnings: list[str] = []
    # The sampled-data check for the tick order the law runs (update with e_k, then u_k from
    # the new weights): docs/sampled-data.md. The cap is a runtime guard on g, so the loop
    # sees at most min(g, cap); the closed form refuses only what is unstable for certain.
    Phi, Gam = zoh(A, B, Ts)
    rho0 = sampled_spectral_radius(Phi, Gam, K1, P @ B, min(g0, cap) / lam_bpb)
    rho_trip = sampled_spectral_radius(Phi, Gam, K1, P @ B, min(g_trip, cap) / lam_bpb)
    if rho0 >= 1.0:
        scale = 0.5 * (SAMPLED_LIMIT / Ts) / min(g0, cap)
        reasons.append(
            f"the sampled loop is unstable at this period: with the update before the control "
            f"the weights feed e_k straight back into u_k, and Ts * g = {Ts * min(g0, cap):.3g} "
            f"(g = min(per-step gain, step_gain_cap)) reaches the limit {SAMPLED_LIMIT:g} "
            f"(one-tick map spectral radius {rho0:.4f}). Lower adaptation.gamma to about "
            f"{float(np.max(gamma)) * scale:.3g} or adaptation.step_gain_cap to "
            f"{0.5 * SAMPLED_LIMIT / Ts:.3g} or less.")
    elif rho_trip >= 1.0 and law == "barrier":
        warnings.append(
            f"near the trip level ({trip_level:.2f} eps) the sampled loop's one-tick map "
            f"becomes unstable (Ts * g = {Ts * min(g_trip, cap):.3g} >= {SAMPLED_LIMIT:g}); "
            "the watchdog must trip before then. Lower adaptation.step_gain_cap to keep it out.")
    if g0 >= cap:
        warnings.append(
            f"the nominal per-step adaptation gain g = {g0:.3g} is at or above the runtime "
            f"guard adaptation.step_gain_cap = {cap:.3g}: the guard will slow learning below "
            "the configured gamma on many ticks (the verdict's dry run shows whether the "
            "bound still holds).")
    fastest = float(np.max(np.abs(poles)))
    if fastest * Ts > 0.2:
        warnings.append(
            f"the fastest closed-loop pole ({fastest:.3g} rad/s) is within a factor 5 of the "
            f"sample rate ({1 / Ts:.3g} Hz); sampled behaviour will differ from the design."
        )

    design = Design(
        rig=rig, basis=basis, Q=Q, R_u=R_u, R=R, K1=K1, K2=K2, A_r=A_r, B_r=B_r, P=P,
        PB=P @ B, limits=limits, eps=float(eps), eps_from_limits=eps_lim,
        binding_state=rig.states[bind], envelope=envelope, poles=np.linalg.eigvals(A_r),
        c_bar=c_bar, Ts=Ts, A_d=A_d, B_d=B_d, law=law, barrier=barrier, gamma=gamma,
        clamp_margin=clamp_margin, augment=augment, state_range=state_range,
        regressor_bound=regressor_bound, lam_max_BPB=lam_bpb, step_gain=g0,
        input_scale=input_scale, sampled_radius=rho0,
        step_gain_at_trip=g_trip, step_gain_cap=cap, feasible=not reasons,
        reasons=tuple(reasons), warnings=tuple(warnings),
    )
    return _wider_checks(cfg, design)


def _wider_checks(cfg: Config, d: Design) -> Design:
    """Checks of the wider method (time-varying bound, radial basis, residual); additive.

    Appends reasons/warnings and `extras` keys "bound", "rbf_coverage",
    "residual_check"; a config that uses none of these comes back unchanged.
    """
    reasons = list(d.reasons)
    warnings = list(d.warnings)
    extras = dict(d.extras)
    eps_min = eps_max = d.eps
    if cfg.has("adaptation.bound"):
        sched = schedule_from_config(cfg, d)
        eps_min = sched.minimum
        eps_max = max(sched.eps0, float(np.max(sched.values)) if sched.values else sched.eps0)
        extras["bound"] = sched.to_json()
        warnings.extend(f"{note} (adaptation.bound.on_violation = \"rate_limit\")"
                        for note in sched.notes)
        if d.law == "barrier" and eps_min < d.eps:
            g_min = min(d.step_gain * d.eps / eps_min, d.step_gain_cap)
            Phi, Gam = zoh(d.rig.A, d.rig.B, d.Ts)
            rho = sampled_spectral_radius(Phi, Gam, d.K1, d.PB, g_min / d.lam_max_BPB)
            if rho >= 1.0:
                gamma_ok = float(np.max(d.gamma)) * 0.5 * (SAMPLED_LIMIT / d.Ts) / g_min
                reasons.append(
                    f"at the narrowest bound eps = {eps_min:.4g} the sampled loop is unstable "
                    f"(Ts * g = {d.Ts * g_min:.3g} >= {SAMPLED_LIMIT:g}, one-tick map spectral "
                    f"radius {rho:.4f}). Lower adaptation.gamma to about {gamma_ok:.3g} "
                    "or raise adaptation.bound.eps_inf.")
        if eps_max > d.eps_from_limits * (1 + 1e-9):
            warnings.append(
                f"the bound reaches {eps_max:.4g}, wider than the {d.eps_from_limits:.4g} that "
                "fits design.limits: while it is that wide the guaranteed envelope exceeds "
                "the limits.")
    if d.basis.rbf_centres is not None and d.basis.rbf_widths is not None:
        min_act = cfg.number("basis.rbf_min_activation")
        pts = envelope_points(d, cfg, eps_max, zoh(d.A_r, d.B_r, 0.01), 0.01)
        cov = coverage(d.basis.rbf_centres, d.basis.rbf_widths, d.basis.rbf_scale
                       if d.basis.rbf_scale is not None else np.ones(d.rig.n), pts, min_act)
        extras["rbf_coverage"] = cov
        if cov["covered_fraction"] < 1.0:
            worst = ", ".join(f"{s}={v:.3g}" for s, v in
                              zip(d.rig.states, cov["worst_point"], strict=True))
            warnings.append(
                f"the radial-basis grid covers {100 * cov['covered_fraction']:.2f} % of the "
                f"region the bound admits around the commanded reference (activation >= "
                f"{min_act:g}); worst at {worst} (activation {cov['worst_activation']:.2g}). "
                "Widen basis.rbf_span, move basis.rbf_centre, add centres (basis.rbf_per_axis) "
                "or widen basis.rbf_width.")
    d_max = cfg.number("adaptation.d_max")
    if d_max > 0:
        need = residual_eps(d.P, d.rig.B, d.c_bar, d_max)
        ok = eps_min > need
        extras["residual_check"] = {"d_max": d_max, "eps_needed": need, "eps": eps_min, "ok": ok}
        if not ok:
            warnings.append(
                f"residual condition fails: a residual |d| <= {d_max:.3g} (adaptation.d_max) "
                f"needs eps > 2 ||P^1/2 B|| d_max / c_bar = {need:.4g}, the bound is "
                f"{eps_min:.4g}. This sufficient condition is conservative; to meet it widen "
                "the bound (design.limits / adaptation.eps), shrink the residual (a finer "
                "radial grid, more named terms) or raise c_bar = lambda_min(R)/lambda_max(P) "
                "(design.Q and the shape of design.R set it; scaling R alone does not).")
    if len(reasons) == len(d.reasons) and len(warnings) == len(d.warnings) and extras == d.extras:
        return d
    return replace(d, reasons=tuple(reasons), warnings=tuple(warnings), feasible=not reasons,
                   extras=extras)
