"""ESP charges for the electronic states of one molecule at one geometry.

States and their densities:

``S0``
    ground-state SCF density (restricted, closed shell).
``S1``, ``T1``
    **unrelaxed** excited-state densities: ground density plus the TDA
    difference density built from the amplitudes of PySCF's ``mf.TDA()``,
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

from ..errors import ConvergenceError, InputError
from ..versions import software_versions
from ..units import AU_DIPOLE_TO_DEBYE, BOHR_A, DEBYE_E_A, HARTREE_TO_EV
from .espfit import (
    Restraint,
    cubic_points,
    esp_on_points,
    esp_rrms,
    fit_esp_charges,
    shell_points,
    transition_density_ao,
)

FloatArray = npt.NDArray[np.float64]
KNOWN_STATES = ("S0", "S1", "T1", "cation", "anion")
TRANSITION_LABEL = "S0->S1"

__all__ = ["StateCharges", "state_charges", "parse_method", "KNOWN_STATES"]


def parse_method(method_like: Any) -> tuple[str, str]:
    """``(xc, basis)`` from a method description.

    Accepts any object with ``.xc`` and ``.basis`` attributes, a mapping with
    those keys, a pair ``(xc, basis)`` or a string ``"xc/basis"``
    (``"hf/..."`` means Hartree-Fock).

    Raises
    ------
    InputError
        If neither form fits.
    """
    if hasattr(method_like, "xc") and hasattr(method_like, "basis"):
        return str(method_like.xc), str(method_like.basis)
    if isinstance(method_like, dict) and "xc" in method_like and "basis" in method_like:
        return str(method_like["xc"]), str(method_like["basis"])
    if isinstance(method_like, str) and method_like.count("/") == 1:
        xc, basis = method_like.split("/")
        if xc.strip() and basis.strip():
            return xc.strip(), basis.strip()
    if isinstance(method_like, (tuple, list)) and len(method_like) == 2:
        return str(method_like[0]), str(method_like[1])
    raise InputError(
        f"{method_like!r} is not a method description. Use an object with .xc and .basis, "
        "a dict {'xc':..., 'basis':...}, a pair (xc, basis) or a string like 'b3lyp/6-31g'."
    )


def _is_hf(xc: str) -> bool:
    return xc.strip().lower() in ("hf", "rhf", "uhf", "scf")


@dataclass
class StateCharges:
    """Charges per atom per state of one molecule, with metadata.

    Attributes
    ----------
    symbols : list of str; positions_A : ndarray (n, 3)
    method : str ("xc/basis")
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
        )


def _tda_difference_density(mf: Any, x_ia: FloatArray) -> FloatArray:
    c = mf.mo_coeff
    occ = mf.mo_occ > 0
    co, cv = c[:, occ], c[:, ~occ]
    xn = x_ia / np.sqrt(np.sum(x_ia * x_ia))
    return cv @ (xn.T @ xn) @ cv.T - co @ (xn @ xn.T) @ co.T


