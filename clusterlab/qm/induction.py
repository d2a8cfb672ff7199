"""Induced dipoles of the environment, solved with the QM density (cppe through PySCF).

This is the polarizable half of :class:`~clusterlab.qm.calc.Embedding`, used
only by :func:`~clusterlab.qm.calc.make_scf`. The model is the film model's
Thole model (:mod:`clusterlab.electrostatics.thole`), now solved together
with the QM density instead of with fixed charges:

* every atom of a polarizable environment molecule carries an isotropic
  polarizability (van Duijnen & Swart 1998 exponential Thole set) and an
  induced dipole;
* the dipoles feel the field of the QM nuclei and electrons (undamped), the
  permanent charges of *other* molecules (undamped, as in the film model:
  a molecule's own charges already describe its own density) and all other
  dipoles, including those of their own molecule, through the
  exponentially damped dipole tensor (``a = 2.1304``), so that each
  molecule has the anisotropic polarizability of that published model;
* the QM region feels the permanent charges exactly as in the fixed-charge
  embedding (PySCF ``qmmm``, Gaussian-smeared by the method's
  ``charge_smearing_A``) plus the potential of the induced dipoles; the
  SCF energy gains the polarization energy ``-1/2 sum_i mu_i . E0_i``.

So "polarizable minus fixed charges" on the same cluster is purely the
induction, with the same static electrostatics on both sides.

How cppe is used (version 0.3.4, ``pyscf.solvent.pol_embed``): cppe reads
its environment only from a potential file, and one exclusion list per site
governs both the permanent field and the dipole-dipole coupling. To exclude
a molecule's own charges while keeping its internal dipole coupling, each
polarizable atom appears twice at the same position: a *dipole site*
(polarizability, zero charge) and a *charge site* (its charge, no
polarizability). Dipole sites come first (cppe 0.3.4 mixes up induced
dipoles when charge-only sites precede polarizable ones); each dipole site
excludes every charge site of its own molecule copy and each of those charge
sites lists the dipole sites back (both directions). Charge-only molecules
(the outer layer) appear once, as charge sites, and need no list. cppe's own
electrostatic potential on the QM region is switched off
(:class:`InducedDipoleSolvent`): the charges reach the QM region through
``qmmm`` only, and cppe's charge sites serve only the field at the dipoles.
The file lives in a temporary directory owned by the solvent object (cppe
re-reads it on reset), so it stays as long as the SCF object does.

The induced-dipole threshold of cppe is an absolute norm over all sites
(atomic units), so the iteration limit grows with the number of dipoles
(:func:`induced_dipole_options`).
"""

from __future__ import annotations

import os
import tempfile
from typing import Any

import numpy as np
import numpy.typing as npt

from ..electrostatics.thole import THOLE_EXP_A
from ..errors import InputError
from ..units import A_TO_BOHR

FloatArray = npt.NDArray[np.float64]

#: Induced-dipole convergence of cppe: norm of the change of all dipoles
#: between iterations (e·bohr), cppe's default.
INDUCED_THRESH_AU = 1e-8


def induced_dipole_options(n_dipoles: int) -> dict[str, Any]:
    """cppe options of the model above for ``n_dipoles`` polarizable sites.

    The iteration limit grows with the site count because the threshold is
    an absolute norm over all sites: 100 iterations plus one per 20 sites.
    """
    return {"damp_induced": True, "damping_factor_induced": THOLE_EXP_A, "damp_multipole": False,
            "induced_thresh": INDUCED_THRESH_AU, "maxiter": 100 + int(n_dipoles) // 20,
            "summation_induced_fields": "direct"}


def potential_file_text(positions_A: FloatArray, charges_e: FloatArray, polarizabilities_A3: FloatArray,
                        groups: npt.NDArray[np.int64]) -> str:
    """The cppe potential file of an environment (see the module notes).

    Parameters
    ----------
    positions_A : ndarray, shape (n, 3), Å
    charges_e : ndarray, shape (n,), e
    polarizabilities_A3 : ndarray, shape (n,), Å³
        0 for a charge-only atom.
    groups : ndarray of int, shape (n,)
        Molecule copy of each atom (a periodic image is its own copy); a
        polarizable atom is kept out of the field of its own copy's charges.
    """
    pos = np.asarray(positions_A, dtype=np.float64).reshape(-1, 3)
    q = np.asarray(charges_e, dtype=np.float64).reshape(-1)
    alpha = np.asarray(polarizabilities_A3, dtype=np.float64).reshape(-1)
    grp = np.asarray(groups, dtype=np.int64).reshape(-1)
    pol = np.flatnonzero(alpha > 0)
    n_dip, n = len(pol), len(pos)
    # 1-based site numbers: dipole sites 1..n_dip, then charge site of atom j at n_dip + 1 + j
    lines = ["! clusterlab environment: dipole sites first, then charge sites", "@COORDINATES",
             str(n_dip + n), "AA"]
    fmt = "X {:.10f} {:.10f} {:.10f}"
    lines += [fmt.format(*pos[i]) for i in pol]
    lines += [fmt.format(*p) for p in pos]
    lines += ["@MULTIPOLES", "ORDER 0", str(n_dip + n)]
    lines += [f"{k + 1} 0.0" for k in range(n_dip)]
    lines += [f"{n_dip + 1 + j} {q[j]:.10f}" for j in range(n)]
    lines += ["@POLARIZABILITIES", "ORDER 1 1", str(n_dip)]
    a_au = alpha[pol] * A_TO_BOHR**3
    lines += [f"{k + 1} {a:.10f} 0.0 0.0 {a:.10f} 0.0 {a:.10f}" for k, a in enumerate(a_au)]
    excl: list[str] = []
    if n_dip:
        # members of each polarizable group, in atom order
        pol_groups = np.unique(grp[pol])
        for g in pol_groups:
            atoms = np.flatnonzero(grp == g)
            dips = np.flatnonzero(grp[pol] == g)
            charge_sites = " ".join(str(n_dip + 1 + j) for j in atoms)
            dipole_sites = " ".join(str(k + 1) for k in dips)
            excl += [f"{k + 1} {charge_sites}" for k in dips]
            excl += [f"{n_dip + 1 + j} {dipole_sites}" for j in atoms]
    if excl:
        lines += ["EXCLISTS", f"{len(excl)}"] + excl
    return "\n".join(lines) + "\n"


