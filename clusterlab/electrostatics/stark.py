"""Dipole and polarizability changes of excited states by finite fields.

In a uniform field F an excitation energy changes as

.. math:: E_X(\\mathbf F) = E_X(0) - \\Delta\\boldsymbol\\mu_X\\cdot\\mathbf F
          - \\tfrac12\\,\\mathbf F\\cdot\\Delta\\boldsymbol\\alpha_X\\cdot\\mathbf F + O(F^3)

(the quadratic Stark effect; :math:`\\Delta\\mu = \\mu_X - \\mu_{S0}`,
:math:`\\Delta\\alpha = \\alpha_X - \\alpha_{S0}`). :func:`differential_polarizability`
measures :math:`\\Delta\\mu` and the full tensor :math:`\\Delta\\alpha` with the
project's own excited-state engine (:func:`clusterlab.qm.engine.excitations`,
so TDA, sTDA, ... exactly as in the embedded calculations), by a least-squares
fit of the energies in fields of two strengths along the three axes and the
three face diagonals (25 calculations). The uniform field is made by two opposite point charges
2000 Å away on either side of the molecule; their field deviates from
uniform by about ``3 (r/D)^2`` (2e-5 over a 5 Å molecule).

The first-order term is what ESP-fitted difference charges already give
(``sum (q_X - q_S0) V``); the second-order term is what a model built from
fixed charges cannot give, and what dominates the environment shift of bright
pi->pi* states of symmetric molecules (their Δμ is small, their Δα large).

Units: V/Å, e·Å, Å³ (volume polarizability, α/(4π ε0)); ``k_e`` =
:data:`clusterlab.units.COULOMB_EV_A` converts: energy (eV) =
``-1/2 F·Δα·F / k_e`` with F in V/Å and Δα in Å³.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Any, Callable, Sequence

import numpy as np
import numpy.typing as npt

from ..errors import InputError
from ..units import COULOMB_EV_A, DEBYE_E_A

FloatArray = npt.NDArray[np.float64]

__all__ = ["StarkFit", "differential_polarizability", "stark_energy_eV", "uniform_field_charges"]

#: distance (Å) of the two charges that make the uniform field
FIELD_CHARGE_DISTANCE_A = 2000.0
_DIRECTIONS = np.array([[1.0, 0, 0], [0, 1.0, 0], [0, 0, 1.0],
                        [1.0, 1.0, 0], [1.0, 0, 1.0], [0, 1.0, 1.0]])
_DIRECTIONS[3:] /= np.sqrt(2.0)


def uniform_field_charges(center_A: npt.ArrayLike, field_V_A: npt.ArrayLike,
                          distance_A: float = FIELD_CHARGE_DISTANCE_A) -> tuple[FloatArray, FloatArray]:
    """Two opposite point charges whose field at ``center_A`` is ``field_V_A``.

    Returns
    -------
    positions_A : ndarray (2, 3) (empty (0, 3) for a zero field)
    charges_e : ndarray (2,)

    Examples
    --------
    >>> p, q = uniform_field_charges([0, 0, 0], [0.1, 0, 0])
    >>> e = COULOMB_EV_A * np.sum(q[:, None] * (0 - p) / np.linalg.norm(p, axis=1)[:, None] ** 3, axis=0)
    >>> np.round(e, 12).tolist()
    [0.1, 0.0, 0.0]
    """
    f = np.asarray(field_V_A, dtype=np.float64)
    c = np.asarray(center_A, dtype=np.float64)
    mag = float(np.linalg.norm(f))
    if mag == 0.0:
        return np.zeros((0, 3)), np.zeros(0)
    u = -f / mag                         # the field points from +Q to -Q: +Q sits at c + D u
    q = mag * distance_A**2 / (2.0 * COULOMB_EV_A)
    return np.array([c + distance_A * u, c - distance_A * u]), np.array([q, -q])


def stark_energy_eV(dalpha_A3: npt.ArrayLike, field_V_A: npt.ArrayLike) -> FloatArray:
    """Second-order Stark energy ``-1/2 F·Δα·F`` (eV) for fields (..., 3) in V/Å
    and tensors (..., 3, 3) in Å³ (broadcast).

    Examples
    --------
    A 14.3996 Å³ polarizability increase in 1 V/Å lowers the energy by 0.5 eV:

    >>> float(stark_energy_eV(np.eye(3) * COULOMB_EV_A, [1.0, 0, 0]))
    -0.5
    """
    a = np.asarray(dalpha_A3, dtype=np.float64)
    f = np.asarray(field_V_A, dtype=np.float64)
    return -0.5 * np.einsum("...i,...ij,...j->...", f, a, f) / COULOMB_EV_A


@dataclass
class StarkFit:
    """Finite-field dipole and polarizability changes of excited states.

    Attributes
    ----------
    symbols : list of str
    positions_A : ndarray (n, 3)
        Geometry of the calculation (the frame the tensors refer to).
    method : dict
        The engine method (``Method.to_dict()``).
    states : tuple of str ("S1", "T1")
    dalpha_A3 : dict state -> ndarray (3, 3)
        ``alpha_X - alpha_S0`` (Å³).
    dmu_D : dict state -> ndarray (3,)
        ``mu_X - mu_S0`` from the first derivative (D).
    energy_eV : dict state -> float
        Zero-field excitation energy.
    step_V_A : float
        Largest field of the fit (V/Å).
    converged : bool
    curvature_eA2_per_V : dict state -> ndarray (6,)
        ``u·Δα·u`` (e Å²/V) along the six directions (x, y, z, xy, xz, yz).
    """

    symbols: list[str]
    positions_A: FloatArray
    method: dict[str, Any]
    states: tuple[str, ...]
    dalpha_A3: dict[str, FloatArray]
    dmu_D: dict[str, FloatArray]
    energy_eV: dict[str, float]
    step_V_A: float
    converged: bool
    curvature_eA2_per_V: dict[str, FloatArray] = field(default_factory=dict)

    def energy_change_eV(self, state: str, field_V_A: npt.ArrayLike, rotation: npt.ArrayLike | None = None
                         ) -> FloatArray:
        """``-Δμ·F - 1/2 F·Δα·F`` (eV) of ``state`` in fields (..., 3) (V/Å);
        ``rotation`` (3, 3) turns the fitted geometry's frame into the field's."""
        r = np.eye(3) if rotation is None else np.asarray(rotation, float)
        a = r @ self.dalpha_A3[state] @ r.T
        mu = r @ self.dmu_D[state] * DEBYE_E_A
        f = np.asarray(field_V_A, float)
        return -f @ mu + stark_energy_eV(a, f)

    def to_json(self) -> str:
        return json.dumps({
            "kind": "clusterlab.StarkFit", "symbols": self.symbols, "positions_A": self.positions_A.tolist(),
            "method": self.method, "states": list(self.states),
            "dalpha_A3": {k: np.asarray(v).tolist() for k, v in self.dalpha_A3.items()},
            "dmu_D": {k: np.asarray(v).tolist() for k, v in self.dmu_D.items()},
            "energy_eV": self.energy_eV, "step_V_A": self.step_V_A, "converged": self.converged,
            "curvature_eA2_per_V": {k: np.asarray(v).tolist() for k, v in self.curvature_eA2_per_V.items()},
        })

    @classmethod
    def from_json(cls, text: str) -> "StarkFit":
        d = json.loads(text)
        if d.get("kind") != "clusterlab.StarkFit":
            raise InputError("this JSON is not a finite-field fit (kind 'clusterlab.StarkFit').")
        arr = (lambda x: {k: np.asarray(v, float) for k, v in x.items()})
        return cls(symbols=list(d["symbols"]), positions_A=np.asarray(d["positions_A"], float), method=d["method"],
                   states=tuple(d["states"]), dalpha_A3=arr(d["dalpha_A3"]), dmu_D=arr(d["dmu_D"]),
                   energy_eV={k: float(v) for k, v in d["energy_eV"].items()}, step_V_A=float(d["step_V_A"]),
                   converged=bool(d["converged"]), curvature_eA2_per_V=arr(d.get("curvature_eA2_per_V", {})))


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
    from ..cluster import Cluster
    from ..qm.engine import excitations
    from ..qm.method import Method

    if not isinstance(method, Method):
        raise InputError(f"method must be a clusterlab.Method; got {type(method).__name__}.")
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
    for k, u in enumerate(_DIRECTIONS):
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