def state_charges(
    symbols: Sequence[str],
    positions_A: npt.ArrayLike,
    method_like: Any,
    states: Sequence[str] = KNOWN_STATES,
    transition: bool = True,
    *,
    charge: int = 0,
    grid: str = "shells",
    points_A: npt.ArrayLike | None = None,
    restraint: Restraint | None = None,
    equivalent: Any = None,
    conv_tol: float = 1e-9,
    max_cycle: int = 100,
    grid_level: int = 3,
    density_fit: bool = False,
    raise_on_fail: bool = False,
    verbose: int = 0,
    **grid_kw: Any,
) -> StateCharges:
    """ESP charges of a closed-shell molecule in several electronic states.

    Parameters
    ----------
    symbols : sequence of str, length n
    positions_A : array_like, shape (n, 3), Å
    method_like : method description (see :func:`parse_method`)
    states : sequence of {"S0", "S1", "T1", "cation", "anion"}
    transition : bool
        Also fit S0→S1 transition charges.
    charge : int
        Ground-state charge (closed shell required).
    grid, points_A, restraint, equivalent, **grid_kw
        Fit options (see :mod:`clusterlab.electrostatics.espfit`).
    conv_tol, max_cycle : SCF settings.
    grid_level : int
        DFT integration grid level (PySCF ``grids.level``) of every SCF and TDA.
    density_fit : bool
        Density fitting (PySCF default auxiliary basis) for every SCF and TDA.
    raise_on_fail : bool
        Raise :class:`~clusterlab.errors.ConvergenceError` when an SCF or TDA
        step does not converge (default: flag it in ``converged``).

    Returns
    -------
    StateCharges

    Raises
    ------
    InputError
        Unknown state, bad method description, or an open-shell ground state.
    ConvergenceError
        Only with ``raise_on_fail=True``.
    """
    import pyscf  # noqa: F401
    from pyscf import dft, gto, scf

    bad = [s for s in states if s not in KNOWN_STATES]
    if bad:
        raise InputError(f"unknown state(s) {bad}; valid states are {list(KNOWN_STATES)}.")
    xc, basis = parse_method(method_like)
    pos = np.atleast_2d(np.asarray(positions_A, dtype=np.float64))
    syms = [str(s) for s in symbols]
    if len(syms) != len(pos):
        raise InputError(f"{len(syms)} symbols for {len(pos)} positions; they must match.")
    atom = [(s, tuple(p)) for s, p in zip(syms, pos)]
    mol = gto.M(atom=atom, basis=basis, charge=charge, spin=0, unit="Angstrom", verbose=verbose)
    if mol.nelectron % 2:
        raise InputError(f"the ground state with charge {charge} has an odd electron count; "
                         "state_charges needs a closed-shell ground state.")

    def setup(mf: Any) -> Any:
        mf.conv_tol, mf.max_cycle = conv_tol, max_cycle
        if hasattr(mf, "grids"):
            mf.grids.level = grid_level
        return mf.density_fit() if density_fit else mf

    def rks(m: Any):
        return setup(scf.RHF(m) if _is_hf(xc) else dft.RKS(m, xc=xc))

    def uks(m: Any):
        return setup(scf.UHF(m) if _is_hf(xc) else dft.UKS(m, xc=xc))

    def check(ok: bool, what: str) -> bool:
        if not ok and raise_on_fail:
            raise ConvergenceError(f"{what} did not converge with {xc}/{basis}; "
                                   "raise max_cycle or loosen conv_tol.")
        return bool(ok)

    if points_A is not None:
        pts = np.atleast_2d(np.asarray(points_A, float))
    elif grid == "shells":
        pts = shell_points(syms, pos, **grid_kw)
    elif grid == "cubic":
        pts = cubic_points(syms, pos, **grid_kw)
    else:
        raise InputError(f"{grid!r} is an invalid grid. Use 'shells' or 'cubic'.")

    z = mol.atom_charges().astype(float)
    centre_A = (z @ pos) / z.sum()
    with mol.with_common_orig(centre_A / BOHR_A):
        r_ints = mol.intor_symmetric("int1e_r", comp=3)

    def qm_dipole_D(dm: FloatArray, nuclei: bool = True) -> FloatArray:
        el = -np.einsum("xij,ji->x", r_ints, dm)
        if nuclei:
            el = el + z @ ((pos - centre_A) / BOHR_A)
        return el * AU_DIPOLE_TO_DEBYE

    mf0 = rks(mol).run()
    conv0 = check(mf0.converged, "ground-state SCF")
    dm0 = mf0.make_rdm1()
    e0 = float(mf0.e_tot)

    dms: dict[str, FloatArray] = {}
    qtot: dict[str, float] = {}
    energy: dict[str, float] = {}
    converged: dict[str, bool] = {}
    if "S0" in states:
        dms["S0"], qtot["S0"], energy["S0"], converged["S0"] = dm0, float(charge), 0.0, conv0

    x_s1 = None
    td_s = None
    if "S1" in states or transition:
        td_s = mf0.TDA()
        td_s.nstates = 3
        td_s.singlet = True
        td_s.kernel()
        ok = conv0 and check(bool(np.all(td_s.converged)), "singlet TDA")
        x_s1 = np.asarray(td_s.xy[0][0])
        if "S1" in states:
            dms["S1"] = dm0 + _tda_difference_density(mf0, x_s1)
            qtot["S1"], energy["S1"], converged["S1"] = float(charge), float(td_s.e[0]) * HARTREE_TO_EV, ok
    if "T1" in states:
        td_t = mf0.TDA()
        td_t.nstates = 3
        td_t.singlet = False
        td_t.kernel()
        ok = conv0 and check(bool(np.all(td_t.converged)), "triplet TDA")
        dms["T1"] = dm0 + _tda_difference_density(mf0, np.asarray(td_t.xy[0][0]))
        qtot["T1"], energy["T1"], converged["T1"] = float(charge), float(td_t.e[0]) * HARTREE_TO_EV, ok
    for name, dq in (("cation", +1), ("anion", -1)):
        if name not in states:
            continue
        mol_i = gto.M(atom=atom, basis=basis, charge=charge + dq, spin=1, unit="Angstrom", verbose=verbose)
        mf_i = uks(mol_i).run()
        ok = check(mf_i.converged, f"{name} ΔSCF")
        dm = np.asarray(mf_i.make_rdm1())
        dms[name] = dm[0] + dm[1]
        qtot[name] = float(charge + dq)
        energy[name] = (float(mf_i.e_tot) - e0) * HARTREE_TO_EV
        converged[name] = ok

    charges, dip_fit, dip_qm, rrms = {}, {}, {}, {}
    order = [s for s in KNOWN_STATES if s in states]
    for st in order:
        v = esp_on_points(mol, dms[st], pts)
        q = fit_esp_charges(syms, pos, pts, v, qtot[st], restraint=restraint, equivalent=equivalent)
        charges[st] = q
        dip_fit[st] = (q @ (pos - centre_A)) / DEBYE_E_A
        dip_qm[st] = qm_dipole_D(dms[st])
        rrms[st] = esp_rrms(pos, q, pts, v)

    tq = tfit = tqm = None
    if transition and x_s1 is not None:
        tdm = transition_density_ao(mf0, x_s1)
        v = esp_on_points(mol, tdm, pts, include_nuclei=False)
        tq = fit_esp_charges(syms, pos, pts, v, 0.0, restraint=None, equivalent=equivalent)
        tfit = (tq @ (pos - centre_A)) / DEBYE_E_A
        tqm = np.asarray(td_s.transition_dipole()[0]) * AU_DIPOLE_TO_DEBYE

    return StateCharges(
        symbols=syms, positions_A=pos, method=f"{xc}/{basis}", states=tuple(order),
        charges_e=charges, total_charge_e=qtot, dipole_fit_D=dip_fit, dipole_qm_D=dip_qm,
        rrms=rrms, energy_eV=energy, converged=converged, transition_charges_e=tq,
        transition_dipole_fit_D=tfit, transition_dipole_qm_D=tqm, n_points=len(pts),
        versions=software_versions(),
    )
