"""Point-charge embedded excitation energies and charged states with PySCF.

Model: the QM region is treated by DFT (or HF) in the electrostatic field of
fixed environment point charges (electrostatic embedding, PySCF ``qmmm``),
optionally Gaussian-smeared. Left out: polarisation of the environment by
the QM region (and by the excitation), exchange-repulsion with the
environment, and relaxation of the geometry. Excitation energies are
vertical; IP/EA are vertical ΔSCF energies.

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
from ..errors import ConvergenceError, GeometryError, InputError
from ..units import AU_DIPOLE_TO_DEBYE, HARTREE_TO_EV
from ..versions import software_versions
from .calc import (
    VACUUM,
    Calculation,
    Embedding,
    WarmStart,
    calculate,
    check_method,
    ion_states,
    n_electrons,
    omp_threads,
)
from .following import assign_states, transition_overlaps
from .method import Method
from .results import NAN, ChargedResult, ExcitationResult, ExcitedState

FloatArray = npt.NDArray[np.float64]
log = logging.getLogger("clusterlab.qm")

#: |net environment charge| (e) above which the embedding is called non-neutral: topology
#: charges printed to 6 decimals leave ~1e-6 e per molecule of rounding (common practice).
NEUTRAL_TOL_E = 1e-4


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


def _states_to_records(emb: Calculation, vac: Calculation | None) -> tuple[list[ExcitedState], int]:
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


def _excitations(cluster: Cluster, method: Method, *, vacuum: bool | Calculation = True, guess=None,
                 raise_on_failure: bool = False, progress=None, embedding: Embedding | None = None,
                 radius_A: float | None = None) -> ExcitationResult:
    t_start = time.perf_counter()
    _validate(cluster, method)
    if embedding is None:
        embedding = Embedding(cluster.env_positions, cluster.env_charges)
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
    log.info("clusterlab.qm: %s; %d QM atoms, %d charges", method.describe(), cluster.n_qm_atoms, len(env_q))
    guess_dm, guess_calc = _guess_parts(guess)
    timings: dict[str, float] = {}
    with omp_threads(method.threads):
        vac: Calculation | None = None
        if isinstance(vacuum, Calculation):
            vac = vacuum
        elif vacuum:
            t = time.perf_counter()
            vac = calculate(*qm, VACUUM, charge=cluster.qm_charge, progress=progress, tag="vacuum")
            timings["vacuum"] = time.perf_counter() - t
            for k, v in vac.timings.items():
                timings[f"vacuum_{k}"] = v
        if embedding.is_vacuum and vac is not None:
            emb = vac  # no charges: the vacuum calculation is the embedded one
        else:
            if guess_dm is None and vac is not None and vac.converged:
                guess_dm = vac.dm
            if guess_calc is None and vac is not None:
                guess_calc = vac
            emb = calculate(*qm, embedding, charge=cluster.qm_charge, guess_dm=guess_dm, warm_from=guess_calc,
                            progress=progress, tag="embedded")
        timings.update(emb.timings)
        charged = None
        if method.charged_states:
            t = time.perf_counter()
            charged = _charged_result(cluster, method, emb, vac, embedding)
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
        warm_start=WarmStart(qm_fingerprint=cluster.fingerprint_qm(), ground=emb, vacuum=vac))
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


def _ion_energies(cluster: Cluster, method: Method, neutral: Calculation, embedding: Embedding
                  ) -> tuple[dict[str, float], dict[str, bool]]:
    ions = ion_states(cluster.qm_symbols, cluster.qm_positions, method, embedding, neutral=neutral,
                      charge=cluster.qm_charge)
    energies = {"neutral": neutral.energy_Eh, **{k: v.energy_Eh for k, v in ions.items()}}
    flags = {"neutral": neutral.converged, **{k: v.converged for k, v in ions.items()}}
    return energies, flags


def _charged_result(cluster, method, emb: Calculation, vac: Calculation | None, embedding: Embedding
                    ) -> ChargedResult:
    e, flags = _ion_energies(cluster, method, emb, embedding)
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
            ev, fv = _ion_energies(cluster, method, vac, VACUUM)
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
        vac = vacuum.warm_start.vacuum if vacuum.warm_start is not None else None
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
    with omp_threads(method.threads):
        qm = (cluster.qm_symbols, cluster.qm_positions, method)
        embedding = Embedding(cluster.env_positions, cluster.env_charges)
        emb = calculate(*qm, embedding, charge=cluster.qm_charge, with_states=False)
        vac = None
        if vacuum:
            vac = emb if embedding.is_vacuum else calculate(*qm, VACUUM, charge=cluster.qm_charge, with_states=False)
        res = _charged_result(cluster, method, emb, vac, embedding)
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
