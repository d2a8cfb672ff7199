"""Point-charge embedded excitation energies and charged states with PySCF.

Model: the QM region is treated by DFT (or HF) in the electrostatic field of
fixed environment point charges (electrostatic embedding, PySCF ``qmmm``),
optionally Gaussian-smeared. With ``Method(environment="polarizable")`` the
molecules inside the cluster's polarizable radius also carry induced
dipoles (Thole model, :mod:`.induction`) solved with the QM density in the
SCF, the ΔSCF ions and the singlet response; the same cluster with fixed
charges is computed in the same call (``polarization_reference``), so every
state gets its polarization contribution. Left out: polarisation beyond the
polarizable radius, exchange-repulsion with the environment, and relaxation
of the geometry. Excitation energies are vertical; IP/EA are vertical ΔSCF
energies.

Every PySCF step (molecule, SCF with its documented fallback, response
solve) goes through :mod:`clusterlab.qm.calc`, the package's one door to
PySCF. The SCF route taken is recorded (``scf_route``). If all fail, every
energy that depends on it is ``nan`` with ``converged=False``, or
:class:`~clusterlab.errors.ConvergenceError` is raised when asked.
"""

from __future__ import annotations

import logging
import time
import warnings
from typing import Any, Callable, Iterable

import numpy as np
import numpy.typing as npt

from ..cluster import Cluster
from ..electrostatics.thole import THOLE_EXP_A, atomic_polarizabilities
from ..errors import ConvergenceError, GeometryError, InputError, QMRegionSizeWarning
from ..units import AU_DIPOLE_TO_DEBYE, HARTREE_TO_EV
from ..versions import software_versions
from .calc import (
    VACUUM,
    Calculation,
    Embedding,
    WarmStart,
    calculate,
    check_method,
    build_molecule,
    ion_states,
    n_electrons,
    omp_threads,
)
from .following import assign_states, transition_overlaps
from .induction import induced_dipole_options
from .method import Method, require_method
from .results import NAN, ChargedResult, ExcitationResult, ExcitedState

FloatArray = npt.NDArray[np.float64]
log = logging.getLogger("clusterlab.qm")

#: |net environment charge| (e) above which the embedding is called non-neutral: topology
#: charges printed to 6 decimals leave ~1e-6 e per molecule of rounding (common practice).
NEUTRAL_TOL_E = 1e-4


class EmbeddingWarning(UserWarning):
    """Issued when the environment carries a net charge (non-neutral
    embedding), or a calculation falls back or fails to converge."""


#: a QM region is warned about (:func:`qm_region_size_note`) when it has more than this many atoms
#: and more than :data:`QM_REGION_CENTRAL_FACTOR` times its central molecule's atoms (common practice:
#: a shell that doubles the QM region multiplies the cost by about 8)
QM_REGION_WARN_ATOMS = 100
QM_REGION_CENTRAL_FACTOR = 2.0

_QM_SIZE_WARNED: set[tuple] = set()


def _n_basis(symbols, method: Method) -> int:
    spin = n_electrons(symbols, 0) % 2
    return int(build_molecule(list(symbols), np.zeros((len(symbols), 3)) + np.arange(len(symbols))[:, None],
                              method, spin=spin).nao_nr())