def _solvent_class():
    """:class:`InducedDipoleSolvent`, defined on first use (cppe is imported
    only when a polarizable environment is asked for)."""
    global InducedDipoleSolvent
    if InducedDipoleSolvent is not None:
        return InducedDipoleSolvent
    try:
        from pyscf.solvent import pol_embed
    except ImportError as exc:  # pragma: no cover - cppe is a dependency
        raise InputError("the polarizable environment needs the cppe library (pip install 'cppe>=0.3.4,<0.4'); "
                         f"importing it failed: {exc}") from None

    class PolEmbed(pol_embed.PolEmbed):
        """PySCF's cppe interface with cppe's static potential on the QM
        region switched off and the energy restricted to the polarization
        energy (the charges reach the QM region through ``qmmm``). The class
        keeps PySCF's name because ``pyscf.solvent`` picks the response
        code of its TD objects by that name."""

        _keys = {"tmpdir"}

        def _exec_cppe(self, dm, elec_only=False):
            if self.V_es is None:
                nao = self.mol.nao_nr()
                self.V_es = np.zeros((nao, nao))
            e, v = super()._exec_cppe(dm, elec_only)
            if not elec_only:
                # cppe's total also holds the charges' energy with the QM nuclei, counted by qmmm already
                e_pol = self.polarization_energy_au()
                e = np.full_like(np.asarray(e, dtype=float), e_pol) if np.ndim(e) else e_pol
            return e, v

        def polarization_energy_au(self) -> float:
            """-1/2 sum_i mu_i . E0_i of the last solve (Hartree).

            cppe 0.3.4 keeps the charges' field for every site, dipole sites
            first, and its own "Multipoles" polarization term reads past the
            dipoles (seen as NaN or noise); that term is recomputed here from
            the dipole sites' part of the field. The electronic and nuclear
            terms are cppe's.
            """
            st = self.cppe_state
            mu = self.induced_dipoles_au().ravel()
            f_mul = np.asarray(st.multipole_fields, dtype=float)[: len(mu)]
            pol = st.energies["Polarization"]
            return float(pol["Electronic"]) + float(pol["Nuclear"]) - 0.5 * float(mu @ f_mul)

        def induced_dipoles_au(self) -> FloatArray:
            """Induced dipoles of the last solve, shape (n_dipoles, 3), e·bohr."""
            return np.asarray(self.cppe_state.get_induced_moments(), dtype=float).reshape(-1, 3)

    InducedDipoleSolvent = PolEmbed
    return InducedDipoleSolvent


InducedDipoleSolvent: Any = None


def attach_induced_dipoles(mf, positions_A: FloatArray, charges_e: FloatArray, polarizabilities_A3: FloatArray,
                           groups: npt.NDArray[np.int64]):
    """``mf`` with the environment's induced dipoles in its SCF (not run).

    The potential file is written into a temporary directory that belongs
    to the solvent object (``mf.with_solvent.tmpdir``).
    """
    from pyscf.solvent import _attach_solvent

    cls = _solvent_class()
    tmp = tempfile.TemporaryDirectory(prefix="clusterlab-pe-")
    path = os.path.join(tmp.name, "environment.pot")
    with open(path, "w", encoding="ascii") as fh:
        fh.write(potential_file_text(positions_A, charges_e, polarizabilities_A3, groups))
    n_dip = int(np.count_nonzero(np.asarray(polarizabilities_A3) > 0))
    options = {"potfile": path, **induced_dipole_options(n_dip)}
    solvent = cls(mf.mol, dict(options))  # PolEmbed edits the dict it is given
    solvent.tmpdir = tmp
    solvent.verbose = 0
    out = _attach_solvent._for_scf(mf, solvent)
    out.verbose = 0
    return out


def has_induced_dipoles(mf) -> bool:
    """True when ``mf`` carries the environment's induced dipoles."""
    cls = InducedDipoleSolvent
    return cls is not None and isinstance(getattr(mf, "with_solvent", None), cls)
