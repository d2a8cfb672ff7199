"""Point-charge embedded excitation energies and charged states with PySCF.

Model: the QM region is treated by DFT (or HF) in the electrostatic field of
fixed environment point charges (electrostatic embedding, PySCF ``qmmm``),
optionally Gaussian-smeared. Left out: polarisation of the environment by
the QM region (and by the excitation), exchange-repulsion with the
environment, and relaxation of the geometry. Excitation energies are
vertical; IP/EA are vertical ΔSCF energies.

SCF fallback (documented, always in this order): (1) DIIS from the given
guess; (2) DIIS with a 0.3 Eh level shift restarted from the last density;
(3) the second-order (Newton/CIAH) solver ``mf.newton()`` from the last
orbitals. The route taken is recorded (``scf_route``). If all fail, every
energy that depends on it is ``nan`` with ``converged=False``, or
:class:`~clusterlab.errors.ConvergenceError` is raised when asked.
"""

from __future__ import annotations

import contextlib
import logging
import math
import time
import warnings
from dataclasses import dataclass, field
from typing import Any, Callable, Iterable, Sequence

import numpy as np
import numpy.typing as npt

from ..cluster import Cluster
from ..errors import CalculationError, ConvergenceError, GeometryError, InputError
from ..units import AU_DIPOLE_TO_DEBYE, HARTREE_TO_EV
from . import ct as _ct
from .following import assign_states, rotate_amplitudes, transition_overlaps
from .method import Method
from .response import ResponseStates, subspace_refine
from ..versions import software_versions
from .results import NAN, ChargedResult, ExcitationResult, ExcitedState

FloatArray = npt.NDArray[np.float64]
log = logging.getLogger("clusterlab.qm")

#: Level shift (Hartree) of the second SCF attempt.
FALLBACK_LEVEL_SHIFT_EH = 0.3
#: |net environment charge| (e) above which the embedding is called non-neutral: topology
#: charges printed to 6 decimals leave ~1e-6 e per molecule of rounding (common practice).
NEUTRAL_TOL_E = 1e-4
#: Extra Davidson roots solved for (and discarded) beyond the states asked: with
#: only n roots the solver can converge onto higher states and miss a low one
#: whose leading orbital pair is not among the n lowest gaps (seen: the 3B1
#: state of formaldehyde at B3LYP/def2-SVP with n=2; the S1 of ethylene at
#: B3LYP/6-31G with n=3 from Koopmans or sTDA starting vectors).
EXTRA_ROOTS = 2


class EmbeddingWarning(UserWarning):
    """Issued when the environment carries a net charge (non-neutral
    embedding), or a calculation falls back or fails to converge."""


# ----------------------------------------------------------------- checks
def check_charge_distances(cluster: Cluster, min_distance_A: float) -> None:
    """Raise :class:`GeometryError` if a point charge is closer than
    ``min_distance_A`` to a QM atom, naming both."""
    if cluster.n_charges == 0 or min_distance_A <= 0:
        return
    qm = cluster.qm_positions
    best_d, best_i, best_j = np.inf, -1, -1
    for j0 in range(0, cluster.n_charges, 20000):
        env = cluster.env_positions[j0:j0 + 20000]
        d = np.linalg.norm(qm[:, None, :] - env[None, :, :], axis=-1)
        i, j = np.unravel_index(np.argmin(d), d.shape)
        if d[i, j] < best_d:
            best_d, best_i, best_j = float(d[i, j]), int(i), int(j0 + j)
    if best_d < min_distance_A:
        mol_id = int(cluster.env_molecules[best_j]) if len(cluster.env_molecules) else -1
        sym = cluster.env_symbols[best_j] if cluster.env_symbols else "X"
        raise GeometryError(
            f"Point charge {best_j} ({sym}, q={cluster.env_charges[best_j]:+.4f} e, environment molecule "
            f"{mol_id}) is {best_d:.3f} Å from QM atom {best_i} ({cluster.qm_symbols[best_i]}); the limit is "
            f"min_charge_distance_A={min_distance_A:g} Å. Overlapping molecules or a carving problem?"
        )


