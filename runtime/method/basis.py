"""Regressor bases sigma(x): named terms built from the rig's state names.

Term vocabulary (state names come from the rig):

- ``bias``            the constant 1
- ``<state>``         the state itself, e.g. ``el``
- ``sin:<state>``, ``cos:<state>``, ``abs:<state>``
- ``tanh:<state>``    tanh(x / basis.tanh_width), a smooth sign for friction
- ``<a>*<b>``         product of two states, e.g. ``az_rate*el_rate``

What lives here: parsing term lists into a `Basis` that evaluates over any
leading batch shape, with an optional radial-basis block appended (built by
`runtime.method.rbf` when `[basis] kind = "rbf"`). What does not: the radial-basis
formulas and checks themselves (`runtime.method.rbf`),
the law that uses the regressor (`runtime.method.law`).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from runtime.config import Config, ConfigError
from runtime.method.rbf import rbf_evaluate, rbf_from_config

Term = Callable[[NDArray[np.float64]], NDArray[np.float64]]

_UNARY: dict[str, Callable[[NDArray[np.float64]], NDArray[np.float64]]] = {
    "sin": np.sin,
    "cos": np.cos,
    "abs": np.abs,
}


@dataclass(frozen=True)
class Basis:
    """A named regressor: `evaluate(x)` maps (..., n) states to (..., N) features."""

    names: tuple[str, ...]
    terms: tuple[Term, ...]
    codes: tuple[tuple[str, int, int], ...] = ()
    """Machine-readable form of each term, (op, i, j), for compiled kernels:
    op in {"bias", "x", "sin", "cos", "abs", "tanh", "mul"}; i, j state indices
    (j only for "mul"); the tanh width is `tanh_width`."""
    tanh_width: float = 0.05
    rbf_centres: NDArray[np.float64] | None = None
    """Radial-basis centres (K, n) over the full state, appended after the named
    terms (`runtime.method.rbf`); None when the basis has no radial block."""
    rbf_widths: NDArray[np.float64] | None = None
    """Radial-basis widths (K,)."""
    rbf_scale: NDArray[np.float64] | None = None
    """Per-state factor (n,) on x - c inside the radial distance: 0 for states the
    grid does not span, w_ref / w_i for those it does (1 with one common width).
    Compiled kernels must multiply each difference by it."""

    @property
    def size(self) -> int:
        """Number of regressor terms N (named terms, then radial terms)."""
        return len(self.names)

    def evaluate(self, x: NDArray[np.float64], out: NDArray[np.float64] | None = None,
                 ) -> NDArray[np.float64]:
        """sigma(x) for x of shape (..., n); writes into `out` when given."""
        x = np.asarray(x, dtype=float)
        if out is None:
            out = np.empty(x.shape[:-1] + (self.size,))
        for i, term in enumerate(self.terms):
            out[..., i] = term(x)
        if self.rbf_centres is not None and self.rbf_widths is not None:
            out[..., len(self.terms):] = rbf_evaluate(x, self.rbf_centres, self.rbf_widths,
                                                      self.rbf_scale)
        return out


def _parse_term(
    term: str, states: Sequence[str], tanh_width: float, key: str
) -> tuple[Term, tuple[str, int, int]]:
    index = {name: i for i, name in enumerate(states)}

    def state(name: str) -> int:
        if name not in index:
            raise ConfigError(
                key, f"unknown basis term {term!r}: no state called {name!r}.",
                f"use one of the states {', '.join(states)}, or 'bias', 'sin:STATE', "
                "'cos:STATE', 'abs:STATE', 'tanh:STATE', 'STATE*STATE'.",
            )
        return index[name]

    if term == "bias":
        return (lambda x: np.ones(x.shape[:-1])), ("bias", 0, 0)
    if ":" in term:
        fn, _, arg = term.partition(":")
        i = state(arg)
        if fn == "tanh":
            w = tanh_width
            return (lambda x: np.tanh(x[..., i] / w)), ("tanh", i, 0)
        if fn in _UNARY:
            f = _UNARY[fn]
            return (lambda x: f(x[..., i])), (fn, i, 0)
        raise ConfigError(key, f"unknown basis term {term!r}: no function {fn!r}.",
                          "use sin, cos, abs or tanh, e.g. 'sin:el'.")
    if "*" in term:
        a, _, b = term.partition("*")
        i, j = state(a), state(b)
        return (lambda x: x[..., i] * x[..., j]), ("mul", i, j)
    i = state(term)
    return (lambda x: x[..., i]), ("x", i, 0)


def basis_from_config(cfg: Config, states: Sequence[str]) -> Basis:
    """Build the basis named in `[basis] terms` for a rig with these state names.

    With `[basis] kind = "rbf"` a Gaussian radial-basis block (`runtime.method.rbf`)
    follows the named terms, which then default to ["bias"].
    """
    kind = cfg.choice("basis.kind")
    if kind == "rbf":
        names = cfg.strings("basis.terms", None, ["bias"])
        width = cfg.number("basis.tanh_width")
        parsed = [_parse_term(n, states, width, "basis.terms") for n in names]
        block = rbf_from_config(cfg, states)
        rbf_names = tuple(f"rbf:{k}" for k in range(block.size))
        return Basis(names=tuple(names) + rbf_names, terms=tuple(p[0] for p in parsed),
                     codes=tuple(p[1] for p in parsed), tanh_width=width,
                     rbf_centres=block.centres, rbf_widths=block.widths,
                     rbf_scale=block.scale)
    names = cfg.strings("basis.terms")
    if not names:
        raise ConfigError("basis.terms", "is empty.", 'list at least one term, e.g. ["bias"].')
    width = cfg.number("basis.tanh_width")
    parsed = [_parse_term(n, states, width, "basis.terms") for n in names]
    return Basis(names=tuple(names), terms=tuple(p[0] for p in parsed),
                 codes=tuple(p[1] for p in parsed), tanh_width=width)
