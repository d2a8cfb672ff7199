"""The one door to PySCF: every SCF and response calculation of the package.

Everything clusterlab computes with PySCF (embedded excitations and ΔSCF
ions in :mod:`.engine`, state charges in :mod:`.statecharges`, finite-field
responses in :mod:`.finitefield`, transfer integrals in :mod:`.transfer`)
builds its molecule, runs its SCF and solves its response here, with the
settings of one :class:`~clusterlab.qm.method.Method`:

* :func:`build_molecule` - a ``pyscf.gto.Mole`` in Å with the method's basis;
* :class:`Embedding` - what surrounds the QM region: fixed point charges
  (Gaussian-smeared by ``method.charge_smearing_A``), optionally summed
  periodically (Ewald, ``pyscf.qmmm.pbc``), optionally with induced dipoles
  on polarizable sites solved with the QM density (:mod:`.induction`, cppe
  through ``pyscf.solvent``; the response solves include the environment's
  response to the transition density);
* :func:`make_scf` and :func:`run_scf` - RKS/UKS (or HF) with density
  fitting and the SCF grid of the method, and the documented fallback:
  (1) DIIS from the given guess; (2) DIIS with a 0.3 Eh level shift restarted
  from the last density; (3) the second-order (Newton/CIAH) solver from the
  last orbitals. The route taken is recorded;
* :func:`solve_states` - excited states by the method's response model on
  its response grid (classic Davidson with :data:`EXTRA_ROOTS` extra roots
  for TDA: see the constant for why);
* :func:`calculate` - ground state plus excited states of one QM region, a
  :class:`Calculation` record; :func:`ion_states` - cation and anion by ΔSCF.

Nothing outside :mod:`clusterlab.qm` imports PySCF's SCF or response
machinery; the layer test (``tests/test_layers.py``) keeps it so.
"""

from __future__ import annotations

import contextlib
import functools
import logging
import os
import threading
import time
from dataclasses import dataclass, field
from typing import Any, Callable, Mapping, Sequence

import numpy as np
import numpy.typing as npt

from ..errors import CalculationError, InputError
from ..units import AU_DIPOLE_TO_DEBYE
from . import ct as _ct
from .following import rotate_amplitudes
from .induction import attach_induced_dipoles, has_induced_dipoles
from .mokernel import fingerprint
from .method import PERIODIC_POLARIZABLE_ALTERNATIVE, Method, check_periodic_environment
from .response import ResponseStates, subspace_refine

FloatArray = npt.NDArray[np.float64]
log = logging.getLogger("clusterlab.qm")
NAN = float("nan")

#: Level shift (Hartree) of the second SCF attempt.
FALLBACK_LEVEL_SHIFT_EH = 0.3
#: Extra Davidson roots solved for (and discarded) beyond the states asked: with
#: only n roots the solver can converge onto higher states and miss a low one
#: whose leading orbital pair is not among the n lowest gaps (seen: the 3B1
#: state of formaldehyde at B3LYP/def2-SVP with n=2; the S1 of ethylene at
#: B3LYP/6-31G with n=3 from Koopmans or sTDA starting vectors).
EXTRA_ROOTS = 2


# ------------------------------------------------------------ embedding
@dataclass(frozen=True, eq=False)
class Embedding:
    """The environment of a QM region as PySCF sees it.

    Attributes
    ----------
    positions_A : ndarray, shape (n, 3), Å
    charges_e : ndarray, shape (n,), e
        Fixed point charges, each Gaussian-smeared with the method's
        ``charge_smearing_A`` (0: bare point charges).
    periodic : mapping or None
        Ewald embedding of the charges' lattice: ``lattice_A`` (3, 3),
        ``rcut_ewald_A``, ``rcut_hcore_A`` (see :mod:`.periodic`); None for
        a finite cluster.
    polarizabilities_A3 : ndarray, shape (n,), Å³, optional
        Isotropic polarizability of each charge site; sites with a positive
        value carry an induced dipole solved with the QM density (see
        :mod:`.induction`). Empty (default): fixed charges only.
    groups : ndarray of int, shape (n,), optional
        Molecule copy of each site (needed with polarizabilities: a dipole
        feels the charges of other copies only).
    """

    positions_A: FloatArray = field(default_factory=lambda: np.zeros((0, 3)))
    charges_e: FloatArray = field(default_factory=lambda: np.zeros(0))
    periodic: Mapping[str, Any] | None = None
    polarizabilities_A3: FloatArray = field(default_factory=lambda: np.zeros(0))
    groups: npt.NDArray[np.int64] = field(default_factory=lambda: np.zeros(0, dtype=np.int64))

    def __post_init__(self) -> None:
        pos = np.asarray(self.positions_A, dtype=np.float64).reshape(-1, 3)
        q = np.asarray(self.charges_e, dtype=np.float64).reshape(-1)
        if len(pos) != len(q):
            raise InputError(f"the embedding has {len(pos)} positions for {len(q)} charges; give one charge each.")
        if not (np.all(np.isfinite(pos)) and np.all(np.isfinite(q))):
            raise InputError("embedding positions and charges must be finite numbers.")
        alpha = np.asarray(self.polarizabilities_A3, dtype=np.float64).reshape(-1)
        grp = np.asarray(self.groups, dtype=np.int64).reshape(-1)
        if alpha.size:
            if len(alpha) != len(q):
                raise InputError(f"the embedding has {len(alpha)} polarizabilities for {len(q)} sites; give one "
                                 "per site (0 for a charge-only site).")
            if not np.all(np.isfinite(alpha)) or np.any(alpha < 0):
                raise InputError("polarizabilities_A3 must be finite and non-negative (Å³).")
            if len(grp) != len(q):
                raise InputError(f"polarizable sites need a molecule copy per site (groups): got {len(grp)} for "
                                 f"{len(q)} sites.")
            if np.any(alpha > 0) and self.periodic is not None:
                raise InputError("an Embedding with periodic= (Ewald) cannot have polarizabilities_A3 > 0: "
                                 f"{PERIODIC_POLARIZABLE_ALTERNATIVE}.")
        object.__setattr__(self, "positions_A", pos)
        object.__setattr__(self, "charges_e", q)
        object.__setattr__(self, "polarizabilities_A3", alpha)
        object.__setattr__(self, "groups", grp)

    @property
    def n_charges(self) -> int:
        return int(len(self.charges_e))

    @property
    def n_polarizable(self) -> int:
        """Number of sites with an induced dipole."""
        return int(np.count_nonzero(self.polarizabilities_A3 > 0))

    @property
    def is_polarizable(self) -> bool:
        return self.n_polarizable > 0

    def fixed(self) -> "Embedding":
        """The same charges without induced dipoles (the fixed-charge reference)."""
        return Embedding(self.positions_A, self.charges_e, self.periodic)

    @property
    def is_vacuum(self) -> bool:
        """No charges and no periodic lattice: the QM region alone."""
        return self.n_charges == 0 and self.periodic is None