def _n_electrons(symbols: Sequence[str], charge: int) -> int:
    from pyscf.data.elements import charge as z_of

    return int(sum(z_of(s) for s in symbols)) - int(charge)


# ------------------------------------------------------------ building
def _build_mol(symbols: Sequence[str], positions_A: FloatArray, charge: int, spin: int, basis: str):
    from pyscf import gto

    mol = gto.Mole()
    mol.atom = [(s, tuple(map(float, p))) for s, p in zip(symbols, positions_A)]
    mol.unit = "Angstrom"
    mol.basis = basis
    mol.charge = int(charge)
    mol.spin = int(spin)
    mol.verbose = 0
    mol.build()
    return mol


def _make_scf(mol, method: Method, env_pos: FloatArray, env_q: FloatArray, *, unrestricted: bool = False,
              periodic: dict[str, Any] | None = None):
    """SCF object with embedding. ``periodic`` holds ``lattice_A``,
    ``rcut_ewald_A`` and ``rcut_hcore_A`` for Ewald embedding."""
    from pyscf import dft, scf

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
    radii = None
    if method.charge_smearing_A > 0 and len(env_q):
        radii = np.full(len(env_q), method.charge_smearing_A)
    if periodic is not None:
        from pyscf.qmmm.pbc import itrf as pbc_itrf

        mf = pbc_itrf.add_mm_charges(mf, np.asarray(env_pos, float), periodic["lattice_A"], np.asarray(env_q, float),
                                     radii=radii, rcut_ewald=periodic["rcut_ewald_A"],
                                     rcut_hcore=periodic["rcut_hcore_A"], unit="Angstrom")
        mf.verbose = 0
        mf.mm_mol.verbose = 0
    elif len(env_q):
        from pyscf import qmmm

        mf = qmmm.mm_charge(mf, np.asarray(env_pos, float), np.asarray(env_q, float), radii=radii, unit="Angstrom")
    return mf


def _run_scf(mf, method: Method, dm0) -> tuple[bool, str]:
    """Run the SCF with the documented fallback; returns (converged, route)."""
    mf.kernel(dm0=dm0)
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


def _dipole_D(mol, dm) -> list[float]:
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


# ------------------------------------------------------------ response
def _response_scf(mf, method: Method):
    """The SCF object whose grid the response kernel uses."""
    if method.is_hf or method.response_grid_level is None or method.response_grid_level == method.grid_level:
        return mf
    from pyscf.dft import gen_grid

    mfr = mf.copy()
    mfr.grids = gen_grid.Grids(mf.mol)
    mfr.grids.level = method.response_grid_level
    mfr.grids.build()
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
    td = mf_resp.TDDFT() if full_rpa else mf_resp.TDA()
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
        vind, hdiag = td.gen_vind(mf_resp)
        if refined:
            sg = _stda_guess(mf, method, kind, n_solve)
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


def _response(mf, method: Method, kind: str, n: int, x0: FloatArray | None) -> ResponseStates:
    if method.excited == "stda":
        from .stda import stda_response

        return stda_response(mf, kind, n, method)
    return _tdscf_states(mf, _response_scf(mf, method), method, kind, n, x0)


# ---------------------------------------------------------- one calculation
@dataclass
class _Calc:
    """In-memory record of one ground state + response calculation."""

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
    #: every response vector solved per kind (more than the states kept), for warm starts
    vectors: dict[str, FloatArray] = field(default_factory=dict)
    ct: dict[str, tuple[FloatArray, FloatArray, list[str]]] = field(default_factory=dict)
    timings: dict[str, float] = field(default_factory=dict)
    mf: Any = None