def qm_region_size_note(cluster: Cluster, method: Method) -> str | None:
    """A warning text when the QM region of ``cluster`` is large, else None.

    Large: more than :data:`QM_REGION_WARN_ATOMS` atoms and more than
    :data:`QM_REGION_CENTRAL_FACTOR` times the central molecule's atoms
    (the first of ``cluster.qm_molecules``). The text gives both atom
    counts, both basis sizes in ``method.basis`` and a rough cost factor
    (N_basis(region) / N_basis(central))³: the SCF and response steps of
    dense linear algebra scale about as the cube of the basis size (common
    practice; integrals and the XC grid scale differently, so it is a rough
    estimate, not a prediction).
    """
    n = int(cluster.n_qm_atoms)
    if n == 0:
        return None
    central_mask = (np.asarray(cluster.qm_atom_molecules) == cluster.qm_molecules[0]
                    if len(cluster.qm_molecules) else np.ones(n, bool))
    n_central = int(np.count_nonzero(central_mask)) or n
    if n <= max(QM_REGION_WARN_ATOMS, QM_REGION_CENTRAL_FACTOR * n_central):
        return None
    symbols = list(cluster.qm_symbols)
    nbf = _n_basis(symbols, method)
    nbf0 = _n_basis([s for s, c in zip(symbols, central_mask) if c], method)
    factor = (nbf / nbf0) ** 3
    return (f"the QM region holds {n} atoms in {len(cluster.qm_molecules)} molecules ({n_central} in the central "
            f"molecule {cluster.center}, {n - n_central} added by the QM shell): {nbf} basis functions "
            f"({method.basis}) against {nbf0} for the central molecule alone, so each SCF and response step "
            f"costs roughly ({nbf}/{nbf0})³ ≈ {factor:.0f}× the central molecule's (a rough estimate: cubic "
            "scaling of the linear algebra; memory grows as the square). A smaller qm_shell is cheaper.")


def warn_qm_region_size(cluster: Cluster, method: Method, *, stacklevel: int = 2) -> str | None:
    """Warn (:class:`~clusterlab.errors.QMRegionSizeWarning`) about a large QM
    region, once per process for each region size and basis; returns the text
    (:func:`qm_region_size_note`) or None."""
    msg = qm_region_size_note(cluster, method)
    if msg is None:
        return None
    key = (cluster.n_qm_atoms, len(cluster.qm_molecules), method.basis)
    if key not in _QM_SIZE_WARNED:
        _QM_SIZE_WARNED.add(key)
        warnings.warn(msg, QMRegionSizeWarning, stacklevel=stacklevel + 1)
        log.warning("clusterlab.qm: %s", msg)
    return msg


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


def cluster_embedding(cluster: Cluster, method: Method) -> Embedding:
    """The :class:`Embedding` of ``cluster`` for ``method``: its charges, and
    with a polarizable method the van Duijnen-Swart polarizability of every
    atom marked ``env_polarizable`` (one exclusion group per molecule copy).

    Raises
    ------
    InputError
        A polarizable method on a cluster with point charges but no
        polarizable layer (carve with ``polarizable_radius=``), missing
        element symbols or molecule ids of the polarizable atoms, or an
        element without a polarizability.
    """
    pos, q = cluster.env_positions, cluster.env_charges
    if not method.is_polarizable:
        return Embedding(pos, q)
    mask = cluster.env_polarizable
    if not mask.any():
        if cluster.n_charges and cluster.polarizable_radius_A == 0:
            raise InputError("method.environment='polarizable' but the cluster has no polarizable layer: carve it "
                             "with Film.carve(..., polarizable_radius=R_inner) or set Cluster.env_polarizable.")
        return Embedding(pos, q)
    if not cluster.env_symbols:
        raise InputError("polarizable environment atoms need their elements (Cluster.env_symbols) for their "
                         "polarizabilities.")
    idx = np.flatnonzero(mask)
    mol = cluster.env_molecules
    if np.any(mol[idx] < 0):
        raise InputError("polarizable environment atoms need molecule ids (Cluster.env_molecules >= 0): a dipole "
                         "feels the charges of other molecules only.")
    alpha = np.zeros(cluster.n_charges)
    alpha[idx] = atomic_polarizabilities([cluster.env_symbols[i] for i in idx])
    _, groups = np.unique(np.column_stack([mol, cluster.env_images]), axis=0, return_inverse=True)
    return Embedding(pos, q, polarizabilities_A3=alpha, groups=np.asarray(groups).reshape(-1))


