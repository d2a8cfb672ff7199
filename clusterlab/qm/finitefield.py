"""Dipole and polarizability changes of excited states by finite fields,
with the engine itself (the energy model and the fit are described in
:mod:`clusterlab.electrostatics.stark`)."""

from __future__ import annotations

from typing import Any, Callable, Sequence

import numpy as np
import numpy.typing as npt

from ..cluster import Cluster
from ..electrostatics.stark import FIELD_DIRECTIONS, StarkFit, uniform_field_charges
from ..errors import InputError
from ..units import COULOMB_EV_A, DEBYE_E_A
from .engine import excitations
from .method import require_method

FloatArray = npt.NDArray[np.float64]

__all__ = ["differential_polarizability"]


def differential_polarizability(
    symbols: Sequence[str],
    positions_A: npt.ArrayLike,
    method: Any,
    *,
    states: Sequence[str] = ("S1", "T1"),
    steps_V_A: Sequence[float] = (0.1, 0.2),
    charge: int = 0,
    on_field: Callable[[], Any] | None = None,
) -> StarkFit:
    """Δμ and Δα of excited states from the engine's energies in uniform fields.

    Fields ``±h·u`` for every step h and the six directions u (x, y, z and the
    face diagonals), plus the zero field: ``1 + 12 len(steps_V_A)`` engine
    calculations. One linear least-squares fit of all energies to
    ``E0 - (u·Δμ) s - 1/2 (u·Δα·u) s^2`` (a common E0, a slope and a curvature
    per direction) gives Δμ (the slopes along x, y, z) and the full tensor Δα.

    Parameters
    ----------
    symbols : sequence of str
    positions_A : array_like (n, 3)
    method : clusterlab.Method
        Any method of :func:`clusterlab.qm.engine.excitations` (TDA, sTDA, ...);
        it needs singlets for "S1" and triplets for "T1".
    states : sequence of {"S1", "T1"}
    steps_V_A : sequence of float
        Field strengths (V/Å). The default 0.1 and 0.2 V/Å span the fields a
        molecule meets in an organic film (the model's ``field_V_A`` column),
        so the fit gives the response where it is used; it also keeps the
        curvature above the meV-scale steps of methods whose energies are not
        smooth in the field (sTDA selects configurations by thresholds: on the
        demo molecule a 0.02 V/Å step gave curvatures of the wrong sign).
        Quartic terms enter the fitted curvature in proportion to s^2.
    charge : int
    on_field : callable, optional
        Called with no arguments after each engine calculation (progress bars).

    The SCF and response thresholds are tightened to at most 1e-11 Eh and 1e-6.

    Returns
    -------
    StarkFit
        S1 and T1 are the lowest roots (adiabatic states), as in the engine's
        ``S1_shift_eV``: the level repulsion from a nearby S2 is part of their
        curvature. ``curvature_eA2_per_V`` holds the six fitted ``u·Δα·u``.

    Raises
    ------
    InputError
        Unknown state, a state the method does not compute, or bad steps.
    """
    require_method(method, "differential_polarizability")
    states = tuple(states)
    bad = [s for s in states if s not in ("S1", "T1")]
    if bad or not states:
        raise InputError(f"states {list(states)!r} are invalid; finite-field fits know 'S1' and 'T1'.")
    if "S1" in states and method.n_singlets < 1 or "T1" in states and method.n_triplets < 1:
        raise InputError(f"the method computes {method.n_singlets} singlets and {method.n_triplets} triplets; "
                         f"states {list(states)} need at least one of each kind asked for.")
    steps = np.asarray(steps_V_A, dtype=np.float64).ravel()
    if steps.size == 0 or not np.all(np.isfinite(steps) & (steps > 0)):
        raise InputError(f"steps_V_A must be positive numbers of V/Å; got {steps_V_A!r}.")
    # excitation energies carry the orbitals' error to first order: converge tighter than usual
    m = method.replace(charged_states=False, conv_tol=min(method.conv_tol, 1e-11),
                       response_conv_tol=min(method.response_conv_tol, 1e-6))
    pos = np.asarray(positions_A, dtype=np.float64)
    syms = [str(s) for s in symbols]
    center = pos.mean(axis=0)

    def run(fld: FloatArray, vac: Any = None):
        p, q = uniform_field_charges(center, fld)
        c = Cluster.from_arrays(syms, pos, p, q, qm_charge=charge)
        res = excitations(c, m) if vac is None else excitations(c, m, vacuum=vac, guess=vac)
        if on_field is not None:
            on_field()
        return res

    def energies(res: Any) -> dict[str, float]:
        s = res.summary()
        return {st: float(s[f"{st}_eV"]) for st in states}

    zero = run(np.zeros(3))
    ok = bool(zero.converged)
    rows = [(None, 0.0, energies(zero))]
    for k, u in enumerate(FIELD_DIRECTIONS):
        for h in steps:
            for sign in (1.0, -1.0):
                r = run(sign * h * u, zero)
                ok &= bool(r.converged)
                rows.append((k, sign * h, energies(r)))
    # design: [E0, slope_k (6), curvature_k (6)]
    a = np.zeros((len(rows), 13))
    a[:, 0] = 1.0
    for n, (k, s, _) in enumerate(rows):
        if k is not None:
            a[n, 1 + k] = -s
            a[n, 7 + k] = -0.5 * s * s
    dalpha, dmu, curv, e0 = {}, {}, {}, {}
    for st in states:
        y = np.array([e[st] for _, _, e in rows])
        coef = np.linalg.lstsq(a, y, rcond=None)[0]
        c = coef[7:]
        t = np.diag(c[:3])
        for (i, j), v in zip(((0, 1), (0, 2), (1, 2)), c[3:]):
            t[i, j] = t[j, i] = v - 0.5 * (c[i] + c[j])
        dalpha[st] = t * COULOMB_EV_A
        dmu[st] = coef[1:4] / DEBYE_E_A
        curv[st] = c
        e0[st] = float(rows[0][2][st])
    return StarkFit(symbols=syms, positions_A=pos, method=m.to_dict(), states=states, dalpha_A3=dalpha,
                    dmu_D=dmu, energy_eV=e0, step_V_A=float(steps.max()), converged=ok, curvature_eA2_per_V=curv)