def _ct_measures(mf, mol, calc: _Calc, rs: ResponseStates, method: Method):
    nocc = int((calc.mo_occ > 0).sum())
    z = mol.atom_charges()
    origin = z @ mol.atom_coords() / z.sum()
    with mol.with_common_orig(origin):
        r_ao = mol.intor_symmetric("int1e_r", comp=3)
    dist = _ct.hole_electron_distance_A(rs.amplitudes, calc.mo_coeff, nocc, r_ao)
    grids = getattr(mf, "grids", None)
    if grids is None or getattr(grids, "coords", None) is None:
        from pyscf.dft import gen_grid

        grids = gen_grid.Grids(mol)
        grids.level = 1
        grids.build()
    from pyscf.dft import numint

    ao = numint.eval_ao(mol, grids.coords)
    lam = _ct.peach_lambda(rs.amplitudes, ao @ calc.mo_coeff, grids.weights, nocc)
    return dist, lam, _ct.dominant_pairs(rs.amplitudes, nocc)


def _calculate(symbols, positions_A, charge: int, env_pos, env_q, method: Method, *, guess_dm=None,
               guess_calc: _Calc | None = None, periodic=None, with_states: bool = True,
               progress: Callable[[str], None] | None = None, tag: str = "") -> _Calc:
    t0 = time.perf_counter()
    mol = _build_mol(symbols, positions_A, charge, 0, method.basis)
    mf = _make_scf(mol, method, env_pos, env_q, periodic=periodic)
    if progress:
        progress(f"{tag} SCF")
    conv, route = _run_scf(mf, method, guess_dm)
    t1 = time.perf_counter()
    dm = mf.make_rdm1()
    calc = _Calc(energy_Eh=float(mf.e_tot) if conv else NAN, converged=conv, route=route, dm=dm,
                 mo_coeff=np.asarray(mf.mo_coeff), mo_occ=np.asarray(mf.mo_occ), mo_energy=np.asarray(mf.mo_energy),
                 s_ao=mol.intor_symmetric("int1e_ovlp"), dipole_D=_dipole_D(mol, dm) if conv else [NAN] * 3, mf=mf)
    if not conv:
        calc.timings["scf"] = t1 - t0
        calc.unconverged_energy_Eh = float(mf.e_tot)  # type: ignore[attr-defined]
        return calc
    calc.timings["scf"] = t1 - t0
    if not with_states:
        return calc
    for kind, n in (("singlet", method.n_singlets), ("triplet", method.n_triplets)):
        if n <= 0:
            continue
        if progress:
            progress(f"{tag} {kind}s")
        t = time.perf_counter()
        x0 = None
        if guess_calc is not None and kind in guess_calc.vectors and guess_calc.converged:
            x0 = rotate_amplitudes(guess_calc.vectors[kind], guess_calc.mo_coeff, calc.mo_coeff, calc.s_ao)
        rs = _response(mf, method, kind, n, x0)
        calc.states[kind] = rs
        calc.vectors[kind] = rs.extra.pop("solved_vectors", rs.amplitudes)
        calc.timings[f"{kind}s"] = time.perf_counter() - t
        t = time.perf_counter()
        calc.ct[kind] = _ct_measures(mf, mol, calc, rs, method)
        calc.timings["ct_measures"] = calc.timings.get("ct_measures", 0.0) + time.perf_counter() - t
    return calc


def _charged(symbols, positions_A, charge: int, env_pos, env_q, method: Method, neutral: _Calc,
             periodic=None) -> tuple[dict[str, float], dict[str, bool]]:
    """Cation and anion UKS energies (Eh) in the given embedding."""
    energies = {"neutral": neutral.energy_Eh}
    flags = {"neutral": neutral.converged}
    for name, dq in (("cation", +1), ("anion", -1)):
        mol = _build_mol(symbols, positions_A, charge + dq, 1, method.basis)
        mf = _make_scf(mol, method, env_pos, env_q, unrestricted=True, periodic=periodic)
        dm0 = None
        if neutral.converged:
            dm0 = np.array([neutral.dm / 2, neutral.dm / 2])
        conv, _route = _run_scf(mf, method, dm0)
        energies[name] = float(mf.e_tot) if conv else NAN
        flags[name] = bool(conv)
    return energies, flags


# ------------------------------------------------------------------ public
@contextlib.contextmanager
def _threads(n: int | None):
    if n is None:
        yield
        return
    from pyscf import lib

    with lib.with_omp_threads(n):
        yield