def _states_to_records(emb: Calculation, vac: Calculation | None,
                       fixed: Calculation | None = None) -> tuple[list[ExcitedState], int]:
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
                vct = vac.ct.get(kind)
                if vct is not None and i < len(vct[0]):
                    rec.vacuum_ct_distance_A = float(vct[0][i])
                rec.converged = rec.converged and bool(vrs.converged[i])
            if match is not None and match[i] >= 0:
                j = int(match[i])
                rec.followed_vacuum_state = f"{prefix}{j + 1}"
                rec.follow_overlap = float(value[i])
                rec.followed_shift_eV = e - float(vrs.energies_Eh[j] * HARTREE_TO_EV)
            frs = fixed.states.get(kind) if fixed is not None and fixed.converged else None
            if frs is not None and i < frs.n_states:
                rec.fixed_charges_eV = float(frs.energies_Eh[i] * HARTREE_TO_EV)
                rec.polarization_eV = e - rec.fixed_charges_eV
                rec.converged = rec.converged and bool(frs.converged[i])
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
    require_method(method, "the engine")
    nel = n_electrons(cluster.qm_symbols, cluster.qm_charge)
    if nel % 2:
        raise InputError(f"The QM region has {nel} electrons (qm_charge={cluster.qm_charge}); excited states "
                         "need a closed-shell ground state. Check qm_charge.")
    check_charge_distances(cluster, method.min_charge_distance_A)
    check_method(method, cluster.qm_symbols)


def _guess_parts(guess) -> tuple[Any, Calculation | None]:
    if guess is None:
        return None, None
    if isinstance(guess, ExcitationResult):
        ws = guess.warm_start
        return guess.dm, (ws.ground if ws is not None else None)
    if isinstance(guess, WarmStart):
        return guess.ground.dm, guess.ground
    if isinstance(guess, Calculation):
        return guess.dm, guess
    return np.asarray(guess, dtype=float), None


#: An aligned copy's density is the vacuum SCF guess only when the copies superpose this well (Å):
#: rigid copies (RMSD ~0.1 Å) converge in <= 4 cycles (tests/test_guess.py), while the doped film's
#: emitter 1401 from 1400 (RMSD 1.25 Å, other torsions) took 130 s against 75 s cold
#: (bench/bench_large_site.py). 0.5 Å lies between the two measured points; it is not tuned further.
COPY_GUESS_MAX_RMSD_A = 0.5


def _copy_guess_dm(copy_guess, cluster: Cluster, method: Method, timings: dict[str, float]):
    """The vacuum orbitals of another copy of the same molecule rotated onto
    this one (qm.guess.aligned_density), or None when they do not apply
    (another molecule or basis, or a superposition RMSD above
    :data:`COPY_GUESS_MAX_RMSD_A`; the RMSD is recorded either way)."""
    ws = copy_guess.warm_start if isinstance(copy_guess, ExcitationResult) else copy_guess
    ref = ws.vacuum if isinstance(ws, WarmStart) else ws if isinstance(ws, Calculation) else None
    if ref is None or not ref.converged or ref.mol is None:
        return None
    if ref.mol.basis != method.basis:
        return None
    from .guess import aligned_density

    try:  # aligned_density itself refuses another molecule (other atoms or order)
        dm, rmsd = aligned_density(ref.mol, ref.mo_coeff, ref.mo_occ, ref.mol.elements,
                                   [s.capitalize() for s in cluster.qm_symbols], cluster.qm_positions)
    except InputError:
        return None
    timings["copy_guess_rmsd_A"] = rmsd
    if rmsd > COPY_GUESS_MAX_RMSD_A:
        log.info("copy guess not used: the copies superpose to %.2f Å RMSD (limit %.2f Å)", rmsd,
                 COPY_GUESS_MAX_RMSD_A)
        return None
    return dm


