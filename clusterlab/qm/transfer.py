"""Charge-transfer integrals by the projective dimer method (PySCF).

Method (fragment-orbital projection; Valeev et al., J. Am. Chem. Soc. 128,
9882 (2006); Baumeier, Kirkpatrick & Andrienko, Phys. Chem. Chem. Phys. 12,
11103 (2010)):

1. SCF of monomer A, monomer B and the dimer AB with one
   :class:`~clusterlab.Method` (and the same point-charge environment when
   one is given), through the engine's door (:mod:`clusterlab.qm.calc`:
   density fitting, grids, charge smearing and SCF fallback as everywhere).
2. Embed the monomer frontier orbitals in the dimer AO basis (A's AOs come
   first in the dimer, then B's): ``phi_A = [c_A; 0]``, ``phi_B = [0; c_B]``.
3. Project the dimer Fock matrix ``F`` and AO overlap ``S_AO`` on them:
   ``e1 = <A|F|A>``, ``e2 = <B|F|B>``, ``J = <A|F|B>``, ``S = <A|S_AO|B>``.
4. Löwdin-orthogonalise the pair: ``H_eff = S^(-1/2) H S^(-1/2)``, which gives
   ``J_eff = (J - S (e1 + e2)/2) / (1 - S^2)`` and the effective site energies.

``J_hole`` uses the HOMOs, ``J_electron`` the LUMOs. Closed-shell monomers only.
The sign of ``J`` follows the arbitrary phases of the two monomer orbitals
(each SCF fixes its own); rates need only ``|J|`` (Marcus uses ``J^2``).

Model limits: one orbital per molecule (no mixing with HOMO-1 / LUMO+1 of the
monomers beyond what the dimer Fock matrix carries), the monomer orbitals are
those of the isolated (or embedded) monomer, and the result depends on the
functional (more exact exchange gives larger ``|J|``, typically by tens of %).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Any, Sequence

import numpy as np
import numpy.typing as npt

from ..errors import ConvergenceError, InputError
from ..units import HARTREE_TO_EV
from ..versions import software_versions
from .calc import VACUUM, check_method, Embedding, build_molecule, make_scf, n_electrons, omp_threads, run_scf
from .method import Method, require_method

FloatArray = npt.NDArray[np.float64]

__all__ = ["OrbitalCoupling", "TransferIntegrals", "transfer_integrals", "effective_coupling"]


@dataclass(frozen=True)
class OrbitalCoupling:
    """Projected two-orbital Hamiltonian of one frontier-orbital pair (eV).

    Attributes
    ----------
    J_eff_eV : float
        Effective transfer integral after Löwdin orthogonalisation.
    J_eV : float
        Raw ``<A|F|B>`` (non-orthogonal basis).
    S : float
        Overlap ``<A|B>`` of the two monomer orbitals.
    e1_eV, e2_eV : float
        Raw site energies ``<A|F|A>``, ``<B|F|B>``.
    e1_eff_eV, e2_eff_eV : float
        Site energies after Löwdin orthogonalisation.
    """

    J_eff_eV: float
    J_eV: float
    S: float
    e1_eV: float
    e2_eV: float
    e1_eff_eV: float
    e2_eff_eV: float


@dataclass(frozen=True)
class TransferIntegrals:
    """Result of :func:`transfer_integrals`.

    Attributes
    ----------
    hole, electron : OrbitalCoupling
        HOMO/HOMO and LUMO/LUMO projections.
    converged : bool
        All three SCF runs converged (the numbers are kept either way).
    xc, basis : str
    n_env_charges : int
    dimer_mo_energy_eV : tuple of float
        Dimer orbital energies HOMO-1, HOMO, LUMO, LUMO+1 (eV): for a
        symmetric dimer their splittings are ``2 |J_eff|`` in the two-state model.
    monomer_homo_eV, monomer_lumo_eV : tuple of float
        Orbital energies of A and B from their own SCF.
    """

    hole: OrbitalCoupling
    electron: OrbitalCoupling
    converged: bool
    xc: str
    basis: str
    n_env_charges: int
    dimer_mo_energy_eV: tuple[float, ...]
    monomer_homo_eV: tuple[float, float]
    monomer_lumo_eV: tuple[float, float]
    software: dict[str, str] = field(default_factory=dict)

    @property
    def j_hole_eV(self) -> float:
        """Effective hole transfer integral (HOMO/HOMO), eV."""
        return self.hole.J_eff_eV

    @property
    def j_electron_eV(self) -> float:
        """Effective electron transfer integral (LUMO/LUMO), eV."""
        return self.electron.J_eff_eV

    def to_dict(self) -> dict[str, Any]:
        """Plain-JSON dictionary (nested couplings as dicts)."""
        return asdict(self)


def effective_coupling(e1_eV: float, e2_eV: float, J_eV: float, S: float) -> OrbitalCoupling:
    """Löwdin-orthogonalised two-orbital Hamiltonian.

    ``H_eff = S^(-1/2) [[e1, J], [J, e2]] S^(-1/2)`` with ``S = [[1, s], [s, 1]]``;
    its off-diagonal is ``(J - s (e1 + e2)/2) / (1 - s^2)``.

    Raises
    ------
    InputError
        If ``|S| >= 1`` (linearly dependent orbitals).
    """
    if not abs(S) < 1.0:
        raise InputError(f"orbital overlap S must satisfy |S| < 1; got {S!r}.")
    H = np.array([[e1_eV, J_eV], [J_eV, e2_eV]], dtype=np.float64)
    Smat = np.array([[1.0, S], [S, 1.0]])
    w, U = np.linalg.eigh(Smat)
    X = U @ np.diag(w**-0.5) @ U.T
    He = X @ H @ X
    return OrbitalCoupling(
        J_eff_eV=float(He[0, 1]),
        J_eV=float(J_eV),
        S=float(S),
        e1_eV=float(e1_eV),
        e2_eV=float(e2_eV),
        e1_eff_eV=float(He[0, 0]),
        e2_eff_eV=float(He[1, 1]),
    )


def _check_molecule(name: str, symbols: Sequence[str], positions: npt.ArrayLike) -> FloatArray:
    pos = np.asarray(positions, dtype=np.float64)
    if pos.ndim != 2 or pos.shape[1] != 3 or pos.shape[0] != len(symbols) or len(symbols) == 0:
        raise InputError(
            f"{name}: need one (x, y, z) position in Å per symbol; got {len(symbols)} symbols "
            f"and positions of shape {pos.shape}."
        )
    if not np.all(np.isfinite(pos)):
        raise InputError(f"{name}: positions must be finite.")
    return pos


def _closed_shell_scf(symbols: Sequence[str], pos_A: FloatArray, charge: int, method: Method,
                      embedding: Embedding) -> Any:
    if n_electrons(symbols, charge) % 2:
        raise InputError(
            f"the fragment {''.join(symbols)} with charge {charge} has {n_electrons(symbols, charge)} electrons; "
            "transfer_integrals needs closed-shell monomers (an even electron count)."
        )
    mol = build_molecule(symbols, pos_A, method, charge=charge)
    mf = make_scf(mol, method, embedding)
    run_scf(mf, method)
    return mf


def transfer_integrals(
    symbols_A: Sequence[str],
    pos_A: npt.ArrayLike,
    symbols_B: Sequence[str],
    pos_B: npt.ArrayLike,
    method: Method,
    *,
    env_positions: npt.ArrayLike | None = None,
    env_charges: npt.ArrayLike | None = None,
    charge_A: int = 0,
    charge_B: int = 0,
    raise_on_failure: bool = False,
) -> TransferIntegrals:
    """Hole and electron transfer integrals of a dimer, projective method.

    Parameters
    ----------
    symbols_A, symbols_B : sequence of str
        Element symbols of the two molecules.
    pos_A, pos_B : array_like, shape (n_A, 3), (n_B, 3), Å
        Positions in one frame (B already at its minimum image next to A).
    method : clusterlab.Method
        Functional, basis, density fitting, grid, SCF thresholds and the
        Gaussian width of the environment charges, for the monomers and the
        dimer (its excited-state fields are not used).
    env_positions : array_like, shape (n_env, 3), Å, optional
        Point charges around the pair (the same for all three SCF runs).
    env_charges : array_like, shape (n_env,), e, optional
    charge_A, charge_B : int
        Net charges of the closed-shell monomers (usually 0).
    raise_on_failure : bool
        Raise :class:`~clusterlab.errors.ConvergenceError` instead of
        returning ``converged=False``.

    Returns
    -------
    TransferIntegrals

    Raises
    ------
    InputError
        For bad geometry or charges, open-shell monomers.
    ConvergenceError
        If ``raise_on_failure`` and an SCF did not converge.

    Examples
    --------
    >>> import numpy as np
    >>> h2 = np.array([[0, 0, -0.37], [0, 0, 0.37]])
    >>> t = transfer_integrals(["H", "H"], h2, ["H", "H"], h2 + [3.0, 0, 0],
    ...                        Method(xc="hf", basis="sto-3g"))
    >>> t.converged and abs(t.j_hole_eV) > 0
    True
    """

    pa = _check_molecule("pos_A", symbols_A, pos_A)
    pb = _check_molecule("pos_B", symbols_B, pos_B)
    require_method(method, "transfer_integrals")
    if env_positions is None:
        if env_charges is not None:
            raise InputError("env_charges given without env_positions.")
        ep, eq = None, None
    else:
        ep = np.asarray(env_positions, dtype=np.float64).reshape(-1, 3)
        eq = np.asarray(env_charges if env_charges is not None else [], dtype=np.float64).ravel()
        if eq.size != ep.shape[0]:
            raise InputError(
                f"env_charges has {eq.size} values for {ep.shape[0]} env_positions; give one charge per position."
            )
        if not (np.all(np.isfinite(ep)) and np.all(np.isfinite(eq))):
            raise InputError("env_positions and env_charges must be finite.")
    both = np.concatenate([pa, pb])
    dmin = np.min(np.linalg.norm(pa[:, None] - pb[None], axis=-1))
    if dmin < 0.5:
        raise InputError(
            f"an atom of A is {dmin:.3f} Å from an atom of B; the molecules overlap (need > 0.5 Å)."
        )
    check_method(method, list(symbols_A) + list(symbols_B))
    emb = VACUUM if ep is None else Embedding(ep, eq)
    with omp_threads(method.threads):
        mfA = _closed_shell_scf(list(symbols_A), pa, charge_A, method, emb)
        mfB = _closed_shell_scf(list(symbols_B), pb, charge_B, method, emb)
        mfD = _closed_shell_scf(list(symbols_A) + list(symbols_B), both, charge_A + charge_B, method, emb)
    converged = bool(mfA.converged and mfB.converged and mfD.converged)
    if raise_on_failure and not converged:
        raise ConvergenceError(
            f"SCF did not converge (A: {mfA.converged}, B: {mfB.converged}, dimer: {mfD.converged}) "
            f"with {method.xc}/{method.basis}; raise max_cycle or check the geometry."
        )
    naoA = mfA.mol.nao_nr()
    naoD = mfD.mol.nao_nr()
    if naoA + mfB.mol.nao_nr() != naoD:  # pragma: no cover - same basis on the same atoms
        raise InputError("the dimer AO basis is not the union of the monomer bases.")
    F = np.asarray(mfD.get_fock())
    S_ao = np.asarray(mfD.get_ovlp())

    def project(iA: int, iB: int) -> OrbitalCoupling:
        phi = np.zeros((naoD, 2))
        phi[:naoA, 0] = mfA.mo_coeff[:, iA]
        phi[naoA:, 1] = mfB.mo_coeff[:, iB]
        H = phi.T @ F @ phi * HARTREE_TO_EV
        Sp = phi.T @ S_ao @ phi
        # monomer orbitals are normalised in their own basis, so Sp diag = 1
        return effective_coupling(H[0, 0], H[1, 1], 0.5 * (H[0, 1] + H[1, 0]), float(Sp[0, 1]))

    hA = mfA.mol.nelectron // 2 - 1
    hB = mfB.mol.nelectron // 2 - 1
    hD = mfD.mol.nelectron // 2 - 1
    eD = np.asarray(mfD.mo_energy) * HARTREE_TO_EV
    sel = [k for k in (hD - 1, hD, hD + 1, hD + 2) if 0 <= k < eD.size]
    return TransferIntegrals(
        hole=project(hA, hB),
        electron=project(hA + 1, hB + 1),
        converged=converged,
        xc=method.xc,
        basis=method.basis,
        n_env_charges=0 if ep is None else int(ep.shape[0]),
        dimer_mo_energy_eV=tuple(float(eD[k]) for k in sel),
        monomer_homo_eV=(float(mfA.mo_energy[hA] * HARTREE_TO_EV), float(mfB.mo_energy[hB] * HARTREE_TO_EV)),
        monomer_lumo_eV=(
            float(mfA.mo_energy[hA + 1] * HARTREE_TO_EV),
            float(mfB.mo_energy[hB + 1] * HARTREE_TO_EV),
        ),
        software=software_versions(),
    )