def _states_to_records(emb: _Calc, vac: _Calc | None) -> tuple[list[ExcitedState], int]:
    records: list[ExcitedState] = []
    followed = -1
    for kind, prefix in (("singlet", "S"), ("triplet", "T")):
        rs = emb.states.get(kind)
        if rs is None:
            continue
        dist, lam, pairs = emb.ct[kind]
        vrs = vac.states.get(kind) if vac is not None else None
        match = value = None
        if vrs is not None and vrs.n_states:
            ov = transition_overlaps(rs.amplitudes, emb.mo_coeff, vrs.amplitudes, vac.mo_coeff, emb.s_ao)
            match, value = assign_states(ov)
            if kind == "singlet":
                followed = int(np.argmax(ov[:, 0]))
        for i in range(rs.n_states):
            e = float(rs.energies_Eh[i] * HARTREE_TO_EV)
            rec = ExcitedState(
                label=f"{prefix}{i + 1}", kind=kind, energy_eV=e,
                osc_strength=float(rs.osc_strength[i]),
                transition_dipole_D=[float(v) for v in rs.transition_dipoles_au[i] * AU_DIPOLE_TO_DEBYE],
                pairs=pairs[i], ct_distance_A=float(dist[i]), ct_lambda=float(lam[i]),
                converged=bool(rs.converged[i]))
            if vrs is not None and i < vrs.n_states:
                rec.vacuum_eV = float(vrs.energies_Eh[i] * HARTREE_TO_EV)
                rec.shift_eV = rec.energy_eV - rec.vacuum_eV
                rec.converged = rec.converged and bool(vrs.converged[i])
            if match is not None and match[i] >= 0:
                j = int(match[i])
                rec.followed_vacuum_state = f"{prefix}{j + 1}"
                rec.follow_overlap = float(value[i])
                rec.followed_shift_eV = e - float(vrs.energies_Eh[j] * HARTREE_TO_EV)
            records.append(rec)
    return records, followed


def _failed_states(method: Method) -> list[ExcitedState]:
    out = [ExcitedState(label=f"S{i + 1}", kind="singlet", energy_eV=NAN, osc_strength=NAN, converged=False)
           for i in range(method.n_singlets)]
    out += [ExcitedState(label=f"T{i + 1}", kind="triplet", energy_eV=NAN, osc_strength=NAN, converged=False)
            for i in range(method.n_triplets)]
    return out


def _validate(cluster: Cluster, method: Method) -> None:
    if not isinstance(cluster, Cluster):
        raise InputError(f"cluster must be a clusterlab.Cluster; got {type(cluster).__name__}. "
                         "Build one with Cluster.from_arrays(...).")
    if not isinstance(method, Method):
        raise InputError(f"method must be a clusterlab.Method; got {type(method).__name__}. "
                         f"Try Method.preset(name) with one of {list(Method.presets())}.")
    nel = _n_electrons(cluster.qm_symbols, cluster.qm_charge)
    if nel % 2:
        raise InputError(f"The QM region has {nel} electrons (qm_charge={cluster.qm_charge}); excited states "
                         "need a closed-shell ground state. Check qm_charge.")
    check_charge_distances(cluster, method.min_charge_distance_A)


def _guess_parts(guess) -> tuple[Any, _Calc | None]:
    if guess is None:
        return None, None
    if isinstance(guess, ExcitationResult):
        work = guess._work or {}
        return guess.dm, work.get("calc")
    if isinstance(guess, _Calc):
        return guess.dm, guess
    return np.asarray(guess, dtype=float), None