def _excitations(cluster: Cluster, method: Method, *, vacuum: "bool | Calculation | ExcitationResult" = True,
                 guess=None,
                 raise_on_failure: bool = False, progress=None, embedding: Embedding | None = None,
                 radius_A: float | None = None, copy_guess=None) -> ExcitationResult:
    t_start = time.perf_counter()
    _validate(cluster, method)
    if isinstance(vacuum, ExcitationResult):  # an earlier result of this QM region: reuse its vacuum
        vac = vacuum.warm_start.vacuum if vacuum.warm_start is not None else None
        if vac is None:
            raise InputError("vacuum= was given a result without an in-memory vacuum calculation "
                             "(results loaded from JSON carry none); pass vacuum=True.")
        vacuum = vac
    if embedding is None:
        embedding = cluster_embedding(cluster, method)
    env_q = embedding.charges_e
    periodic = embedding.periodic
    qm = (cluster.qm_symbols, cluster.qm_positions, method)
    net = float(np.sum(env_q))
    warn: list[str] = []
    if abs(net) > NEUTRAL_TOL_E:
        msg = (f"Non-neutral embedding: the environment carries {net:+.6f} e. Shifts then include the "
               "monopole potential of that charge; check the charge source or the carving rule.")
        warnings.warn(msg, EmbeddingWarning, stacklevel=3)
        warn.append(msg)
    big = warn_qm_region_size(cluster, method, stacklevel=3)
    if big is not None:
        warn.append(big)
    log.info("clusterlab.qm: %s; %d QM atoms, %d charges", method.describe(), cluster.n_qm_atoms, len(env_q))
    guess_dm, guess_calc = _guess_parts(guess)
    timings: dict[str, float] = {}
    with omp_threads(method.threads):
        vac: Calculation | None = None
        if isinstance(vacuum, Calculation):
            vac = vacuum
        elif vacuum:
            t = time.perf_counter()
            vac_dm = _copy_guess_dm(copy_guess, cluster, method, timings) if copy_guess is not None else None
            vac = calculate(*qm, VACUUM, charge=cluster.qm_charge, guess_dm=vac_dm, progress=progress,
                            tag="vacuum")
            timings["vacuum"] = time.perf_counter() - t
            for k, v in vac.timings.items():
                timings[f"vacuum_{k}"] = v
        fixed: Calculation | None = None
        if embedding.is_vacuum and vac is not None:
            emb = vac  # no charges: the vacuum calculation is the embedded one
        else:
            if guess_dm is None and vac is not None and vac.converged:
                guess_dm = vac.dm
            if guess_calc is None and vac is not None:
                guess_calc = vac
            if embedding.is_polarizable and method.polarization_reference:
                ref_dm, ref_calc = _reference_guess(guess, guess_dm, guess_calc)
                t = time.perf_counter()
                fixed = calculate(*qm, embedding.fixed(), charge=cluster.qm_charge, guess_dm=ref_dm,
                                  warm_from=ref_calc, progress=progress, tag="fixed charges")
                timings["fixed_charges"] = time.perf_counter() - t
                if fixed.converged:  # the polarizable SCF and Davidson start from the fixed-charge solution
                    guess_dm, guess_calc = fixed.dm, fixed
            emb = calculate(*qm, embedding, charge=cluster.qm_charge, guess_dm=guess_dm, warm_from=guess_calc,
                            progress=progress, tag="embedded")
        if method.is_polarizable and method.polarization_reference and not embedding.is_polarizable:
            fixed = emb  # no dipole inside the inner radius: the calculation is its own reference
        timings.update(emb.timings)
        charged = None
        if method.charged_states:
            t = time.perf_counter()
            charged = _charged_result(cluster, method, emb, vac, embedding, fixed)
            timings["charged"] = time.perf_counter() - t
    if emb.converged:
        t = time.perf_counter()
        states, followed = _states_to_records(emb, vac, fixed)
        timings["following"] = time.perf_counter() - t
    else:
        states, followed = _failed_states(method), -1
    meta = _meta(cluster, method, timings, t_start, periodic, len(env_q), embedding)
    if fixed is not None and not fixed.converged:
        warn.append("the fixed-charge reference SCF did not converge: polarization contributions are nan")
    res = ExcitationResult(
        states=states, scf_energy_Eh=emb.energy_Eh, scf_converged=emb.converged, scf_route=emb.route,
        vacuum_scf_energy_Eh=vac.energy_Eh if vac is not None else NAN,
        vacuum_scf_converged=vac.converged if vac is not None else True,
        vacuum_scf_route=vac.route if vac is not None else "",
        ground_dipole_D=emb.dipole_D, vacuum_dipole_D=vac.dipole_D if vac is not None else [NAN] * 3,
        net_env_charge_e=net, neutral_embedding=abs(net) <= NEUTRAL_TOL_E, followed_index=followed,
        charged=charged, radius_A=float(cluster.radius_A if radius_A is None else radius_A),
        periodic=periodic is not None, warnings=warn, meta=meta, dm=emb.dm,
        environment=method.environment, polarizable_radius_A=float(cluster.polarizable_radius_A),
        n_polarizable=embedding.n_polarizable,
        warm_start=WarmStart(qm_fingerprint=cluster.fingerprint_qm(), ground=emb, vacuum=vac, fixed=fixed))
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


