"""ESP charges for the electronic states of one molecule at one geometry.

States and their densities:

``S0``
    ground-state SCF density (restricted, closed shell).
``S1``, ``T1``
    **unrelaxed** excited-state densities: ground density plus the
    difference density built from the amplitudes of the lowest state of the
    method's response model (the engine's solver, :mod:`clusterlab.qm.calc`),
    :math:`\\Delta D = C_v \\hat X^{\\mathsf T}\\hat X C_v^{\\mathsf T} - C_o \\hat X \\hat X^{\\mathsf T} C_o^{\\mathsf T}`
    (:math:`\\hat X` normalised to 1; spin-summed, the same form for singlet
    and triplet). Orbital relaxation (the Z-vector term) is left out, which
    typically exaggerates the charge-transfer character of the state.
``cation``, ``anion``
    ΔSCF: separate unrestricted SCF (doublet) with one electron removed or
    added, at the same geometry (vertical).
transition charges (S0→S1)
    fitted to the potential of the TDA transition density (total charge 0).

All charges are fitted to the state's potential on the same set of fit points
(:func:`clusterlab.electrostatics.espfit.shell_points` by default).

Mapping onto a film: charges are fitted in the molecule's own geometry and
copied onto each molecule of the type by atom order; conformational changes
are not followed unless the caller refits per geometry.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np
import numpy.typing as npt
import pandas as pd

from ..electrostatics.chargeset import KNOWN_STATES
from ..electrostatics.espfit import Restraint, esp_rrms, fit_esp_charges, fit_points
from ..errors import ConvergenceError, InputError
from ..units import AU_DIPOLE_TO_DEBYE, DEBYE_E_A, HARTREE_TO_EV
from ..versions import software_versions
from .calc import VACUUM, calculate, check_method, dipole_D, ion_states, n_electrons, omp_threads
from .esp import esp_on_points, transition_density_ao
from .method import Method, require_method

FloatArray = npt.NDArray[np.float64]
TRANSITION_LABEL = "S0->S1"

__all__ = ["StateCharges", "state_charges", "KNOWN_STATES"]


@dataclass
class StateCharges:
    """Charges per atom per state of one molecule, with metadata.

    Attributes
    ----------
    symbols : list of str; positions_A : ndarray (n, 3)
    method : str
        ``"xc/basis"`` of the fit (the whole method is in ``method_settings``).
    states : tuple of str
    charges_e : dict state -> ndarray (n,)
    total_charge_e : dict state -> float (imposed in the fit)
    dipole_fit_D, dipole_qm_D : dict state -> ndarray (3,)
        Dipole of the fitted charges and of the QM density, about the centre
        of nuclear charge (so ions are comparable).
    rrms : dict state -> float
        Relative RMS misfit of the fitted potential.
    energy_eV : dict state -> float
        Energy relative to S0 (vertical excitation energy; for the ions the
        ΔSCF ionization energy E(cation)-E(S0) and E(anion)-E(S0)).
    converged : dict state -> bool
    transition_charges_e : ndarray (n,) or None
    transition_dipole_fit_D, transition_dipole_qm_D : ndarray (3,) or None
        Dipole of the transition charges, and PySCF's TDA transition dipole
        (in its sign convention: electrons positive, so the two have opposite
        sign for the same density; the phase of a transition is arbitrary).
    density_kind : str
    n_points : int
    versions : dict
    """

    symbols: list[str]
    positions_A: FloatArray
    method: str
    states: tuple[str, ...]
    charges_e: dict[str, FloatArray]
    total_charge_e: dict[str, float]
    dipole_fit_D: dict[str, FloatArray]
    dipole_qm_D: dict[str, FloatArray]
    rrms: dict[str, float]
    energy_eV: dict[str, float]
    converged: dict[str, bool]
    transition_charges_e: FloatArray | None = None
    transition_dipole_fit_D: FloatArray | None = None
    transition_dipole_qm_D: FloatArray | None = None
    density_kind: str = "S1/T1: unrelaxed TDA difference density; ions: ΔSCF UKS"
    n_points: int = 0
    versions: dict[str, str] = field(default_factory=dict)
    method_settings: dict[str, Any] = field(default_factory=dict)

    def difference(self, state: str) -> FloatArray:
        """``q_state - q_S0`` (e), the charges that drive an environment shift."""
        if state not in self.charges_e or "S0" not in self.charges_e:
            raise InputError(f"state {state!r} (and S0) must be among {list(self.charges_e)}.")
        return self.charges_e[state] - self.charges_e["S0"]

    def to_frame(self) -> pd.DataFrame:
        """Tidy table: ``atom, symbol, state, charge_e, converged``."""
        rows = []
        for st in self.states:
            for i, (s, q) in enumerate(zip(self.symbols, self.charges_e[st])):
                rows.append((i, s, st, float(q), bool(self.converged[st])))
        if self.transition_charges_e is not None:
            ok = bool(self.converged.get("S1", True))
            for i, (s, q) in enumerate(zip(self.symbols, self.transition_charges_e)):
                rows.append((i, s, TRANSITION_LABEL, float(q), ok))
        return pd.DataFrame(rows, columns=["atom", "symbol", "state", "charge_e", "converged"])

    def to_json(self) -> str:
        def arr(d: dict) -> dict:
            return {k: np.asarray(v).tolist() for k, v in d.items()}

        opt = (lambda v: None if v is None else np.asarray(v).tolist())
        return json.dumps({
            "symbols": self.symbols, "positions_A": self.positions_A.tolist(), "method": self.method,
            "states": list(self.states), "charges_e": arr(self.charges_e),
            "total_charge_e": self.total_charge_e, "dipole_fit_D": arr(self.dipole_fit_D),
            "dipole_qm_D": arr(self.dipole_qm_D), "rrms": self.rrms, "energy_eV": self.energy_eV,
            "converged": self.converged, "transition_charges_e": opt(self.transition_charges_e),
            "transition_dipole_fit_D": opt(self.transition_dipole_fit_D),
            "transition_dipole_qm_D": opt(self.transition_dipole_qm_D),
            "density_kind": self.density_kind, "n_points": self.n_points, "versions": self.versions,
            "method_settings": self.method_settings,
        })

    @classmethod
    def from_json(cls, text: str) -> "StateCharges":
        d = json.loads(text)
        npd = (lambda x: {k: np.asarray(v, float) for k, v in x.items()})
        opt = (lambda v: None if v is None else np.asarray(v, float))
        return cls(
            symbols=d["symbols"], positions_A=np.asarray(d["positions_A"], float), method=d["method"],
            states=tuple(d["states"]), charges_e=npd(d["charges_e"]),
            total_charge_e=d["total_charge_e"], dipole_fit_D=npd(d["dipole_fit_D"]),
            dipole_qm_D=npd(d["dipole_qm_D"]), rrms=d["rrms"], energy_eV=d["energy_eV"],
            converged=d["converged"], transition_charges_e=opt(d["transition_charges_e"]),
            transition_dipole_fit_D=opt(d["transition_dipole_fit_D"]),
            transition_dipole_qm_D=opt(d["transition_dipole_qm_D"]),
            density_kind=d["density_kind"], n_points=d["n_points"], versions=d["versions"],
            method_settings=d.get("method_settings", {}),
        )


def difference_density(mo_coeff: FloatArray, mo_occ: FloatArray, x_ia: FloatArray) -> FloatArray:
    """Unrelaxed spin-summed difference density (AO) of a closed-shell
    excitation with amplitudes ``x_ia`` (any normalisation)."""
    occ = np.asarray(mo_occ) > 0
    co, cv = mo_coeff[:, occ], mo_coeff[:, ~occ]
    xn = x_ia / np.sqrt(np.sum(x_ia * x_ia))
    return cv @ (xn.T @ xn) @ cv.T - co @ (xn @ xn.T) @ co.T


def state_charges(
    symbols: Sequence[str],
    positions_A: npt.ArrayLike,
    method: Method,
    states: Sequence[str] = KNOWN_STATES,
    transition: bool = True,
    *,
    charge: int = 0,
    grid: str = "shells",
    points_A: npt.ArrayLike | None = None,
    restraint: Restraint | None = None,
    equivalent: Any = None,
    raise_on_fail: bool = False,
    **grid_kw: Any,
) -> StateCharges:
    """ESP charges of a closed-shell molecule in several electronic states.

    Every QM step goes through the engine's door (:mod:`clusterlab.qm.calc`)
    with ``method``'s settings, exactly as the embedded calculations: the SCF
    (grid, density fitting, fallback), the lowest singlet and triplet from the
    method's response model (TDA by classic Davidson with extra roots, sTDA,
    refined sTDA, ...) on its response grid, and the ions by ΔSCF.

    Parameters
    ----------
    symbols : sequence of str, length n
    positions_A : array_like, shape (n, 3), Å
    method : clusterlab.Method
    states : sequence of {"S0", "S1", "T1", "cation", "anion"}
    transition : bool
        Also fit S0→S1 transition charges.
    charge : int
        Ground-state charge (closed shell required).
    grid, points_A, restraint, equivalent, **grid_kw
        Fit options (see :mod:`clusterlab.electrostatics.espfit`).
    raise_on_fail : bool
        Raise :class:`~clusterlab.errors.ConvergenceError` when an SCF or
        response step does not converge (default: flag it in ``converged``).

    Returns
    -------
    StateCharges

    Raises
    ------
    InputError
        Unknown state, a method that is not a :class:`~clusterlab.Method`, or
        an open-shell ground state.
    ConvergenceError
        Only with ``raise_on_fail=True``.
    """
    require_method(method, "state_charges")
    bad = [s for s in states if s not in KNOWN_STATES]
    if bad:
        raise InputError(f"unknown state(s) {bad}; valid states are {list(KNOWN_STATES)}.")
    pos = np.atleast_2d(np.asarray(positions_A, dtype=np.float64))
    syms = [str(s) for s in symbols]
    if len(syms) != len(pos):
        raise InputError(f"{len(syms)} symbols for {len(pos)} positions; they must match.")
    if n_electrons(syms, charge) % 2:
        raise InputError(f"the ground state with charge {charge} has an odd electron count; "
                         "state_charges needs a closed-shell ground state.")
    check_method(method, syms)
    label = f"{method.xc}/{method.basis}"

    def check(ok: bool, what: str) -> bool:
        if not ok and raise_on_fail:
            raise ConvergenceError(f"{what} did not converge with {label}; raise max_cycle or loosen conv_tol.")
        return bool(ok)

    pts = np.atleast_2d(np.asarray(points_A, float)) if points_A is not None else fit_points(syms, pos, grid, **grid_kw)
    want_s1 = "S1" in states or transition
    n_states = {"singlet": 1 if want_s1 else 0, "triplet": 1 if "T1" in states else 0}
    with omp_threads(method.threads):
        gs = calculate(syms, pos, method, VACUUM, charge=charge, n_states=n_states)
        conv0 = check(gs.converged, "ground-state SCF")
        ions = {}
        wanted_ions = [s for s in ("cation", "anion") if s in states]
        if wanted_ions:
            ions = ion_states(syms, pos, method, VACUUM, neutral=gs, charge=charge, ions=wanted_ions,
                              keep_density=True)
    mol = gs.mol
    z = mol.atom_charges().astype(float)
    centre_A = (z @ pos) / z.sum()

    dm0 = gs.dm
    e0 = float(gs.energy_Eh)
    dms: dict[str, FloatArray] = {}
    qtot: dict[str, float] = {}
    energy: dict[str, float] = {}
    converged: dict[str, bool] = {}
    if "S0" in states:
        dms["S0"], qtot["S0"], energy["S0"], converged["S0"] = dm0, float(charge), 0.0, conv0
    x_s1 = None
    for st, kind in (("S1", "singlet"), ("T1", "triplet")):
        rs = gs.states.get(kind)
        if rs is None or not (st in states or (st == "S1" and transition)):
            continue
        ok = conv0 and check(bool(rs.converged[0]), f"{kind} response")
        x = np.asarray(rs.amplitudes[0])
        if st == "S1":
            x_s1 = x
        if st in states:
            dms[st] = dm0 + difference_density(gs.mo_coeff, gs.mo_occ, x)
            qtot[st], energy[st], converged[st] = float(charge), float(rs.energies_Eh[0]) * HARTREE_TO_EV, ok
    for name, ion in ions.items():
        dms[name] = ion.dm
        qtot[name] = float(ion.charge)
        energy[name] = (ion.energy_Eh - e0) * HARTREE_TO_EV
        converged[name] = check(ion.converged, f"{name} ΔSCF")

    charges, dip_fit, dip_qm, rrms = {}, {}, {}, {}
    order = [s for s in KNOWN_STATES if s in states]
    for st in order:
        v = esp_on_points(mol, dms[st], pts)
        q = fit_esp_charges(syms, pos, pts, v, qtot[st], restraint=restraint, equivalent=equivalent)
        charges[st] = q
        dip_fit[st] = (q @ (pos - centre_A)) / DEBYE_E_A
        dip_qm[st] = np.asarray(dipole_D(mol, dms[st]))  # about the centre of nuclear charge
        rrms[st] = esp_rrms(pos, q, pts, v)

    tq = tfit = tqm = None
    if transition and x_s1 is not None:
        tdm = transition_density_ao(gs.mf, x_s1)
        v = esp_on_points(mol, tdm, pts, include_nuclei=False)
        tq = fit_esp_charges(syms, pos, pts, v, 0.0, restraint=None, equivalent=equivalent)
        tfit = (tq @ (pos - centre_A)) / DEBYE_E_A
        tqm = np.asarray(gs.states["singlet"].transition_dipoles_au[0]) * AU_DIPOLE_TO_DEBYE

    return StateCharges(
        symbols=syms, positions_A=pos, method=label, states=tuple(order),
        charges_e=charges, total_charge_e=qtot, dipole_fit_D=dip_fit, dipole_qm_D=dip_qm,
        rrms=rrms, energy_eV=energy, converged=converged, transition_charges_e=tq,
        transition_dipole_fit_D=tfit, transition_dipole_qm_D=tqm, n_points=len(pts),
        versions=software_versions(), method_settings=method.to_dict(),
    )