def _excitations(cluster: Cluster, method: Method, *, vacuum: bool | _Calc = True, guess=None,
                 raise_on_failure: bool = False, progress=None, periodic=None, env=None,
                 radius_A: float | None = None) -> ExcitationResult:
    t_start = time.perf_counter()
    _validate(cluster, method)
    env_pos, env_q = (cluster.env_positions, cluster.env_charges) if env is None else env
    net = float(np.sum(env_q))
    warn: list[str] = []
    if abs(net) > NEUTRAL_TOL_E:
        msg = (f"Non-neutral embedding: the environment carries {net:+.6f} e. Shifts then include the "
               "monopole potential of that charge; check the charge source or the carving rule.")
        warnings.warn(msg, EmbeddingWarning, stacklevel=3)
        warn.append(msg)
    log.info("clusterlab.qm: %s; %d QM atoms, %d charges", method.describe(), cluster.n_qm_atoms, len(env_q))
    guess_dm, guess_calc = _guess_parts(guess)
    timings: dict[str, float] = {}
    with _threads(method.threads):
        vac: _Calc | None = None
        if isinstance(vacuum, _Calc):
            vac = vacuum
        elif vacuum:
            t = time.perf_counter()
            vac = _calculate(cluster.qm_symbols, cluster.qm_positions, cluster.qm_charge, np.zeros((0, 3)),
                             np.zeros(0), method, progress=progress, tag="vacuum")
            timings["vacuum"] = time.perf_counter() - t
            for k, v in vac.timings.items():
                timings[f"vacuum_{k}"] = v
        if len(env_q) == 0 and periodic is None and vac is not None:
            emb = vac  # no charges: the vacuum calculation is the embedded one
        else:
            if guess_dm is None and vac is not None and vac.converged:
                guess_dm = vac.dm
            if guess_calc is None and vac is not None:
                guess_calc = vac
            emb = _calculate(cluster.qm_symbols, cluster.qm_positions, cluster.qm_charge, env_pos, env_q, method,
                             guess_dm=guess_dm, guess_calc=guess_calc, periodic=periodic, progress=progress,
                             tag="embedded")
        timings.update(emb.timings)
        charged = None
        if method.charged_states:
            t = time.perf_counter()
            charged = _charged_result(cluster, method, emb, vac, env_pos, env_q, periodic)
            timings["charged"] = time.perf_counter() - t
    if emb.converged:
        t = time.perf_counter()
        states, followed = _states_to_records(emb, vac)
        timings["following"] = time.perf_counter() - t
    else:
        states, followed = _failed_states(method), -1
    meta = _meta(cluster, method, timings, t_start, periodic, len(env_q))
    res = ExcitationResult(
        states=states, scf_energy_Eh=emb.energy_Eh, scf_converged=emb.converged, scf_route=emb.route,
        vacuum_scf_energy_Eh=vac.energy_Eh if vac is not None else NAN,
        vacuum_scf_converged=vac.converged if vac is not None else True,
        vacuum_scf_route=vac.route if vac is not None else "",
        ground_dipole_D=emb.dipole_D, vacuum_dipole_D=vac.dipole_D if vac is not None else [NAN] * 3,
        net_env_charge_e=net, neutral_embedding=abs(net) <= NEUTRAL_TOL_E, followed_index=followed,
        charged=charged, radius_A=float(cluster.radius_A if radius_A is None else radius_A),
        periodic=periodic is not None, warnings=warn, meta=meta, dm=emb.dm,
        _work={"calc": emb, "vacuum": vac})
    _check_failure(res, raise_on_failure)
    return res


def _check_failure(res: ExcitationResult, raise_on_failure: bool) -> None:
    if res.converged:
        return
    bad = []
    if not res.scf_converged:
        bad.append(f"embedded SCF (route {res.scf_route})")
    if not res.vacuum_scf_converged:
        bad.append(f"vacuum SCF (route {res.vacuum_scf_route})")
    bad += [f"state {s.label}" for s in res.states if not s.converged and res.scf_converged]
    if res.charged is not None:
        bad += [f"{k} ΔSCF" for k, v in res.charged.converged_flags.items() if not v]
    msg = "Not converged: " + ", ".join(bad) + ". Values are flagged (nan / converged=False)."
    res.warnings.append(msg)
    if raise_on_failure:
        raise ConvergenceError(msg + " Try a larger max_cycle or a different guess.")
    warnings.warn(msg, EmbeddingWarning, stacklevel=3)