VACUUM = Embedding()


# ------------------------------------------------------------ building
def n_electrons(symbols: Sequence[str], charge: int) -> int:
    """Electron count of atoms ``symbols`` with net ``charge``.

    Raises
    ------
    InputError
        An element symbol PySCF does not know.
    """
    from pyscf.data.elements import charge as z_of

    try:
        return int(sum(z_of(s) for s in symbols)) - int(charge)
    except Exception as exc:  # noqa: BLE001 - PySCF raises KeyError/ValueError for unknown symbols
        raise InputError(f"unknown element symbol in {list(symbols)!r}: {exc}") from None


@functools.lru_cache(maxsize=None)
def _xc_known(xc: str) -> bool:
    from pyscf.dft import libxc

    try:
        libxc.parse_xc(xc)
    except Exception:  # noqa: BLE001 - PySCF raises KeyError/ValueError for unknown names
        return False
    return True


@functools.lru_cache(maxsize=None)
def _basis_covers(basis: str, element: str) -> bool:
    import warnings as _warnings

    from pyscf import gto

    try:
        with _warnings.catch_warnings():
            _warnings.simplefilter("ignore")  # PySCF suggests installing basis-set-exchange
            return bool(gto.basis.load(basis, element))
    except Exception:  # noqa: BLE001 - unknown basis name (KeyError) or element (BasisNotFoundError)
        return False


def check_method(method: Method, symbols: Sequence[str]) -> None:
    """Check, before any calculation runs, that PySCF knows ``method``'s
    functional and has its basis for every element of ``symbols`` (answers
    are cached per functional and per basis/element: the engine asks before
    every calculation, the finite fields 25-50 times per reference).

    Raises
    ------
    InputError
        Naming the functional, or the basis and the elements it lacks.
    """
    if not method.is_hf and not _xc_known(method.xc):
        raise InputError(f"functional xc={method.xc!r} is not known to PySCF (libxc); use e.g. 'b3lyp', "
                         "'camb3lyp', 'pbe0', 'wb97x' or 'hf'.")
    missing = [el for el in sorted(set(map(str, symbols))) if not _basis_covers(method.basis, el)]
    if missing:
        raise InputError(f"basis={method.basis!r} is not available in PySCF for element(s) {missing}; check the "
                         "spelling (e.g. '6-31g', 'def2-svp', 'cc-pvdz') or pick a basis that covers them.")


#: Environment variable that sets the memory (MB) PySCF may plan with, per process.
MEMORY_ENV = "CLUSTERLAB_SCF_MEMORY_MB"


def scf_memory_MB() -> float:
    """The memory PySCF may plan with in this process (``max_memory``, MB).

    PySCF keeps a density-fitting tensor in memory only when it fits in 90 %
    of ``max_memory`` minus what the process already holds, else it writes
    it to a scratch file and reads it back in every SCF cycle. Its default
    (4,000 MB) sends the doped film's 60-atom emitter (a 1.9 GB tensor) to
    disk as soon as the process holds 1.9 GB, which a worker does after its
    first site (measured: about 50 s instead of 8 s per SCF cycle). So the
    budget is half the memory available when the molecule is built (never
    less than PySCF's default), or ``$CLUSTERLAB_SCF_MEMORY_MB``.
    """
    from pyscf import lib

    default = float(lib.param.MAX_MEMORY)
    text = os.environ.get(MEMORY_ENV)
    if text:
        try:
            value = float(text)
        except ValueError:
            raise InputError(f"${MEMORY_ENV}={text!r} must be a number of megabytes.") from None
        if not value > 0:
            raise InputError(f"${MEMORY_ENV}={text!r} must be a positive number of megabytes.")
        return value
    try:
        with open("/proc/meminfo") as fh:
            info = {ln.split(":")[0]: ln.split()[1] for ln in fh if ":" in ln}
        available = float(info["MemAvailable"]) / 1024.0
    except (OSError, KeyError, ValueError, IndexError):  # not Linux: PySCF's default
        return default
    return max(default, 0.5 * available)