def _reference_guess(guess, guess_dm, guess_calc) -> tuple[Any, Calculation | None]:
    """Starting point of the fixed-charge reference: the previous result's
    own fixed-charge calculation when there is one (a radius series)."""
    ws = guess.warm_start if isinstance(guess, ExcitationResult) else guess if isinstance(guess, WarmStart) else None
    if ws is not None and ws.fixed is not None and ws.fixed.converged:
        return ws.fixed.dm, ws.fixed
    return guess_dm, guess_calc


def _meta(cluster: Cluster, method: Method, timings, t_start, periodic, n_charges: int,
          embedding: Embedding | None = None) -> dict[str, Any]:
    prov = cluster.provenance()
    prov["n_charges"] = int(n_charges)
    timings = dict(timings)
    timings["total"] = time.perf_counter() - t_start
    meta = {"method": method.to_dict(), "method_key": method.key(), "versions": software_versions(),
            "provenance": prov, "timings_s": {k: float(v) for k, v in timings.items()},
            "charge_model": ("gaussian" if method.charge_smearing_A > 0 else "point"),
            "embedding": "periodic-ewald" if periodic is not None else "cluster"}
    if embedding is not None and embedding.is_polarizable:
        meta["polarizable"] = polarizable_meta(embedding, method)
    if periodic is not None:
        meta["periodic"] = {k: (np.asarray(v).tolist() if isinstance(v, np.ndarray) else v)
                            for k, v in periodic.items()}
    return meta


def polarizable_meta(embedding: Embedding, method: Method) -> dict[str, Any]:
    """What a result records about its induced dipoles."""
    return {"n_dipoles": embedding.n_polarizable,
            "polarizabilities": "van Duijnen & Swart 1998 exponential Thole set (atomic, isotropic)",
            "damping": f"Thole exponential, a = {THOLE_EXP_A} (dipole-dipole, intra- and intermolecular); "
                       "permanent and QM fields undamped",
            "permanent_field": "charges of other molecule copies only",
            "response": ("singlets: induced dipoles answer the transition density; triplets: none needed"
                         if method.excited in ("tda", "tddft", "stda-refined") else
                         "sTDA: through the orbitals only"),
            "solver": {k: v for k, v in induced_dipole_options(embedding.n_polarizable).items()},
            "reference": bool(method.polarization_reference)}


def _ion_energies(cluster: Cluster, method: Method, neutral: Calculation, embedding: Embedding
                  ) -> tuple[dict[str, float], dict[str, bool]]:
    ions = ion_states(cluster.qm_symbols, cluster.qm_positions, method, embedding, neutral=neutral,
                      charge=cluster.qm_charge)
    energies = {"neutral": neutral.energy_Eh, **{k: v.energy_Eh for k, v in ions.items()}}
    flags = {"neutral": neutral.converged, **{k: v.converged for k, v in ions.items()}}
    return energies, flags