def _meta(cluster: Cluster, method: Method, timings, t_start, periodic, n_charges: int) -> dict[str, Any]:
    prov = cluster.provenance()
    prov["n_charges"] = int(n_charges)
    timings = dict(timings)
    timings["total"] = time.perf_counter() - t_start
    meta = {"method": method.to_dict(), "method_key": method.key(), "versions": software_versions(),
            "provenance": prov, "timings_s": {k: float(v) for k, v in timings.items()},
            "charge_model": ("gaussian" if method.charge_smearing_A > 0 else "point"),
            "embedding": "periodic-ewald" if periodic is not None else "cluster"}
    if periodic is not None:
        meta["periodic"] = {k: (np.asarray(v).tolist() if isinstance(v, np.ndarray) else v)
                            for k, v in periodic.items()}
    return meta


def _charged_result(cluster, method, emb: _Calc, vac: _Calc | None, env_pos, env_q, periodic) -> ChargedResult:
    e, flags = _charged(cluster.qm_symbols, cluster.qm_positions, cluster.qm_charge, env_pos, env_q, method, emb,
                        periodic=periodic)
    ip = (e["cation"] - e["neutral"]) * HARTREE_TO_EV
    ea = (e["neutral"] - e["anion"]) * HARTREE_TO_EV
    nocc = int((emb.mo_occ > 0).sum())
    res = ChargedResult(neutral_Eh=e["neutral"], cation_Eh=e["cation"], anion_Eh=e["anion"], IP_eV=ip, EA_eV=ea,
                        koopmans_IP_eV=float(-emb.mo_energy[nocc - 1] * HARTREE_TO_EV) if emb.converged else NAN,
                        converged_flags=dict(flags))
    if vac is not None:
        if vac is emb:
            ev, fv = e, flags
        else:
            ev, fv = _charged(cluster.qm_symbols, cluster.qm_positions, cluster.qm_charge, np.zeros((0, 3)),
                              np.zeros(0), method, vac)
        res.vacuum_neutral_Eh, res.vacuum_cation_Eh, res.vacuum_anion_Eh = ev["neutral"], ev["cation"], ev["anion"]
        res.IP_vacuum_eV = (ev["cation"] - ev["neutral"]) * HARTREE_TO_EV
        res.EA_vacuum_eV = (ev["neutral"] - ev["anion"]) * HARTREE_TO_EV
        res.IP_shift_eV = ip - res.IP_vacuum_eV
        res.EA_shift_eV = ea - res.EA_vacuum_eV
        res.converged_flags.update({f"vacuum_{k}": v for k, v in fv.items()})
    res.meta = {"provenance": cluster.provenance(), "radius_A": float(cluster.radius_A),
                "method_key": method.key()}
    return res


def excitations(cluster: Cluster, method: Method, *, vacuum: "bool | ExcitationResult" = True, guess=None,
                raise_on_failure: bool = False, progress: Callable[[str], None] | None = None) -> ExcitationResult:
    """Excited states of the QM region in the field of the environment charges.

    Parameters
    ----------
    cluster : Cluster
        QM region (Å) and point charges (Å, e).
    method : Method
    vacuum : bool or ExcitationResult
        Also compute the QM region alone, giving ``vacuum_eV``, ``shift_eV``
        and state following (by transition-density overlap). An earlier
        in-memory result *of the same QM region* reuses its vacuum
        calculation instead of repeating it (radius series).
    guess : ExcitationResult, ndarray (nao, nao) or None
        Warm start: a previous result (its density is the SCF guess and its
        response vectors, rotated into the new orbitals, the Davidson guess)
        or a density matrix. Default: the vacuum density.
    raise_on_failure : bool
        Raise :class:`ConvergenceError` instead of flagging non-convergence.
    progress : callable(str) or None
        Called with a short message before each step.

    Returns
    -------
    ExcitationResult

    Raises
    ------
    GeometryError
        A point charge closer than ``method.min_charge_distance_A`` to a QM atom.
    ConvergenceError
        Only with ``raise_on_failure=True``.
    InputError
        Odd number of electrons, wrong argument types.

    Examples
    --------
    >>> c = Cluster.from_arrays(["O", "H", "H"], [[0, 0, 0], [0.757, 0.586, 0], [-0.757, 0.586, 0]])
    >>> r = excitations(c, Method.preset("draft", n_triplets=0))  # doctest: +SKIP
    >>> r.to_frame()[["state", "energy_eV", "shift_eV"]]  # doctest: +SKIP
    """
    if isinstance(vacuum, ExcitationResult):
        vac = (vacuum._work or {}).get("vacuum")
        if vac is None:
            raise InputError("vacuum= was given a result without an in-memory vacuum calculation "
                             "(results loaded from JSON carry none); pass vacuum=True.")
        vacuum = vac
    return _excitations(cluster, method, vacuum=vacuum, guess=guess, raise_on_failure=raise_on_failure,
                        progress=progress)


