"""Dipole and polarizability changes of excited states by finite fields.

In a uniform field F an excitation energy changes as

.. math:: E_X(\\mathbf F) = E_X(0) - \\Delta\\boldsymbol\\mu_X\\cdot\\mathbf F
          - \\tfrac12\\,\\mathbf F\\cdot\\Delta\\boldsymbol\\alpha_X\\cdot\\mathbf F + O(F^3)

(the quadratic Stark effect; :math:`\\Delta\\mu = \\mu_X - \\mu_{S0}`,
:math:`\\Delta\\alpha = \\alpha_X - \\alpha_{S0}`). :func:`differential_polarizability`
measures :math:`\\Delta\\mu` and the full tensor :math:`\\Delta\\alpha` with the
project's own excited-state engine (:func:`clusterlab.qm.finitefield.differential_polarizability`,
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
from typing import Any

import numpy as np
import numpy.typing as npt

from ..errors import InputError
from ..units import COULOMB_EV_A, DEBYE_E_A

FloatArray = npt.NDArray[np.float64]

__all__ = ["StarkFit", "stark_energy_eV", "uniform_field_charges", "FIELD_DIRECTIONS"]

#: distance (Å) of the two charges that make the uniform field
FIELD_CHARGE_DISTANCE_A = 2000.0
FIELD_DIRECTIONS = np.array([[1.0, 0, 0], [0, 1.0, 0], [0, 0, 1.0],
                        [1.0, 1.0, 0], [1.0, 0, 1.0], [0, 1.0, 1.0]])
FIELD_DIRECTIONS[3:] /= np.sqrt(2.0)


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