def build_molecule(symbols: Sequence[str], positions_A: npt.ArrayLike, method: Method, *, charge: int = 0,
                   spin: int = 0):
    """A built ``pyscf.gto.Mole`` (Å, the method's basis, quiet, with the
    memory budget of :func:`scf_memory_MB`, which its SCF and
    density-fitting objects inherit).

    ``spin`` is 2S (number of unpaired electrons), as PySCF counts it.
    """
    from pyscf import gto

    pos = np.asarray(positions_A, dtype=np.float64).reshape(-1, 3)
    if len(pos) != len(symbols) or len(pos) == 0:
        raise InputError(f"need one (x, y, z) position in Å per symbol; got {len(symbols)} symbols and "
                         f"{len(pos)} positions.")
    if not np.all(np.isfinite(pos)):
        raise InputError("QM positions must be finite numbers.")
    mol = gto.Mole()
    mol.atom = [(str(s), tuple(map(float, p))) for s, p in zip(symbols, pos)]
    mol.unit = "Angstrom"
    mol.basis = method.basis
    mol.charge = int(charge)
    mol.spin = int(spin)
    mol.verbose = 0
    mol.max_memory = scf_memory_MB()
    mol.build()
    return mol


def make_scf(mol, method: Method, embedding: Embedding = VACUUM, *, unrestricted: bool = False):
    """The SCF object of ``method`` on ``mol`` in ``embedding`` (not run).

    Raises
    ------
    InputError
        A periodic (Ewald) ``embedding`` with a polarizable ``method``
        (:func:`~clusterlab.qm.method.check_periodic_environment`).
    """
    from pyscf import dft, scf

    if embedding.periodic is not None:
        check_periodic_environment(method, "make_scf with Embedding(periodic=...)")

    if method.is_hf:
        mf = scf.UHF(mol) if unrestricted else scf.RHF(mol)
    else:
        mf = dft.UKS(mol) if unrestricted else dft.RKS(mol)
        mf.xc = method.xc
        mf.grids.level = method.grid_level
    mf.conv_tol = method.conv_tol
    mf.max_cycle = method.max_cycle
    mf.verbose = 0
    if method.density_fit:
        mf = mf.density_fit()
        _FITTING_TENSORS.adopt(mf)
    env_pos, env_q = embedding.positions_A, embedding.charges_e
    radii = None
    if method.charge_smearing_A > 0 and len(env_q):
        radii = np.full(len(env_q), method.charge_smearing_A)
    periodic = embedding.periodic
    if periodic is not None:
        from pyscf.qmmm.pbc import itrf as pbc_itrf

        mf = pbc_itrf.add_mm_charges(mf, env_pos, periodic["lattice_A"], env_q, radii=radii,
                                     rcut_ewald=periodic["rcut_ewald_A"], rcut_hcore=periodic["rcut_hcore_A"],
                                     unit="Angstrom")
        if unrestricted:
            mf = _ewald_spin_summed(mf)
        mf.verbose = 0
        mf.mm_mol.verbose = 0
    elif len(env_q):
        from pyscf import qmmm

        mf = qmmm.mm_charge(mf, env_pos, env_q, radii=radii, unit="Angstrom")
    if embedding.is_polarizable:
        mf = attach_induced_dipoles(mf, env_pos, env_q, embedding.polarizabilities_A3, embedding.groups)
    return mf


def _ewald_spin_summed(mf):
    """``mf`` (an unrestricted SCF with PySCF's periodic point charges) with the QM
    multipoles of its Ewald terms taken from the total density.

    PySCF's ``qmmm.pbc`` interface (2.x) builds the QM region's atomic charges, dipoles and
    quadrupoles from a restricted density matrix only: an unrestricted one (2, n, n), as in
    the ΔSCF ions, fails inside its ``einsum``. The Ewald energy and potential depend on the
    total density alone, so the two spin blocks are summed first; the potential then acts on
    both spins alike (its correction is spin-independent). Set on the class so copies keep it.
    """
    base = type(mf)

    def summed(name):
        f = getattr(base, name)

        def method_(self, dm, *args, **kwargs):
            dm = np.asarray(dm)
            return f(self, dm[0] + dm[1] if dm.ndim == 3 else dm, *args, **kwargs)

        method_.__name__ = name
        return method_

    names = ("get_qm_charges", "get_qm_dipoles", "get_qm_quadrupoles")
    mf.__class__ = type(base.__name__, (base,), {n: summed(n) for n in names})
    return mf