def charged_states(cluster: Cluster, method: Method, *, vacuum: bool = True,
                   raise_on_failure: bool = False) -> ChargedResult:
    """Vertical IP and EA by ΔSCF (RKS neutral, UKS cation/anion) in the
    embedding, and their environment shifts.

    IP = E(cation) - E(neutral), EA = E(neutral) - E(anion). A non-converged
    SCF gives nan for the quantities that need it and ``converged=False``.
    The anion in a small basis can be unbound (EA < 0): that is the
    method's answer, not an error.
    """
    _validate(cluster, method)
    t0 = time.perf_counter()
    with _threads(method.threads):
        emb = _calculate(cluster.qm_symbols, cluster.qm_positions, cluster.qm_charge, cluster.env_positions,
                         cluster.env_charges, method, with_states=False)
        vac = None
        if vacuum:
            vac = emb if cluster.n_charges == 0 else _calculate(
                cluster.qm_symbols, cluster.qm_positions, cluster.qm_charge, np.zeros((0, 3)), np.zeros(0),
                method, with_states=False)
        res = _charged_result(cluster, method, emb, vac, cluster.env_positions, cluster.env_charges, None)
    res.meta.update({"method": method.to_dict(), "versions": software_versions(),
                     "timings_s": {"total": time.perf_counter() - t0}})
    if not res.converged:
        msg = f"ΔSCF not converged: {[k for k, v in res.converged_flags.items() if not v]}"
        if raise_on_failure:
            raise ConvergenceError(msg)
        warnings.warn(msg, EmbeddingWarning, stacklevel=2)
    return res


def _same_qm(a: Cluster, b: Cluster) -> bool:
    return (a.qm_symbols == b.qm_symbols and a.qm_charge == b.qm_charge
            and np.allclose(a.qm_positions, b.qm_positions, atol=1e-6, rtol=0))


def excitation_series(clusters: Iterable[Cluster], method: Method, *, vacuum: bool = True, warm: bool = True,
                      raise_on_failure: bool = False,
                      progress: Callable[[str], None] | None = None) -> list[ExcitationResult]:
    """Excitations of a series of clusters around the same QM region (e.g.
    growing radii), chaining warm starts.

    The vacuum calculation is done once and shared. With ``warm=True`` each
    SCF starts from the previous cluster's density (the first from the
    vacuum density) and each Davidson solve from the previous response
    vectors rotated into the new orbitals. Clusters whose QM region differs
    from the first get their own vacuum calculation and a cold start.

    Returns
    -------
    list of ExcitationResult, in the order of ``clusters``.
    """
    clusters = list(clusters)
    out: list[ExcitationResult] = []
    vac_calc: _Calc | None = None
    first: Cluster | None = None
    prev: ExcitationResult | None = None
    for k, c in enumerate(clusters):
        if progress:
            progress(f"cluster {k + 1}/{len(clusters)} (radius {c.radius_A:g} Å)")
        same = first is not None and _same_qm(first, c)
        vac_arg: bool | _Calc = vacuum
        guess = None
        if same and vac_calc is not None:
            vac_arg = vac_calc
            if warm and prev is not None and prev.scf_converged:
                guess = prev
        elif not vacuum and same and warm and prev is not None and prev.scf_converged:
            guess = prev
        res = _excitations(c, method, vacuum=vac_arg, guess=guess, raise_on_failure=raise_on_failure,
                           progress=progress)
        if not same:
            first = c
            vac_calc = (res._work or {}).get("vacuum")
        out.append(res)
        prev = res
    return out