def _charged_result(cluster, method, emb: Calculation, vac: Calculation | None, embedding: Embedding,
                    fixed: Calculation | None = None) -> ChargedResult:
    e, flags = _ion_energies(cluster, method, emb, embedding)
    ip = (e["cation"] - e["neutral"]) * HARTREE_TO_EV
    ea = (e["neutral"] - e["anion"]) * HARTREE_TO_EV
    nocc = int((emb.mo_occ > 0).sum())
    res = ChargedResult(neutral_Eh=e["neutral"], cation_Eh=e["cation"], anion_Eh=e["anion"], IP_eV=ip, EA_eV=ea,
                        koopmans_IP_eV=float(-emb.mo_energy[nocc - 1] * HARTREE_TO_EV) if emb.converged else NAN,
                        converged_flags=dict(flags), environment=method.environment)
    if fixed is not None:
        ef, ff = (e, flags) if fixed is emb else _ion_energies(cluster, method, fixed, embedding.fixed())
        res.IP_fixed_eV = (ef["cation"] - ef["neutral"]) * HARTREE_TO_EV
        res.EA_fixed_eV = (ef["neutral"] - ef["anion"]) * HARTREE_TO_EV
        res.IP_polarization_eV = ip - res.IP_fixed_eV
        res.EA_polarization_eV = ea - res.EA_fixed_eV
        res.converged_flags.update({f"fixed_{k}": v for k, v in ff.items()})
    if vac is not None:
        if vac is emb:
            ev, fv = e, flags
        else:
            ev, fv = _ion_energies(cluster, method, vac, VACUUM)
        res.vacuum_neutral_Eh, res.vacuum_cation_Eh, res.vacuum_anion_Eh = ev["neutral"], ev["cation"], ev["anion"]
        res.IP_vacuum_eV = (ev["cation"] - ev["neutral"]) * HARTREE_TO_EV
        res.EA_vacuum_eV = (ev["neutral"] - ev["anion"]) * HARTREE_TO_EV
        res.IP_shift_eV = ip - res.IP_vacuum_eV
        res.EA_shift_eV = ea - res.EA_vacuum_eV
        res.converged_flags.update({f"vacuum_{k}": v for k, v in fv.items()})
    res.meta = {"provenance": cluster.provenance(), "radius_A": float(cluster.radius_A),
                "polarizable_radius_A": float(cluster.polarizable_radius_A), "method_key": method.key()}
    return res


def excitations(cluster: Cluster, method: Method, *, vacuum: "bool | ExcitationResult" = True, guess=None,
                raise_on_failure: bool = False, progress: Callable[[str], None] | None = None,
                copy_guess: "ExcitationResult | None" = None) -> ExcitationResult:
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
    copy_guess : ExcitationResult or None
        An in-memory result of *another copy of the same molecule* (same
        atoms in the same order, same basis): its vacuum orbitals, rotated
        onto this copy by the best superposition of the atoms
        (:func:`clusterlab.qm.guess.aligned_density`), start the vacuum SCF
        (fewer SCF cycles; the converged answer is the same). Ignored when it
        does not apply.

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
    return _excitations(cluster, method, vacuum=vacuum, guess=guess, raise_on_failure=raise_on_failure,
                        progress=progress, copy_guess=copy_guess)


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
    with omp_threads(method.threads):
        qm = (cluster.qm_symbols, cluster.qm_positions, method)
        embedding = cluster_embedding(cluster, method)
        fixed = None
        if embedding.is_polarizable and method.polarization_reference:
            fixed = calculate(*qm, embedding.fixed(), charge=cluster.qm_charge, with_states=False)
        emb = calculate(*qm, embedding, charge=cluster.qm_charge, with_states=False,
                        guess_dm=fixed.dm if fixed is not None and fixed.converged else None)
        if method.is_polarizable and method.polarization_reference and fixed is None:
            fixed = emb
        vac = None
        if vacuum:
            vac = emb if embedding.is_vacuum else calculate(*qm, VACUUM, charge=cluster.qm_charge, with_states=False)
        res = _charged_result(cluster, method, emb, vac, embedding, fixed)
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
    vac_calc: Calculation | None = None
    first: Cluster | None = None
    prev: ExcitationResult | None = None
    for k, c in enumerate(clusters):
        if progress:
            progress(f"cluster {k + 1}/{len(clusters)} (radius {c.radius_A:g} Å)")
        same = first is not None and _same_qm(first, c)
        vac_arg: bool | Calculation = vacuum
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
            vac_calc = res.warm_start.vacuum if res.warm_start is not None else None
        out.append(res)
        prev = res
    return out