def guess_cycles(method: Method) -> int:
    """DIIS cycles an SCF started from a given guess gets before the guess is
    dropped: a quarter of ``method.max_cycle``, at least 15 (25 by default).
    A rigid copy's aligned density converges in at most 4 cycles
    (tests/test_guess.py) and a cold SCF of the doped film's 60-atom emitter in
    13 (README, large-site row), so a guess still unconverged after 25 is worse
    than none."""
    return min(method.max_cycle, max(15, method.max_cycle // 4))


def run_scf(mf, method: Method, dm0=None) -> tuple[bool, str]:
    """Run the SCF with the documented fallback; returns (converged, route),
    route one of "diis", "fresh-guess", "level-shift", "newton", "failed".

    A given guess (``dm0``: an earlier density, another copy's aligned density)
    that DIIS does not converge from is dropped first: DIIS is retried from
    PySCF's own atomic guess ("fresh-guess") before the level shift and the
    second-order solver (a copy with other torsions can give a guess worse
    than none). From a given guess DIIS gets :func:`guess_cycles` cycles, not
    ``method.max_cycle``: a good guess converges in far fewer, so a bad one is
    found before it costs a whole cold SCF."""
    if dm0 is not None:
        mf.max_cycle = guess_cycles(method)
        try:
            mf.kernel(dm0=dm0)
        finally:
            mf.max_cycle = method.max_cycle
        if mf.converged:
            return True, "diis"
        log.warning("SCF not converged in %d cycles from the given guess; retrying from PySCF's atomic guess",
                    guess_cycles(method))
        # explicitly: a bare kernel() would restart from the failed orbitals the SCF object now holds
        mf.kernel(dm0=mf.get_init_guess(mf.mol, mf.init_guess))
        if mf.converged:
            return True, "fresh-guess"
    else:
        mf.kernel()
        if mf.converged:
            return True, "diis"
    log.warning("SCF not converged in %d cycles; retrying with level shift %.2f Eh", method.max_cycle,
                FALLBACK_LEVEL_SHIFT_EH)
    mf.level_shift = FALLBACK_LEVEL_SHIFT_EH
    mf.kernel(dm0=mf.make_rdm1())
    mf.level_shift = 0.0
    if mf.converged:
        return True, "level-shift"
    log.warning("SCF still not converged; retrying with the second-order solver")
    try:
        nt = mf.newton()
        nt.max_cycle = method.max_cycle
        nt.verbose = 0
        nt.kernel(mf.mo_coeff, mf.mo_occ)
        if nt.converged:
            mf.mo_coeff, mf.mo_energy, mf.mo_occ = nt.mo_coeff, nt.mo_energy, nt.mo_occ
            mf.e_tot, mf.converged = nt.e_tot, True
            return True, "newton"
    except Exception as exc:  # noqa: BLE001 - solver failures become a flag
        log.warning("second-order SCF failed: %s", exc)
    return False, "failed"


def dipole_D(mol, dm) -> list[float]:
    """Dipole of nuclei + electrons (Debye), origin at the centre of nuclear charge."""
    z = mol.atom_charges()
    r = mol.atom_coords()
    origin = z @ r / z.sum()
    with mol.with_common_orig(origin):
        ints = mol.intor_symmetric("int1e_r", comp=3)
    if isinstance(dm, (tuple, list)) or getattr(dm, "ndim", 2) == 3:
        dm = dm[0] + dm[1]
    el = np.einsum("xij,ji->x", ints, dm)
    nuc = np.einsum("i,ix->x", z, r - origin)
    return [float(v) for v in (nuc - el) * AU_DIPOLE_TO_DEBYE]


@contextlib.contextmanager
def omp_threads(n: int | None):
    """PySCF's OpenMP threads set to ``n`` inside the block (None: unchanged)."""
    if n is None:
        yield
        return
    from pyscf import lib

    with lib.with_omp_threads(n):
        yield


# ------------------------------------------------------------ response
#: Attribute of an SCF object holding what its response solves share (:class:`_ResponseShare`).
_SHARE_ATTR = "_clusterlab_response_share"


@dataclass(eq=False)
class _ResponseShare:
    """What the response solves of one SCF share within one calculation: the
    SCF on the response grid (its grid built once, not per spin) and the
    MO-basis operator's spin-independent set-up
    (:class:`~clusterlab.qm.mokernel.OperatorSetup`). One per SCF, replaced
    when the SCF's orbitals change (keys are digests of the numbers), dropped
    by :func:`release_fitted_integrals`."""

    response_key: tuple | None = None
    mf_resp: Any = None
    setup: Any = None


def _share(mf) -> _ResponseShare:
    share = vars(mf).get(_SHARE_ATTR)
    if share is None:
        share = _ResponseShare()
        setattr(mf, _SHARE_ATTR, share)
    return share


def _response_scf(mf, method: Method):
    """The SCF object whose grid the response kernel uses (``mf`` itself when
    the response grid is the SCF grid; else one copy per SCF and orbitals,
    reused by the later solves)."""
    if method.is_hf or method.response_grid_level is None or method.response_grid_level == method.grid_level:
        return mf
    from pyscf.dft import gen_grid

    key = (method.response_grid_level, fingerprint(mf.mo_coeff, mf.mo_occ, mf.mo_energy, mf.mol.atom_coords()))
    share = _share(mf)
    if share.response_key == key:
        return share.mf_resp
    share.response_key = share.mf_resp = share.setup = None  # stale: another SCF's orbitals
    mfr = mf.copy()
    vars(mfr).pop(_SHARE_ATTR, None)  # the copy does not own the share
    mfr.grids = gen_grid.Grids(mf.mol)
    mfr.grids.level = method.response_grid_level
    mfr.grids.build()
    share.response_key, share.mf_resp = key, mfr
    return mfr


def _stda_guess(mf, method: Method, kind: str, n: int) -> FloatArray | None:
    """The ``n`` lowest sTDA vectors of this SCF, shape (n, nocc*nvir), or
    None where the sTDA cannot run (an element without sTDA parameters)."""
    from .stda import stda_response

    try:
        st = stda_response(mf, kind, n, method)
    except (InputError, CalculationError) as exc:
        log.info("no sTDA vectors for the refined model (%s); Koopmans guesses only", exc)
        return None
    return st.amplitudes.reshape(st.n_states, -1)


def _tda_davidson(vind, hdiag: FloatArray, guess: FloatArray, nroots: int, method: Method, max_cycle: int):
    """Lowest ``nroots`` eigenpairs of the TDA matrix by the classic Davidson
    method (PySCF's ``lib.davidson1``: each iteration adds one vector per
    unconverged root). Returns (converged flags, energies, vectors)."""
    from pyscf import lib

    def aop(xs):
        return list(vind(np.asarray(xs)))

    def precond(dx, e, *args):
        d = hdiag - (e - 1e-4)
        d[np.abs(d) < 1e-8] = 1e-8
        return dx / d

    conv, e, xs = lib.davidson1(aop, list(guess), precond, tol=1e-12, tol_residual=method.response_conv_tol,
                                nroots=nroots, max_cycle=max_cycle, max_space=max(12, 4 * nroots), verbose=0)
    return (np.atleast_1d(np.asarray(conv, dtype=bool)), np.atleast_1d(np.asarray(e, dtype=float)),
            np.atleast_2d(np.asarray(xs, dtype=float)))


def _tda_operator(td, mf, mf_resp, method: Method, singlet: bool, n_solve: int):
    """(vind, hdiag, window) of the TDA operator: clusterlab's MO-basis
    operator on the method's orbital window where ``method.response_kernel``
    is "mo" and it applies (window then an
    :class:`~clusterlab.qm.mokernel.OrbitalWindow`), else PySCF's AO route
    (window None). The MO-basis operator's set-up is kept on ``mf`` and
    shared by both spins (and any later solve of the same orbitals)."""
    if method.response_kernel == "mo":
        from . import mokernel

        ok, why = mokernel.supported(mf_resp)
        if ok:
            window = mokernel.orbital_window(mf_resp.mo_energy, mf_resp.mo_occ, method.orbital_window_Eh)
            if window.n_pairs < 2 * n_solve:  # too narrow for the states asked: all orbitals
                window = mokernel.orbital_window(mf_resp.mo_energy, mf_resp.mo_occ, None)
            max_memory_MB = float(getattr(mf_resp, "max_memory", 2000))
            share = _share(mf)
            if share.setup is None or share.setup.key != mokernel.setup_key(mf_resp, window):
                share.setup = None  # a stale set-up goes before the new one is built
                share.setup = mokernel.OperatorSetup(mf_resp, window, max_memory_MB)
            vind, hdiag = mokernel.tda_operator(mf_resp, singlet, window, setup=share.setup,
                                                environment_response=singlet and has_induced_dipoles(mf_resp),
                                                max_memory_MB=max_memory_MB)
            return vind, hdiag, window
        log.info("MO-basis response kernel not used (%s); PySCF's AO route runs", why)
    vind, hdiag = td.gen_vind(mf_resp)
    return vind, hdiag, None


def _tdscf_states(mf, mf_resp, method: Method, kind: str, n: int, x0: FloatArray | None) -> ResponseStates:
    """Full TDA/TDDFT states, or the "stda-refined" model.

    ``mf`` holds the orbitals (the sTDA vectors of the refined model come
    from it); ``mf_resp`` is the same SCF on the response grid. ``x0``
    (shape (m, nocc, nvir)) are the previous result's vectors rotated into
    these orbitals (warm start); the refined model ignores them, so that its
    numbers do not depend on what was computed before.
    """
    singlet = kind == "singlet"
    refined = method.excited == "stda-refined"
    full_rpa = method.excited == "tddft"
    # induced dipoles answer the transition density too (PySCF: equilibrium_solvation=True; the
    # default leaves the environment out of the response). Triplets have no density to answer.
    env_kw = {"equilibrium_solvation": True} if has_induced_dipoles(mf_resp) else {}
    td = mf_resp.TDDFT(**env_kw) if full_rpa else mf_resp.TDA(**env_kw)
    td.singlet = singlet
    td.conv_tol = method.response_conv_tol
    td.verbose = 0
    nocc = int((mf_resp.mo_occ > 0).sum())
    nvir = len(mf_resp.mo_occ) - nocc
    nov = nocc * nvir
    n = min(n, nov)
    n_solve = min(n + EXTRA_ROOTS, nov)
    warm = not refined and x0 is not None and len(x0) > 0 and x0.shape[1:] == (nocc, nvir)
    guess = td.get_init_guess(mf_resp, n_solve)  # Koopmans: lowest orbital-energy gaps
    if full_rpa:
        guess = guess[:, :nov]
    if warm:
        guess = np.vstack([x0.reshape(len(x0), -1), guess])[: max(n_solve, len(x0))]
    extra: dict[str, Any] = {"warm_start": bool(warm)}
    if full_rpa:
        # PySCF's non-Hermitian solver; Y starts at zero
        td.nstates = n_solve
        try:
            td.kernel(x0=np.hstack([guess, np.zeros_like(guess)]))
        except Exception:  # noqa: BLE001 - a bad warm guess must not kill the run
            td.kernel()
        conv = np.atleast_1d(np.asarray(td.converged, dtype=bool))
        conv = np.repeat(conv, n_solve) if conv.size == 1 else conv
        if not conv[:n].all():  # one retry with more iterations from the current vectors
            log.warning("%s response not converged; retrying with %d iterations", kind, 2 * td.max_cycle)
            td.max_cycle *= 2
            td.kernel(x0=np.array([np.hstack([x.ravel(), y.ravel()]) for x, y in td.xy]))
            conv = np.atleast_1d(np.asarray(td.converged, dtype=bool))
            conv = np.repeat(conv, n_solve) if conv.size == 1 else conv
        energies = np.asarray(td.e, float).reshape(-1)
        vecs = np.array([(np.asarray(x, float) + np.asarray(y, float)).ravel() for x, y in td.xy])
    else:
        vind, hdiag, window = _tda_operator(td, mf, mf_resp, method, singlet, n_solve)
        extra["kernel"] = "ao" if window is None else "mo"
        if window is not None:
            extra["window_pairs"] = [window.n_pairs, nov]
            guess = window.restrict(guess)
        if refined:
            sg = _stda_guess(mf, method, kind, n_solve)
            if sg is not None and window is not None:
                sg = window.restrict(sg)
            start = guess if sg is None else np.vstack([sg, guess])
            energies, vecs, res = subspace_refine(vind, hdiag, start, n_solve)
            conv = np.ones(len(energies), dtype=bool)
            extra.update(subspace_iterations=2, start_vectors="stda+koopmans" if sg is not None else "koopmans",
                         first_step_residual_Eh=[float(r) for r in res[:n]])
        else:
            conv, energies, vecs = _tda_davidson(vind, hdiag, guess, n_solve, method, td.max_cycle)
            if not conv[:n].all():  # one retry with more iterations from the current vectors
                log.warning("%s response not converged; retrying with %d iterations", kind, 2 * td.max_cycle)
                conv, energies, vecs = _tda_davidson(vind, hdiag, vecs, n_solve, method, 2 * td.max_cycle)
        if window is not None:
            vecs = window.embed(vecs)
        # PySCF's convention: X of a closed-shell state normalised to 1/2
        td.e = energies[:n]
        td.xy = [(v.reshape(nocc, nvir) / np.linalg.norm(v) * np.sqrt(0.5), 0) for v in vecs[:n]]
    conv = conv[:n]
    amps_all = vecs.reshape(len(vecs), nocc, nvir)
    norms = np.linalg.norm(vecs, axis=1)
    amps_all = amps_all / np.where(norms > 0, norms, 1.0)[:, None, None]
    extra["solved_vectors"] = amps_all  # every root solved, for warm starts (not serialised)
    if singlet and n:
        tdip = np.asarray(td.transition_dipole(), float).reshape(-1, 3)[:n]
        osc = np.asarray(td.oscillator_strength(), float).reshape(-1)[:n]
    else:
        tdip, osc = np.zeros((n, 3)), np.zeros(n)
    return ResponseStates(kind=kind, model=method.excited, energies_Eh=np.asarray(energies, float)[:n],
                          amplitudes=amps_all[:n], transition_dipoles_au=tdip, osc_strength=osc, converged=conv,
                          extra=extra)


def solve_states(mf, method: Method, kind: str, n: int, x0: FloatArray | None = None) -> ResponseStates:
    """The ``n`` lowest excited states of one spin ``kind`` ("singlet" or
    "triplet") of a converged closed-shell SCF ``mf``, with the response
    model of ``method`` (TDA by classic Davidson with :data:`EXTRA_ROOTS`
    extra roots, TDDFT, sTDA or the refined sTDA) on its response grid.
    ``x0`` (shape (m, nocc, nvir)) are warm-start vectors in these orbitals."""
    if method.excited == "stda":
        from .stda import stda_response

        return stda_response(mf, kind, n, method)
    return _tdscf_states(mf, _response_scf(mf, method), method, kind, n, x0)


# ---------------------------------------------------------- one calculation
@dataclass
class Calculation:
    """In-memory record of one closed-shell ground state (+ excited states).

    Attributes
    ----------
    energy_Eh : float
        SCF energy (nan if not converged; ``unconverged_energy_Eh`` keeps
        the last value then).
    converged : bool
    route : str
        SCF fallback route (see :func:`run_scf`).
    dm, mo_coeff, mo_occ, mo_energy, s_ao : arrays of the SCF
    dipole_D : list of 3 float
    states : dict kind -> ResponseStates
    vectors : dict kind -> ndarray
        Every response vector solved per kind (more than the states kept),
        for warm starts.
    ct : dict kind -> (distance_A, lambda, pairs)
    timings : dict step -> seconds
    mf, mol : the PySCF objects (kept in memory only)
    """

    energy_Eh: float
    converged: bool
    route: str
    dm: Any
    mo_coeff: FloatArray
    mo_occ: FloatArray
    mo_energy: FloatArray
    s_ao: FloatArray
    dipole_D: list[float]
    states: dict[str, ResponseStates] = field(default_factory=dict)
    vectors: dict[str, FloatArray] = field(default_factory=dict)
    ct: dict[str, tuple[FloatArray, FloatArray, list[str]]] = field(default_factory=dict)
    timings: dict[str, float] = field(default_factory=dict)
    mf: Any = None
    mol: Any = None
    unconverged_energy_Eh: float = NAN


def _ct_measures(mf, mol, calc: Calculation) -> dict[str, tuple[FloatArray, FloatArray, list[str]]]:
    """Charge-transfer measures (hole-electron distance, Peach Λ, leading
    pairs) of every solved kind, with one evaluation of the orbitals the
    states are made of on the SCF grid (block by block)."""
    nocc = int((calc.mo_occ > 0).sum())
    z = mol.atom_charges()
    origin = z @ mol.atom_coords() / z.sum()
    with mol.with_common_orig(origin):
        r_ao = mol.intor_symmetric("int1e_r", comp=3)
    grids = getattr(mf, "grids", None)
    if grids is None or getattr(grids, "coords", None) is None:
        from pyscf.dft import gen_grid

        grids = gen_grid.Grids(mol)
        grids.level = 1
        grids.build()
    amps = {kind: rs.amplitudes for kind, rs in calc.states.items()}
    overlaps = _ct.orbital_overlaps(mol, grids.coords, grids.weights, calc.mo_coeff, nocc,
                                    _ct.significant_pairs(list(amps.values())))
    return {kind: (_ct.hole_electron_distance_A(a, calc.mo_coeff, nocc, r_ao), _ct.lambda_from_overlaps(a, overlaps),
                   _ct.dominant_pairs(a, nocc)) for kind, a in amps.items()}


def calculate(symbols: Sequence[str], positions_A: npt.ArrayLike, method: Method, embedding: Embedding = VACUUM, *,
              charge: int = 0, guess_dm=None, warm_from: "Calculation | None" = None, with_states: bool = True,
              n_states: Mapping[str, int] | None = None, progress: Callable[[str], None] | None = None,
              tag: str = "") -> Calculation:
    """Closed-shell SCF of a QM region in ``embedding`` and its excited states.

    Parameters
    ----------
    symbols, positions_A : the QM atoms (Å)
    method : Method
    embedding : Embedding
    charge : int
    guess_dm : ndarray, optional
        SCF starting density.
    warm_from : Calculation, optional
        A converged calculation of the same QM region whose response vectors,
        rotated into the new orbitals, start the Davidson solves.
    with_states : bool
        Also solve the excited states.
    n_states : mapping kind -> int, optional
        States per kind (default: ``method.n_singlets`` singlets and
        ``method.n_triplets`` triplets).
    progress : callable(str), optional
    tag : str
        Prefix of the progress messages.
    """
    t0 = time.perf_counter()
    mol = build_molecule(symbols, positions_A, method, charge=charge)
    mf = make_scf(mol, method, embedding)
    if progress:
        progress(f"{tag} SCF")
    conv, route = run_scf(mf, method, guess_dm)
    t1 = time.perf_counter()
    dm = mf.make_rdm1()
    calc = Calculation(energy_Eh=float(mf.e_tot) if conv else NAN, converged=conv, route=route, dm=dm,
                       mo_coeff=np.asarray(mf.mo_coeff), mo_occ=np.asarray(mf.mo_occ),
                       mo_energy=np.asarray(mf.mo_energy), s_ao=mol.intor_symmetric("int1e_ovlp"),
                       dipole_D=dipole_D(mol, dm) if conv else [NAN] * 3, mf=mf, mol=mol)
    calc.timings["scf"] = t1 - t0
    if not conv or not with_states:
        if not conv:
            calc.unconverged_energy_Eh = float(mf.e_tot)
        release_fitted_integrals(mf)
        return calc
    counts = {"singlet": method.n_singlets, "triplet": method.n_triplets} if n_states is None else dict(n_states)
    for kind in ("singlet", "triplet"):
        n = int(counts.get(kind, 0))
        if n <= 0:
            continue
        if progress:
            progress(f"{tag} {kind}s")
        t = time.perf_counter()
        x0 = None
        if warm_from is not None and kind in warm_from.vectors and warm_from.converged:
            x0 = rotate_amplitudes(warm_from.vectors[kind], warm_from.mo_coeff, calc.mo_coeff, calc.s_ao)
        rs = solve_states(mf, method, kind, n, x0)
        calc.states[kind] = rs
        calc.vectors[kind] = rs.extra.pop("solved_vectors", rs.amplitudes)
        calc.timings[f"{kind}s"] = time.perf_counter() - t
    if calc.states:
        t = time.perf_counter()
        calc.ct.update(_ct_measures(mf, mol, calc))
        calc.timings["ct_measures"] = time.perf_counter() - t
    release_fitted_integrals(mf)
    return calc


def _fitting_key(mf) -> tuple | None:
    """What a density-fitting tensor depends on: atoms, positions, basis and
    fitting basis (not the charge, the spin or the environment). None for an
    SCF without density fitting."""
    df = getattr(mf, "with_df", None)
    if df is None:
        return None
    mol = mf.mol
    return (tuple(mol.elements), mol.atom_coords().round(10).tobytes(), repr(mol.basis), repr(df.auxbasis),
            bool(mol.cart))


class _FittingTensorCache:
    """The density-fitting object of the last QM region this process built
    an SCF for, handed to every later SCF of the same atoms, basis and
    fitting basis (its vacuum, embedded, fixed-charge and ion SCFs, the
    radii of a scan, the periodic limit, the finite fields of a reference):
    the three-index tensor depends on neither the environment nor the
    charge. One entry, so a process holds at most one tensor beyond the SCFs
    it is running (the doped film's 60-atom emitter: 1.9 GB, about 15 s per
    build; ``bench/bench_large_site.py``). A new QM region replaces it before
    its own tensor is built."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._key: tuple | None = None
        self._df: Any = None

    def adopt(self, mf) -> bool:
        """Give ``mf`` the cached fitting object if it fits the same atoms;
        else make ``mf``'s own object the cached one. Returns whether ``mf``
        got the cached object."""
        key = _fitting_key(mf)
        if key is None:
            return False
        with self._lock:
            if key == self._key and self._df is not None:
                mf.with_df = self._df
                return True
            self._key, self._df = key, mf.with_df  # filled when that SCF runs
            return False

    def clear(self) -> None:
        with self._lock:
            self._key = self._df = None


_FITTING_TENSORS = _FittingTensorCache()


def clear_fitting_tensors() -> None:
    """Forget the cached density-fitting tensor of this process (it is freed
    once no SCF holds it); for a long-lived process that is done with a
    large molecule."""
    _FITTING_TENSORS.clear()


def release_fitted_integrals(mf) -> None:
    """Detach a finished SCF from its density-fitting tensor and drop its
    response set-up: a kept Calculation (warm starts hold several) would
    otherwise hold naux*nao^2/2 numbers each (1.9 GB for a 60-atom molecule
    in 6-31G) and the set-up (response-grid copy, operator set-up: orbitals
    on the grid, fitted blocks). The SCF gets a fresh, unbuilt fitting
    object, which PySCF builds if the SCF is used again; the tensor itself
    stays with the process cache for the next SCF of the same atoms
    (:class:`_FittingTensorCache`)."""
    if mf is None:
        return
    vars(mf).pop(_SHARE_ATTR, None)
    old = getattr(mf, "with_df", None)
    if old is not None and getattr(old, "_cderi", None) is not None:
        from pyscf import df as pyscf_df

        fresh = pyscf_df.DF(old.mol, auxbasis=old.auxbasis)
        fresh.max_memory, fresh.verbose = old.max_memory, old.verbose
        mf.with_df = fresh


@dataclass
class IonState:
    """One ΔSCF ion (doublet, unrestricted): energy, flag, route and, when
    asked for, the spin-summed density and its molecule."""

    name: str
    charge: int
    energy_Eh: float
    converged: bool
    route: str
    dm: Any = None
    mol: Any = None


def ion_states(symbols: Sequence[str], positions_A: npt.ArrayLike, method: Method, embedding: Embedding = VACUUM, *,
               neutral: Calculation | None = None, charge: int = 0, ions: Sequence[str] = ("cation", "anion"),
               keep_density: bool = False) -> dict[str, IonState]:
    """Cation (one electron fewer) and anion (one more) of a closed-shell QM
    region by unrestricted SCF in ``embedding``, vertical (same geometry).

    The converged ``neutral`` density (halved per spin) is the SCF guess.
    An unconverged ion has energy nan.
    """
    out: dict[str, IonState] = {}
    for name in ions:
        dq = {"cation": +1, "anion": -1}.get(name)
        if dq is None:
            raise InputError(f"{name!r} is not an ion; use 'cation' or 'anion'.")
        mol = build_molecule(symbols, positions_A, method, charge=charge + dq, spin=1)
        mf = make_scf(mol, method, embedding, unrestricted=True)
        dm0 = None
        if neutral is not None and neutral.converged:
            dm0 = np.array([neutral.dm / 2, neutral.dm / 2])
        conv, route = run_scf(mf, method, dm0)
        dm = None
        if keep_density:
            d = np.asarray(mf.make_rdm1())
            dm = d[0] + d[1]
        out[name] = IonState(name=name, charge=charge + dq, energy_Eh=float(mf.e_tot) if conv else NAN,
                             converged=bool(conv), route=route, dm=dm, mol=mol if keep_density else None)
        release_fitted_integrals(mf)
    return out


# ------------------------------------------------------------ warm starts
@dataclass(frozen=True, eq=False)
class WarmStart:
    """What a later calculation of the same QM region may start from: the
    embedded ground state (its density is the next SCF guess, its solved
    response vectors the next Davidson guess) and the vacuum calculation
    (reused instead of repeated). Built only by the engine
    (``ExcitationResult.warm_start``); kept in memory, never serialised.

    Attributes
    ----------
    qm_fingerprint : str
        :meth:`clusterlab.Cluster.fingerprint_qm` of the QM region it belongs to.
    ground : Calculation
    vacuum : Calculation or None
    fixed : Calculation or None
        The fixed-charge reference of a polarizable calculation (the next
        radius's reference starts from it).
    """

    qm_fingerprint: str
    ground: Calculation
    vacuum: Calculation | None = None
    fixed: Calculation | None = None

    def fits(self, cluster: Any) -> bool:
        """True when ``cluster`` has the same QM region (symbols, charge, positions)."""
        return self.qm_fingerprint == cluster.fingerprint_qm()
