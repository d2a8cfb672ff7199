"""Site and pair tables for transport models, with a self-describing sidecar.

What an export holds
--------------------
- a **site table**: one row per (frame, molecule) with the centroid (wrapped
  into the primary cell and unwrapped, continuous over frames), every
  computed site energy (S1, T1, IP, EA, eV), the environment shifts, the
  model that produced each value and flags (:func:`site_table`);
- a **pair table**: neighbour pairs of each frame within a cutoff, each once
  (``i < j``) with the minimum-image vector, excitonic couplings from
  transition charges and from the point-dipole formula, optional hole and
  electron transfer integrals (:func:`pair_table`) and optional hopping rates
  (:func:`hopping_rates`);
- ``export.json``: units and meaning of every column, the method, radii,
  models, software versions, film provenance, rate formulas and what the
  models leave out (:func:`write_export`, :func:`read_export`).

The files are plain Parquet and CSV, readable without clusterlab; the layout
is described in ``docs_export_format.md``.

Sign conventions follow :mod:`clusterlab.transport.rates`: the carrier site
energy is ``+IP`` for a hole, ``-EA`` for an electron and ``S1`` (or ``T1``)
for an exciton; a hop ``i -> j`` changes the energy by ``E_j - E_i``.
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import os
import warnings
from pathlib import Path
from typing import TYPE_CHECKING, Any, Iterable, Literal, Mapping, NamedTuple, Sequence

import numpy as np
import numpy.typing as npt
import pandas as pd

from ..errors import InputError
from ..geometry import minimum_image
from ..units import COULOMB_EV_A, DEBYE_E_A, HBAR_EV_S, KB_EV
from ..versions import software_versions
from .couplings import orientation_factor, point_dipole_coupling
from .pairs import neighbour_pairs
from .rates import carrier_charge, field_energy_change, marcus_rate, miller_abrahams_rate

if TYPE_CHECKING:  # pragma: no cover
    from ..film import Film

FloatArray = npt.NDArray[np.float64]

__all__ = [
    "EXPORT_FORMAT",
    "EXPORT_FORMAT_VERSION",
    "QUANTITIES",
    "ExportTables",
    "site_table",
    "unwrapped_centroids",
    "pair_table",
    "hopping_rates",
    "column_info",
    "export_metadata",
    "write_export",
    "read_export",
    "export_study",
    "graph_from_export",
]

#: value of the sidecar's ``format`` key
EXPORT_FORMAT = "clusterlab-transport-tables"
#: value of the sidecar's ``format_version`` key (bumped on incompatible changes)
EXPORT_FORMAT_VERSION = 1
#: site quantities of the site table
QUANTITIES = ("S1", "T1", "IP", "EA")
#: file names inside an export folder
FILE_NAMES = {
    "sites_parquet": "sites.parquet", "sites_csv": "sites.csv",
    "pairs_parquet": "pairs.parquet", "pairs_csv": "pairs.csv",
    "sidecar": "export.json",
}
#: the text written when no model produced a value (CSV keeps it, unlike "")
NO_SOURCE = "none"

# model shift columns of film_site_energies for each quantity (engine sign convention)
_MODEL_SHIFT = {"S1": "S1_shift_eV", "T1": "T1_shift_eV", "IP": "IP_shift_eV", "EA": "EA_shift_eV"}

_SIGN_CONVENTIONS = {
    "IP_eV": "ionisation energy E(cation) - E(neutral) of the site in its environment (positive)",
    "EA_eV": "electron affinity E(neutral) - E(anion) of the site in its environment (positive when bound)",
    "hole_site_energy": "+IP_eV (a hole prefers sites of low IP)",
    "electron_site_energy": "-EA_eV (an electron prefers sites of high EA)",
    "exciton_site_energy": "S1_eV or T1_eV",
    "hop_energy_change": "dE_eV = E_j - E_i (positive = uphill for the hop i -> j), minus q F.dr in a field",
    "shift": "environment shift = embedded value - vacuum value of the same molecule geometry",
    "pair_vector": "dx_A, dy_A, dz_A = minimum-image vector from the centroid of i to that of j",
    "coupling_sign": ("the sign of excitonic couplings and transfer integrals follows the arbitrary "
                      "phases of the molecular transition densities / orbitals; rates use |J| only"),
}


# ----------------------------------------------------------------------------
# column documentation
# ----------------------------------------------------------------------------
_COLUMNS: dict[str, tuple[str, str]] = {
    "frame": ("", "trajectory frame index (0-based)"),
    "molecule": ("", "molecule id (0-based, order of the film's molecules table)"),
    "resname": ("", "residue name of the molecule"),
    "species": ("", "molecule type (the residue name); sites of one species share model parameters"),
    "x_A": ("Å", "centroid x, whole molecule, wrapped into the primary cell"),
    "y_A": ("Å", "centroid y, whole molecule, wrapped into the primary cell"),
    "z_A": ("Å", "centroid z, whole molecule, wrapped into the primary cell"),
    "x_unwrapped_A": ("Å", "centroid x, continuous over frames (consecutive-frame minimum-image unwrapping from frame 0)"),
    "y_unwrapped_A": ("Å", "centroid y, continuous over frames"),
    "z_unwrapped_A": ("Å", "centroid z, continuous over frames"),
    "dEST_eV": ("eV", "S1_eV - T1_eV"),
    "S1_osc": ("", "oscillator strength of S1 (QM)"),
    "qm_radius_A": ("Å", "radius of the QM cluster calculation used for the QM columns (inf = periodic limit)"),
    "qm_method_key": ("", "SHA-256 key of the QM method (see the sidecar's method entry)"),
    "qm_converged": ("", "all SCF/response steps of the QM calculation converged (False also where the site has no QM row: see qm_radius_A)"),
    "unconverged": ("", "True if any of the row's chosen values is flagged unconverged_<Q>"),
    "extrapolated": ("", "True if any of the row's chosen values is flagged extrapolated_<Q>"),
    "model_converged": ("", "induced dipoles of the polarizable model converged (True without polarization)"),
    "n_env_molecules": ("", "environment molecule images of the electrostatic model"),
    # pairs
    "i": ("", "molecule id of the first site of the pair (i < j)"),
    "j": ("", "molecule id of the second site of the pair"),
    "resname_i": ("", "residue name of i"),
    "resname_j": ("", "residue name of j"),
    "distance_A": ("Å", "minimum-image centroid-centroid distance"),
    "dx_A": ("Å", "minimum-image vector from centroid i to centroid j, x"),
    "dy_A": ("Å", "minimum-image vector from centroid i to centroid j, y"),
    "dz_A": ("Å", "minimum-image vector from centroid i to centroid j, z"),
    "min_atom_distance_A": ("Å", "closest minimum-image atom-atom distance between i and j"),
    "V_charges_eV": ("eV", "excitonic coupling from S0->S1 transition charges (Coulomb sum, screened by 1/n^2)"),
    "V_dipole_eV": ("eV", "excitonic coupling from the point-dipole formula with the transition dipoles below"),
    "kappa": ("", "orientation factor cos(theta_ij) - 3 cos(theta_i) cos(theta_j) of the two transition dipoles"),
    "mu_i_x_D": ("D", "transition dipole of i (sum q r over its transition charges at its own geometry), x"),
    "mu_i_y_D": ("D", "transition dipole of i, y"),
    "mu_i_z_D": ("D", "transition dipole of i, z"),
    "mu_j_x_D": ("D", "transition dipole of j, x"),
    "mu_j_y_D": ("D", "transition dipole of j, y"),
    "mu_j_z_D": ("D", "transition dipole of j, z"),
    "J_hole_eV": ("eV", "hole transfer integral (HOMO/HOMO, projective dimer method, Löwdin-orthogonalised)"),
    "J_electron_eV": ("eV", "electron transfer integral (LUMO/LUMO, projective dimer method)"),
    "transfer_converged": ("", "all three SCF runs of the transfer-integral calculation converged (False also where the pair has no transfer integral)"),
    "E_i_eV": ("eV", "carrier site energy of i used for the rates (+IP hole, -EA electron, S1/T1 exciton)"),
    "E_j_eV": ("eV", "carrier site energy of j used for the rates"),
    "dE_eV": ("eV", "energy change of the hop i -> j: E_j - E_i - q F.dr"),
    "rate_ij_per_s": ("s^-1", "hopping rate i -> j (law and parameters in the sidecar's rates entry)"),
    "rate_ji_per_s": ("s^-1", "hopping rate j -> i"),
}

_QUANTITY_WORDS = {"S1": "lowest singlet excitation energy S1", "T1": "lowest triplet excitation energy T1",
                   "IP": "ionisation energy", "EA": "electron affinity"}


def column_info(name: str) -> tuple[str, str]:
    """Unit and meaning of an export column.

    Parameters
    ----------
    name : str
        Column name of a site or pair table.

    Returns
    -------
    (unit, meaning) : tuple of str
        ``unit`` is ``""`` for dimensionless numbers, ids, text and flags.
        Unknown columns get a unit from their suffix (``_eV``, ``_A``,
        ``_per_s``, ``_D``) and the meaning ``"(not documented)"``.
    """
    if name in _COLUMNS:
        return _COLUMNS[name]
    for q, word in _QUANTITY_WORDS.items():
        if name == f"{q}_eV":
            return "eV", f"{word} of the site: the QM value when there is one, else the model value (see source_{q})"
        if name == f"{q}_shift_eV":
            return "eV", f"environment shift of {q} that goes with {q}_eV (embedded - vacuum)"
        if name == f"{q}_qm_eV":
            return "eV", f"{word} from the embedded QM calculation"
        if name == f"{q}_shift_qm_eV":
            return "eV", f"environment shift of {q} from the embedded QM calculation"
        if name == f"{q}_vacuum_eV":
            return "eV", f"{word} of the same molecule geometry without environment (QM)"
        if name == f"{q}_model_eV":
            return "eV", f"{word} from the electrostatic model: vacuum value of the species + model shift"
        if name == f"{q}_shift_model_eV":
            return "eV", f"environment shift of {q} from the electrostatic model"
        if name == f"unconverged_{q}":
            return "", f"True if {q}_eV comes from a calculation that did not converge"
        if name == f"extrapolated_{q}":
            return "", (f"True if {q}_eV is not a converged-radius QM value (it comes from the electrostatic "
                        "model, or its QM radius is below the scan verdict's converged radius)")
        if name == f"source_{q}":
            return "", (f"which model produced {q}_eV: 'qm:R=<radius>A:<method key prefix>', "
                        f"'electrostatic-model:R=<radius>A:<kind>' or '{NO_SOURCE}'")
    if name.endswith("rate_ij_per_s") or name.endswith("rate_ji_per_s"):
        label = name[: -len("rate_ij_per_s")].rstrip("_")
        d = "i -> j" if "ij" in name[-12:] else "j -> i"
        return "s^-1", f"hopping rate {d} of the rate set {label!r} (see the sidecar's rates entry)"
    for suffix, unit in (("_eV", "eV"), ("_per_s", "s^-1"), ("_A", "Å"), ("_D", "D"), ("_K", "K")):
        if name.endswith(suffix):
            return unit, "(not documented)"
    return "", "(not documented)"


# ----------------------------------------------------------------------------
# site table
# ----------------------------------------------------------------------------
def unwrapped_centroids(film: "Film", last_frame: int) -> FloatArray:
    """Centroids of whole molecules, continuous across frames 0..last_frame.

    ``u(0)`` is the primary-cell centroid of frame 0 and
    ``u(f) = u(f-1) + minimum_image(c(f) - c(f-1), box(f))``, where ``c(f)`` is
    the primary-cell centroid of the whole molecule in frame ``f``. Exact as
    long as no centroid moves by more than half the smallest box width
    between consecutive frames (true for MD snapshots of a solid film).
    Without a box the centroids are returned as they are.

    Parameters
    ----------
    film : Film
    last_frame : int
        Last frame needed (every frame before it is read once).

    Returns
    -------
    ndarray, shape (last_frame + 1, n_molecules, 3), Å
    """
    last = film.check_frame(last_frame)
    out = np.empty((last + 1, film.n_molecules, 3))
    periodic = film.has_box
    prev = None
    for f in range(last + 1):
        geo = film.frame_geometry(f, periodic=periodic)
        c = np.asarray(geo.centroids_A, dtype=np.float64)
        if prev is None or geo.box is None:
            out[f] = c
        else:
            out[f] = out[f - 1] + minimum_image(c - prev, geo.box)
        prev = c
    return out


def _qm_frame(qm: Any) -> pd.DataFrame | None:
    if qm is None:
        return None
    table = getattr(qm, "table", qm)
    if not isinstance(table, pd.DataFrame):
        raise InputError(f"qm= must be a SiteSample, its table or a store DataFrame; got {type(qm).__name__}.")
    t = table.copy()
    if "status" in t.columns:
        t = t[t["status"] == "done"]
    if "kind" in t.columns:
        t = t[t["kind"].isin(["excitations", "periodic", "charged"])]
    miss = [c for c in ("frame", "molecule", "radius_A") if c not in t.columns]
    if miss:
        raise InputError(f"the QM table lacks the column(s) {miss}; give a SiteSample, its .table or "
                         "ResultStore.to_frame().")
    t = t.dropna(subset=["frame", "molecule"])
    t["frame"] = t["frame"].astype(np.int64)
    t["molecule"] = t["molecule"].astype(np.int64)
    t["radius_A"] = t["radius_A"].astype(float)
    return t


def _pick_radius(t: pd.DataFrame, qm_radius_A: float | None) -> pd.DataFrame:
    if qm_radius_A is not None:
        sel = t[np.isclose(t["radius_A"], float(qm_radius_A)) | (np.isinf(t["radius_A"]) & math.isinf(qm_radius_A))]
        if sel.empty:
            raise InputError(f"the QM table has no rows at radius {qm_radius_A!r} Å; it has radii "
                             f"{sorted(set(t['radius_A'].tolist()))}.")
        t = sel
    # largest radius per site (the periodic limit, inf, counts as largest)
    t = t.sort_values(["frame", "molecule", "radius_A"], kind="stable")
    return t.groupby(["frame", "molecule"], as_index=False, sort=True).tail(1)


def _verdict_radius(verdict: Any) -> tuple[bool, float | None]:
    """``(converged, radius_A)`` from a ConvergenceVerdict, ScanResult or mapping."""
    v = getattr(verdict, "verdict", verdict)
    if isinstance(v, Mapping):
        conv, r = bool(v.get("converged")), v.get("radius_A")
    elif hasattr(v, "converged"):
        conv, r = bool(v.converged), getattr(v, "radius_A", None)
    else:
        raise InputError(f"verdict= must be a ConvergenceVerdict, a ScanResult or a dict with 'converged' and "
                         f"'radius_A'; got {type(verdict).__name__}.")
    return conv, (None if r is None else float(r))


def _vacuum_table(vacuum_eV: Any) -> dict[str, dict[str, float]]:
    """Per-species vacuum values {resname: {quantity: eV}} from a mapping or a StateChargeSet."""
    if vacuum_eV is None:
        return {}
    fits = getattr(vacuum_eV, "fits", None)
    if fits is not None:  # a StateChargeSet: its reference fits carry vacuum energies
        out: dict[str, dict[str, float]] = {}
        for res, fit in fits.items():
            e = dict(getattr(fit, "energy_eV", {}) or {})
            d: dict[str, float] = {}
            for q in ("S1", "T1"):
                if q in e:
                    d[q] = float(e[q])
            if "cation" in e:
                d["IP"] = float(e["cation"])
            if "anion" in e:  # energy_eV["anion"] = E(anion) - E(S0) = -EA
                d["EA"] = -float(e["anion"])
            out[str(res)] = d
        return out
    if not isinstance(vacuum_eV, Mapping):
        raise InputError("vacuum_eV= must be a mapping {resname: {'S1': eV, 'T1': eV, 'IP': eV, 'EA': eV}} "
                         f"or a StateChargeSet; got {type(vacuum_eV).__name__}.")
    out = {}
    for res, d in vacuum_eV.items():
        bad = [k for k in d if k not in QUANTITIES]
        if bad:
            raise InputError(f"vacuum_eV[{res!r}] has unknown quantities {bad}; use {list(QUANTITIES)}.")
        out[str(res)] = {k: float(v) for k, v in d.items()}
    return out


def _model_label(model: pd.DataFrame, model_radius_A: float | None) -> tuple[str, float | None]:
    r = model_radius_A if model_radius_A is not None else model.attrs.get("radius_A")
    kind = model.attrs.get("model", "charges")
    rtxt = "?" if r is None else f"{float(r):g}"
    return f"electrostatic-model:R={rtxt}A:{kind}", (None if r is None else float(r))


def site_table(
    film: "Film",
    *,
    qm: Any = None,
    model: pd.DataFrame | None = None,
    frames: Iterable[int] | None = None,
    verdict: Any = None,
    vacuum_eV: Any = None,
    qm_radius_A: float | None = None,
    model_radius_A: float | None = None,
) -> pd.DataFrame:
    """One row per (frame, molecule) with positions, site energies and their origin.

    Parameters
    ----------
    film : Film
    qm : SiteSample, DataFrame or None
        Embedded QM results: a :class:`~clusterlab.study.sample.SiteSample`,
        its ``.table``, or ``ResultStore.to_frame()`` (only ``done`` records
        of QM kinds are used). With several radii per site the largest is
        used (or ``qm_radius_A``).
    model : DataFrame or None
        :func:`~clusterlab.electrostatics.sitemodel.film_site_energies` output
        (environment shifts per state).
    frames : iterable of int, optional
        Frames to export (default: the frames of ``qm`` and ``model``, or all
        frames when neither is given).
    verdict : ConvergenceVerdict, ScanResult or mapping, optional
        Radius-convergence verdict of a scan: QM values at a radius below its
        converged radius (or any QM value when it did not converge) are
        flagged ``extrapolated``.
    vacuum_eV : mapping or StateChargeSet, optional
        Vacuum values per species, ``{resname: {"S1": eV, "T1": eV, "IP": eV,
        "EA": eV}}``, or a state-charge set (its reference fits' energies).
        With them the model's shifts become absolute energies
        (``<Q>_model_eV = vacuum + shift``); without them the model gives
        shifts only.
    qm_radius_A : float, optional
        Use the QM rows at this radius instead of the largest.
    model_radius_A : float, optional
        Radius of the model (default: ``model.attrs["radius_A"]``), for the
        source labels.

    Returns
    -------
    pandas.DataFrame
        Sorted by ``(frame, molecule)``; every molecule of the film appears
        in every frame (NaN where nothing was computed). Columns:
        ``frame, molecule, resname, species, x_A, y_A, z_A, x_unwrapped_A,
        y_unwrapped_A, z_unwrapped_A``; for each quantity Q of S1, T1, IP, EA
        that any input has: ``Q_eV, Q_shift_eV, source_Q`` (the chosen value:
        QM when present and finite, else the model), ``Q_qm_eV,
        Q_shift_qm_eV, Q_vacuum_eV`` (QM), ``Q_shift_model_eV`` and
        ``Q_model_eV`` (model); ``dEST_eV``, ``S1_osc``, ``qm_radius_A``,
        ``qm_method_key``, ``qm_converged``, ``model_converged``, the
        per-quantity flags ``unconverged_Q`` (the value's calculation did not
        converge) and ``extrapolated_Q`` (the value comes from the model, or
        from QM at a radius below the verdict's converged radius), and the
        row flags ``unconverged`` / ``extrapolated`` (any quantity). Units and meanings:
        :func:`column_info`. ``table.attrs["sources"]`` lists the models.

    Raises
    ------
    InputError
        For inputs of the wrong type, tables without ``frame``/``molecule``
        columns, or a ``qm_radius_A`` the table does not have.

    Notes
    -----
    When both QM and the model give a value for a site, both are kept (the
    ``_qm_`` and ``_model_`` columns) and the QM one is chosen for ``Q_eV``.
    Unwrapped centroids: see :func:`unwrapped_centroids`.
    """
    qt = _qm_frame(qm)
    if qt is not None and len(qt):
        qt = _pick_radius(qt, qm_radius_A)
    if model is not None and not isinstance(model, pd.DataFrame):
        raise InputError(f"model= must be the DataFrame of film_site_energies; got {type(model).__name__}.")
    if model is not None:
        miss = [c for c in ("frame", "molecule") if c not in model.columns]
        if miss:
            raise InputError(f"the model table lacks the column(s) {miss}.")
    if frames is not None:
        frame_list = sorted({film.check_frame(int(f)) for f in frames})
    else:
        fs: set[int] = set()
        if qt is not None:
            fs |= set(qt["frame"].astype(int).tolist())
        if model is not None:
            fs |= set(model["frame"].astype(int).tolist())
        frame_list = sorted(fs) if fs else list(range(film.n_frames))
    if not frame_list:
        raise InputError("no frames to export.")
    n_mol = film.n_molecules
    unwrapped = unwrapped_centroids(film, max(frame_list))
    names = np.asarray(film.molecule_resnames).astype(str)
    parts = []
    for f in frame_list:
        geo = film.frame_geometry(f, periodic=film.has_box)
        c = np.asarray(geo.centroids_A, dtype=np.float64)
        parts.append(pd.DataFrame({
            "frame": np.full(n_mol, f, dtype=np.int64), "molecule": np.arange(n_mol, dtype=np.int64),
            "resname": names, "species": names,
            "x_A": c[:, 0], "y_A": c[:, 1], "z_A": c[:, 2],
            "x_unwrapped_A": unwrapped[f, :, 0], "y_unwrapped_A": unwrapped[f, :, 1],
            "z_unwrapped_A": unwrapped[f, :, 2],
        }))
    out = pd.concat(parts, ignore_index=True)
    sources: list[dict[str, Any]] = []

    # ---- QM columns
    has_qm = qt is not None and len(qt) > 0
    if has_qm:
        keep = {"radius_A": "qm_radius_A"}
        if "method_key" in qt.columns:
            keep["method_key"] = "qm_method_key"
        if "converged" in qt.columns:
            keep["converged"] = "qm_converged"
        for q in QUANTITIES:
            for src, dst in ((f"{q}_eV", f"{q}_qm_eV"), (f"{q}_shift_eV", f"{q}_shift_qm_eV"),
                             (f"{q}_vacuum_eV", f"{q}_vacuum_eV")):
                if src in qt.columns:
                    keep[src] = dst
        if "S1_osc" in qt.columns:
            keep["S1_osc"] = "S1_osc"
        sub = qt[["frame", "molecule", *keep]].rename(columns=keep)
        out = out.merge(sub, on=["frame", "molecule"], how="left")
        for col in keep.values():
            if col not in ("qm_method_key", "qm_converged"):
                out[col] = pd.to_numeric(out[col], errors="coerce").astype(float)
        mk = out["qm_method_key"].fillna("").astype(str) if "qm_method_key" in out else pd.Series("", index=out.index)
        rad = out["qm_radius_A"]
        qm_label = np.where(rad.notna(), "qm:R=" + rad.map(lambda r: "inf" if np.isinf(r) else f"{r:g}A")
                            + ":" + mk.str[:10], NO_SOURCE)
        if "qm_converged" in out:
            qc = out["qm_converged"]
            out["qm_converged"] = qc.where(qc.notna(), False).astype(bool)
        for lab in sorted(set(qm_label) - {NO_SOURCE}):
            sources.append({"label": str(lab), "kind": "qm"})
    else:
        qm_label = np.full(len(out), NO_SOURCE, dtype=object)

    # ---- model columns
    has_model = model is not None and len(model) > 0
    model_label = NO_SOURCE
    if has_model:
        model_label, mr = _model_label(model, model_radius_A)
        vac = _vacuum_table(vacuum_eV)
        cols = {v: f"{q}_shift_model_eV" for q, v in _MODEL_SHIFT.items() if v in model.columns}
        extra = {}
        if "P_converged" in model.columns:
            extra["P_converged"] = "model_converged"
        if "n_env_molecules" in model.columns:
            extra["n_env_molecules"] = "n_env_molecules"
        m = model[["frame", "molecule", *cols, *extra]].rename(columns={**cols, **extra}).copy()
        m["frame"] = m["frame"].astype(np.int64)
        m["molecule"] = m["molecule"].astype(np.int64)
        out = out.merge(m, on=["frame", "molecule"], how="left")
        for q in QUANTITIES:
            sc = f"{q}_shift_model_eV"
            if sc not in out:
                continue
            out[sc] = out[sc].astype(float)
            v = out["species"].map(lambda r, q=q: vac.get(r, {}).get(q, np.nan)).astype(float)
            if np.isfinite(v).any():
                out[f"{q}_model_eV"] = v + out[sc]
        if "model_converged" in out:
            mc = out["model_converged"]
            out["model_converged"] = mc.where(mc.notna(), True).astype(bool)
        sources.append({"label": model_label, "kind": "electrostatic-model", "radius_A": mr,
                        "model": model.attrs.get("model"), "rule": model.attrs.get("rule"),
                        "environment": model.attrs.get("environment"),
                        "charges_method": model.attrs.get("charges_method"),
                        "vacuum_eV": vac or None})

    # ---- chosen values
    from_model = np.zeros(len(out), dtype=bool)
    present = []
    for q in QUANTITIES:
        qe, qs = f"{q}_qm_eV", f"{q}_shift_qm_eV"
        me, ms = f"{q}_model_eV", f"{q}_shift_model_eV"
        if not any(c in out for c in (qe, qs, me, ms)):
            continue
        present.append(q)
        nan = pd.Series(np.nan, index=out.index)
        qe_v = out[qe] if qe in out else nan
        qs_v = out[qs] if qs in out else nan
        me_v = out[me] if me in out else nan
        ms_v = out[ms] if ms in out else nan
        use_qm = np.isfinite(qe_v.to_numpy()) | (~np.isfinite(me_v.to_numpy()) & np.isfinite(qs_v.to_numpy()))
        use_model = ~use_qm & (np.isfinite(me_v.to_numpy()) | np.isfinite(ms_v.to_numpy()))
        out[f"{q}_eV"] = np.where(use_qm, qe_v, np.where(use_model, me_v, np.nan))
        out[f"{q}_shift_eV"] = np.where(use_qm, qs_v, np.where(use_model, ms_v, np.nan))
        out[f"source_{q}"] = np.where(use_qm, qm_label, np.where(use_model, model_label, NO_SOURCE)).astype(str)
        from_model |= use_model
    if "S1_eV" in out and "T1_eV" in out:
        out["dEST_eV"] = out["S1_eV"] - out["T1_eV"]

    # ---- flags, per quantity and for the row (any quantity)
    n_rows = len(out)
    qm_conv = out["qm_converged"].to_numpy(dtype=bool) if "qm_converged" in out else np.ones(n_rows, bool)
    mod_conv = out["model_converged"].to_numpy(dtype=bool) if "model_converged" in out else np.ones(n_rows, bool)
    below = np.zeros(n_rows, dtype=bool)
    if verdict is not None and has_qm:
        conv, r_conv = _verdict_radius(verdict)
        rad = out["qm_radius_A"].to_numpy(dtype=float)
        has_r = ~np.isnan(rad)
        if not conv or r_conv is None:
            below = has_r & ~np.isinf(rad)  # the periodic limit is its own reference
        else:
            below = has_r & (rad < r_conv - 1e-9)
    unconv = np.zeros(n_rows, dtype=bool)
    extrap = np.zeros(n_rows, dtype=bool)
    for q in present:
        src = out[f"source_{q}"]
        by_qm = src.str.startswith("qm:").to_numpy()
        by_model = src.str.startswith("electrostatic-model:").to_numpy()
        u_q = (by_qm & ~qm_conv) | (by_model & ~mod_conv)
        x_q = by_model | (by_qm & below)
        out[f"unconverged_{q}"] = u_q
        out[f"extrapolated_{q}"] = x_q
        unconv |= u_q
        extrap |= x_q
    out["unconverged"] = unconv
    out["extrapolated"] = extrap
    out = out.sort_values(["frame", "molecule"], kind="stable").reset_index(drop=True)
    out.attrs["sources"] = sources
    out.attrs["quantities"] = present
    if verdict is not None:
        conv, r_conv = _verdict_radius(verdict)
        out.attrs["verdict"] = {"converged": conv, "radius_A": r_conv}
    return out


# ----------------------------------------------------------------------------
# pair table
# ----------------------------------------------------------------------------
def _transition_charges_per_atom(film: "Film", transition_charges: Any) -> tuple[FloatArray, np.ndarray]:
    """Per-atom transition charges (NaN for uncovered molecules) and a per-molecule mask."""
    tr = getattr(transition_charges, "transition_e", transition_charges)
    if not isinstance(tr, Mapping):
        raise InputError("transition_charges= must be a mapping {resname: charges (e) in atom order} or a "
                         f"StateChargeSet with transition charges; got {type(transition_charges).__name__}.")
    names = np.asarray(film.molecule_resnames).astype(str)
    sizes = film.index.sizes()
    q = np.full(film.n_atoms, np.nan)
    covered = np.zeros(film.n_molecules, dtype=bool)
    for res, vec in tr.items():
        if vec is None:
            continue
        v = np.asarray(vec, dtype=np.float64).ravel()
        ids = np.flatnonzero(names == str(res))
        if ids.size == 0:
            continue
        bad = ids[sizes[ids] != v.size]
        if bad.size:
            raise InputError(f"transition charges of {res!r} have {v.size} values but molecule {int(bad[0])} has "
                             f"{int(sizes[bad[0]])} atoms; give one charge per atom in the molecule's atom order.")
        if not np.all(np.isfinite(v)):
            raise InputError(f"transition charges of {res!r} must be finite.")
        for m in ids:
            q[film.index.of(int(m))] = v
        covered[ids] = True
    return q, covered


def _charge_couplings(pos: FloatArray, q: FloatArray, index: Any, cent: FloatArray, i: np.ndarray,
                      j: np.ndarray, d: FloatArray, n: float) -> FloatArray:
    """Coulomb coupling of transition charges of i and of j's copy at ``c_i + d`` (vectorised, eV)."""
    sizes = index.sizes()
    amax = int(sizes.max())
    n_mol = sizes.size
    P = np.zeros((n_mol, amax, 3))
    Q = np.zeros((n_mol, amax))
    M = np.zeros((n_mol, amax), dtype=bool)
    for m in range(n_mol):
        at = index.of(m)
        P[m, : at.size] = pos[at]
        Q[m, : at.size] = np.nan_to_num(q[at])
        M[m, : at.size] = True
    shift = (cent[i] + d) - cent[j]  # translation that puts j's copy next to i
    out = np.empty(i.size)
    step = max(1, 2_000_000 // (amax * amax))
    for s in range(0, i.size, step):
        a, b = i[s:s + step], j[s:s + step]
        pb = P[b] + shift[s:s + step, None, :]
        r = np.linalg.norm(P[a][:, :, None, :] - pb[:, None, :, :], axis=-1)
        mask = M[a][:, :, None] & M[b][:, None, :]
        inv = np.where(mask, 1.0 / np.where(mask, r, 1.0), 0.0)
        out[s:s + step] = np.einsum("pa,pab,pb->p", Q[a], inv, Q[b])
    return COULOMB_EV_A * out / n**2


def pair_table(
    film: "Film",
    frame: int,
    cutoff_A: float,
    *,
    criterion: Literal["centroid", "atom"] = "centroid",
    transition_charges: Any = None,
    transition_dipoles: npt.ArrayLike | None = None,
    refractive_index: float = 1.0,
    transfer: pd.DataFrame | None = None,
) -> pd.DataFrame:
    """Neighbour pairs of one frame with excitonic couplings and transfer integrals.

    Parameters
    ----------
    film : Film
    frame : int
    cutoff_A : float, Å
        Pair cutoff on the centroid or closest-atom distance (below half the
        smallest box width).
    criterion : {'centroid', 'atom'}
    transition_charges : mapping or StateChargeSet, optional
        S0->S1 transition charges (e) per residue name, in the molecule's
        atom order (``StateChargeSet.transition_e``). They are placed on each
        copy's own atoms (charges are scalars: no rotation needed) and give
        ``V_charges_eV`` (Madjet, Abdurahman & Renger, J. Phys. Chem. B 110,
        17268 (2006)) and, through ``mu = sum_a q_a (r_a - centroid)`` at each
        copy's own geometry, ``V_dipole_eV`` (point-dipole formula, Kasha,
        Rawls & El-Bayoumi, Pure Appl. Chem. 11, 371 (1965)).
    transition_dipoles : array_like, shape (n_molecules, 3), Debye, optional
        Transition dipoles of every molecule in this frame, used for
        ``V_dipole_eV`` instead of those of the transition charges.
    refractive_index : float, > 0
        Optical screening ``1/n^2`` of both couplings.
    transfer : DataFrame, optional
        Transfer integrals with columns ``i, j, J_hole_eV, J_electron_eV``
        (and ``converged``, optionally ``frame``), e.g. from
        :func:`clusterlab.transport.transfer_tasks.compute_transfer_integrals`;
        joined on ``(i, j)``; pairs without a value get NaN.

    Returns
    -------
    pandas.DataFrame
        ``frame, i, j, resname_i, resname_j, distance_A, dx_A, dy_A, dz_A,
        min_atom_distance_A``; with transition charges or dipoles also
        ``mu_i_x_D ... mu_j_z_D, kappa, V_dipole_eV`` and (charges)
        ``V_charges_eV``, NaN for pairs with an uncovered molecule; with
        ``transfer`` also ``J_hole_eV, J_electron_eV, transfer_converged``.

    Raises
    ------
    InputError
        For a bad cutoff, criterion, refractive index, or charges/dipoles
        that do not fit the film.
    """
    if not (np.isfinite(refractive_index) and refractive_index > 0):
        raise InputError(f"refractive_index must be > 0; got {refractive_index!r}.")
    f = film.check_frame(frame)
    geo = film.frame_geometry(f, periodic=film.has_box)
    pos = np.asarray(geo.positions_A, dtype=np.float64)
    cent = np.asarray(geo.centroids_A, dtype=np.float64)
    t = neighbour_pairs(cent, cutoff_A, box=geo.box, criterion=criterion, atom_positions_A=pos,
                        atom_molecule=film.molecule_of_atom, with_min_atom_distance=True)
    names = np.asarray(film.molecule_resnames).astype(str)
    i, j = t["i"].to_numpy(), t["j"].to_numpy()
    d = t[["dx_A", "dy_A", "dz_A"]].to_numpy(dtype=float)
    t.insert(0, "frame", np.full(len(t), f, dtype=np.int64))
    t.insert(3, "resname_i", names[i])
    t.insert(4, "resname_j", names[j])
    mu = None
    covered = None
    if transition_charges is not None:
        q, covered = _transition_charges_per_atom(film, transition_charges)
        rel = pos - cent[film.molecule_of_atom]
        mu = np.stack([np.bincount(film.molecule_of_atom, weights=np.nan_to_num(q) * rel[:, k],
                                   minlength=film.n_molecules) for k in range(3)], axis=1) / DEBYE_E_A
        mu[~covered] = np.nan
    if transition_dipoles is not None:
        md = np.asarray(transition_dipoles, dtype=np.float64)
        if md.shape != (film.n_molecules, 3):
            raise InputError(f"transition_dipoles must have shape ({film.n_molecules}, 3) in Debye; got {md.shape}.")
        mu = md.copy()
    if mu is not None:
        for side, idx in (("i", i), ("j", j)):
            for k, ax in enumerate("xyz"):
                t[f"mu_{side}_{ax}_D"] = mu[idx, k]
        ok = np.all(np.isfinite(mu[i]), axis=1) & np.all(np.isfinite(mu[j]), axis=1)
        vd = np.full(len(t), np.nan)
        kap = np.full(len(t), np.nan)
        if ok.any():
            vd[ok] = point_dipole_coupling(mu[i[ok]], mu[j[ok]], d[ok], n=refractive_index)
            nz = ok & (np.linalg.norm(mu[i], axis=1) > 0) & (np.linalg.norm(mu[j], axis=1) > 0)
            if nz.any():
                kap[nz] = orientation_factor(mu[i[nz]], mu[j[nz]], d[nz])
        t["kappa"] = kap
        t["V_dipole_eV"] = vd
    if covered is not None:
        vc = np.full(len(t), np.nan)
        okc = covered[i] & covered[j]
        if okc.any():
            vc[okc] = _charge_couplings(pos, q, film.index, cent, i[okc], j[okc], d[okc], refractive_index)
        t["V_charges_eV"] = vc
    if transfer is not None:
        t = _join_transfer(t, transfer, f)
    return t.reset_index(drop=True)


def _join_transfer(t: pd.DataFrame, transfer: pd.DataFrame, frame: int) -> pd.DataFrame:
    if not isinstance(transfer, pd.DataFrame):
        raise InputError(f"transfer= must be a DataFrame with i, j, J_hole_eV, J_electron_eV; got "
                         f"{type(transfer).__name__}.")
    miss = [c for c in ("i", "j") if c not in transfer.columns]
    if miss:
        raise InputError(f"the transfer table lacks the column(s) {miss}.")
    tr = transfer.copy()
    if "frame" in tr.columns:
        tr = tr[tr["frame"].astype(int) == int(frame)]
    a, b = tr["i"].astype(np.int64).to_numpy(), tr["j"].astype(np.int64).to_numpy()
    tr["i"], tr["j"] = np.minimum(a, b), np.maximum(a, b)
    cols = [c for c in ("J_hole_eV", "J_electron_eV") if c in tr.columns]
    keep = tr[["i", "j", *cols] + (["converged"] if "converged" in tr.columns else [])]
    keep = keep.rename(columns={"converged": "transfer_converged"}).drop_duplicates(["i", "j"], keep="last")
    out = t.merge(keep, on=["i", "j"], how="left")
    if "transfer_converged" in out:
        tc = out["transfer_converged"]
        out["transfer_converged"] = tc.where(tc.notna(), False).astype(bool)
    return out


# ----------------------------------------------------------------------------
# hopping rates
# ----------------------------------------------------------------------------
_MARCUS_FORMULA = ("k = (2 pi / hbar) |J|^2 (4 pi lambda kB T)^(-1/2) exp[-(dE + lambda)^2 / (4 lambda kB T)] "
                   "(Marcus, Rev. Mod. Phys. 65, 599 (1993))")
_MA_FORMULA = ("k = nu0 exp(-2 gamma r) exp(-max(dE, 0) / kB T) "
               "(Miller & Abrahams, Phys. Rev. 120, 745 (1960)); r = distance_A")


def hopping_rates(
    sites: pd.DataFrame,
    pairs: pd.DataFrame,
    *,
    law: Literal["marcus", "miller-abrahams"] = "marcus",
    carrier: Literal["hole", "electron", "exciton"] = "hole",
    T_K: float = 300.0,
    lambda_eV: float | str | None = None,
    J_column: str | None = None,
    nu0_per_s: float | None = None,
    gamma_per_A: float | None = None,
    state: Literal["S1", "T1"] = "S1",
    energy_column: str | None = None,
    field_V_per_A: npt.ArrayLike | None = None,
    label: str | None = None,
) -> pd.DataFrame:
    """Hopping rates of every pair in both directions from exported quantities.

    Parameters
    ----------
    sites : DataFrame
        A site table (:func:`site_table`), joined on ``(frame, molecule)``.
    pairs : DataFrame
        A pair table (:func:`pair_table`, or several concatenated).
    law : {'marcus', 'miller-abrahams'}
    carrier : {'hole', 'electron', 'exciton'}
        Carrier site energies ``+IP_eV`` (hole), ``-EA_eV`` (electron),
        ``S1_eV``/``T1_eV`` (exciton; see ``state``).
    T_K : float, K
    lambda_eV : float or str, eV
        Marcus reorganisation energy: a number, or the name of a pair column.
    J_column : str, optional
        Marcus coupling column (default ``J_hole_eV``, ``J_electron_eV``, or
        for excitons ``V_charges_eV`` when present, else ``V_dipole_eV``).
    nu0_per_s, gamma_per_A : float
        Miller-Abrahams attempt frequency (s^-1) and inverse localisation
        length (Å^-1).
    state : {'S1', 'T1'}
        Exciton state.
    energy_column : str, optional
        A site-table column to use as carrier site energy as it is (eV).
    field_V_per_A : array_like, shape (3,), V/Å, optional
        Applied field, added as ``-q F . dr``.
    label : str, optional
        Prefix of the new columns (``<label>_rate_ij_per_s``) so that several
        rate sets fit in one table.

    Returns
    -------
    pandas.DataFrame
        A copy of ``pairs`` with ``E_i_eV, E_j_eV, dE_eV, rate_ij_per_s,
        rate_ji_per_s`` (prefixed by ``label``); rates are NaN where an input
        is missing. ``attrs["rates"][label or "default"]`` holds the law,
        parameters, formula and units (copied into the sidecar by
        :func:`write_export`).

    Raises
    ------
    InputError
        For an unknown law, carrier or column, or missing law parameters.
    """
    q_car = carrier_charge(carrier)
    if law not in ("marcus", "miller-abrahams"):
        raise InputError(f"{law!r} is not a rate law. Use 'marcus' or 'miller-abrahams'.")
    if not (np.isfinite(T_K) and T_K > 0):
        raise InputError(f"T_K must be > 0 K; got {T_K!r}.")
    if energy_column is not None:
        ecol, sign = energy_column, 1.0
    elif carrier == "hole":
        ecol, sign = "IP_eV", 1.0
    elif carrier == "electron":
        ecol, sign = "EA_eV", -1.0
    else:
        if state not in ("S1", "T1"):
            raise InputError(f"state={state!r} is not valid; use 'S1' or 'T1'.")
        ecol, sign = f"{state}_eV", 1.0
    if ecol not in sites.columns:
        raise InputError(f"the site table has no column {ecol!r} (needed for {carrier} rates); it has "
                         f"{sorted(c for c in sites.columns if c.endswith('_eV'))}.")
    for c in ("i", "j", "dx_A", "dy_A", "dz_A", "distance_A"):
        if c not in pairs.columns:
            raise InputError(f"the pair table lacks the column {c!r}.")
    out = pairs.copy()
    by = ["frame"] if ("frame" in pairs.columns and "frame" in sites.columns) else []
    if not by and "frame" in sites.columns and sites["frame"].nunique() > 1:
        raise InputError("the site table has several frames but the pair table has no 'frame' column; "
                         "select one frame of the sites or add the pairs' frame.")
    e = sites[by + ["molecule", ecol]].drop_duplicates(by + ["molecule"])
    e = e.assign(_E=sign * e[ecol].astype(float))[by + ["molecule", "_E"]]
    Ei = out[by + ["i"]].merge(e.rename(columns={"molecule": "i"}), on=by + ["i"], how="left")["_E"]
    Ej = out[by + ["j"]].merge(e.rename(columns={"molecule": "j"}), on=by + ["j"], how="left")["_E"]
    Ei, Ej = Ei.to_numpy(dtype=float), Ej.to_numpy(dtype=float)
    dr = out[["dx_A", "dy_A", "dz_A"]].to_numpy(dtype=float)
    F = np.zeros(3) if field_V_per_A is None else np.asarray(field_V_per_A, dtype=np.float64).reshape(3)
    dE = np.full(len(out), np.nan)
    fin = np.isfinite(Ei) & np.isfinite(Ej)
    if fin.any():
        dE[fin] = field_energy_change(Ej[fin] - Ei[fin], dr[fin], F, carrier)
    kij = np.full(len(out), np.nan)
    kji = np.full(len(out), np.nan)
    meta: dict[str, Any] = {"law": law, "carrier": carrier, "carrier_charge_e": q_car, "T_K": float(T_K),
                            "site_energy": (f"{'+' if sign > 0 else '-'}{ecol}"), "field_V_per_A": F.tolist(),
                            "energy_change": "dE_eV = E_j - E_i - q F.(r_j - r_i)",
                            "detailed_balance": "rate_ij / rate_ji = exp(-dE_eV / kB T)",
                            "units": {"rate": "s^-1", "energy": "eV", "T": "K", "distance": "Å"},
                            "constants": {"kB_eV_per_K": KB_EV, "hbar_eV_s": HBAR_EV_S}}
    if law == "marcus":
        if lambda_eV is None:
            raise InputError("law='marcus' needs lambda_eV (a number in eV or a pair column name).")
        if J_column is None:
            if carrier == "hole":
                J_column = "J_hole_eV"
            elif carrier == "electron":
                J_column = "J_electron_eV"
            else:
                J_column = "V_charges_eV" if "V_charges_eV" in out.columns else "V_dipole_eV"
        if J_column not in out.columns:
            raise InputError(f"the pair table has no coupling column {J_column!r}; compute it first or pass J_column=.")
        J = out[J_column].to_numpy(dtype=float)
        if isinstance(lambda_eV, str):
            if lambda_eV not in out.columns:
                raise InputError(f"lambda_eV={lambda_eV!r} is not a pair column.")
            lam = out[lambda_eV].to_numpy(dtype=float)
        else:
            if not (np.isfinite(lambda_eV) and lambda_eV > 0):
                raise InputError(f"lambda_eV must be > 0 eV; got {lambda_eV!r}.")
            lam = np.full(len(out), float(lambda_eV))
        ok = fin & np.isfinite(J) & np.isfinite(lam) & (lam > 0)
        if ok.any():
            kij[ok] = marcus_rate(J[ok], dE[ok], lam[ok], T_K)
            kji[ok] = marcus_rate(J[ok], -dE[ok], lam[ok], T_K)
        meta.update({"formula": _MARCUS_FORMULA, "coupling_column": J_column,
                     "lambda_eV": lambda_eV if isinstance(lambda_eV, str) else float(lambda_eV)})
    else:
        if nu0_per_s is None or gamma_per_A is None:
            raise InputError("law='miller-abrahams' needs nu0_per_s and gamma_per_A.")
        r = out["distance_A"].to_numpy(dtype=float)
        if fin.any():
            kij[fin] = miller_abrahams_rate(dE[fin], r[fin], T_K, nu0_per_s=nu0_per_s, gamma_per_A=gamma_per_A)
            kji[fin] = miller_abrahams_rate(-dE[fin], r[fin], T_K, nu0_per_s=nu0_per_s, gamma_per_A=gamma_per_A)
        meta.update({"formula": _MA_FORMULA, "nu0_per_s": float(nu0_per_s), "gamma_per_A": float(gamma_per_A)})
    n_missing = int((~np.isfinite(kij)).sum())
    meta["n_pairs_without_rate"] = n_missing
    if n_missing:
        warnings.warn(f"{n_missing} of {len(out)} pairs have no {carrier} rate (missing site energies or couplings; "
                      "their rate columns are NaN).", stacklevel=2)
    pre = f"{label}_" if label else ""
    out[f"{pre}E_i_eV"] = Ei
    out[f"{pre}E_j_eV"] = Ej
    out[f"{pre}dE_eV"] = dE
    out[f"{pre}rate_ij_per_s"] = kij
    out[f"{pre}rate_ji_per_s"] = kji
    rates = dict(pairs.attrs.get("rates", {}))
    meta["columns"] = [f"{pre}{c}" for c in ("E_i_eV", "E_j_eV", "dE_eV", "rate_ij_per_s", "rate_ji_per_s")]
    rates[label or "default"] = meta
    out.attrs["rates"] = rates
    return out


def graph_from_export(pairs: pd.DataFrame, n_sites: int, *, frame: int | None = None,
                      label: str | None = None) -> Any:
    """A :class:`~clusterlab.transport.hopping.HoppingGraph` from an exported pair table.

    Parameters
    ----------
    pairs : DataFrame
        A pair table with rate columns (:func:`hopping_rates`), as written or
        as read back from the files.
    n_sites : int
        Number of sites (molecules of the film); site ``k`` is molecule ``k``.
    frame : int, optional
        The frame to take (required when the table has several).
    label : str, optional
        The rate set (the ``label`` given to :func:`hopping_rates`).

    Returns
    -------
    HoppingGraph
        Hops ``i -> j`` with ``rate_ij_per_s`` and vector ``(dx, dy, dz)``,
        hops ``j -> i`` with ``rate_ji_per_s`` and the opposite vector.

    Raises
    ------
    InputError
        For missing rate columns, several frames without ``frame=``, or
        missing (NaN) rates.
    """
    from .hopping import HoppingGraph

    pre = f"{label}_" if label else ""
    kij, kji = f"{pre}rate_ij_per_s", f"{pre}rate_ji_per_s"
    if kij not in pairs.columns or kji not in pairs.columns:
        raise InputError(f"the pair table has no {kij!r}/{kji!r} columns; run hopping_rates() first.")
    p = pairs
    if "frame" in p.columns:
        if frame is None:
            if p["frame"].nunique() > 1:
                raise InputError(f"the pair table holds frames {sorted(p['frame'].unique().tolist())}; pass frame=.")
        else:
            p = p[p["frame"].astype(int) == int(frame)]
    k1, k2 = p[kij].to_numpy(dtype=float), p[kji].to_numpy(dtype=float)
    if not (np.all(np.isfinite(k1)) and np.all(np.isfinite(k2))):
        raise InputError(f"{int((~np.isfinite(k1)).sum())} pairs have no rate (NaN); drop them or fill the inputs.")
    i, j = p["i"].to_numpy(dtype=np.int64), p["j"].to_numpy(dtype=np.int64)
    d = p[["dx_A", "dy_A", "dz_A"]].to_numpy(dtype=float)
    return HoppingGraph.from_edges(int(n_sites), np.concatenate([i, j]), np.concatenate([j, i]),
                                   np.concatenate([k1, k2]), np.concatenate([d, -d]))


# ----------------------------------------------------------------------------
# files
# ----------------------------------------------------------------------------
class ExportTables(NamedTuple):
    """What :func:`read_export` returns: ``sites, pairs, metadata``."""

    sites: pd.DataFrame
    pairs: pd.DataFrame
    metadata: dict[str, Any]


def _jsonable(obj: Any) -> Any:
    if isinstance(obj, Mapping):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if hasattr(obj, "tolist"):
        return _jsonable(obj.tolist())
    if hasattr(obj, "to_dict") and callable(obj.to_dict):
        return _jsonable(obj.to_dict())
    if isinstance(obj, float) and not math.isfinite(obj):
        return None if math.isnan(obj) else ("inf" if obj > 0 else "-inf")
    if isinstance(obj, (str, int, float, bool)) or obj is None:
        return obj
    return str(obj)


def _columns_doc(df: pd.DataFrame) -> dict[str, dict[str, str]]:
    out = {}
    for c in df.columns:
        unit, meaning = column_info(str(c))
        out[str(c)] = {"unit": unit, "meaning": meaning, "dtype": str(df[c].dtype)}
    return out


_LIMITATIONS = [
    "QM site energies: one embedded cluster per site with fixed point charges of the environment; no "
    "environment polarization unless the electrostatic model's polarization term is used (ions only).",
    "Electrostatic model: first-order electrostatics of state-difference charges fitted on one reference copy "
    "per species (no refit per conformation); neutral excitations are not polarized; no intramolecular "
    "(conformational) change of the vacuum energy unless vacuum values come from QM per site.",
    "Excitonic couplings: Coulomb coupling of S0->S1 transition charges (no exchange or overlap terms, no "
    "charge-transfer mixing); point-dipole values are valid only for distances much larger than the molecules.",
    "Transfer integrals: one frontier orbital per molecule (projective dimer method), sign set by arbitrary "
    "orbital phases; only |J| enters the rates.",
    "Rates: classical Marcus (no high-frequency mode tunnelling) or Miller-Abrahams; one carrier at a time, "
    "no carrier-carrier interaction, no dynamic disorder beyond the frames given.",
]


def export_metadata(
    film: "Film",
    *,
    sites: pd.DataFrame | None = None,
    pairs: pd.DataFrame | None = None,
    method: Any = None,
    frames: Sequence[int] | None = None,
    cutoff_A: float | None = None,
    criterion: str | None = None,
    refractive_index: float | None = None,
    extra: Mapping[str, Any] | None = None,
) -> dict[str, Any]:
    """The provenance part of a sidecar: film, method, radii, models, rates.

    Parameters
    ----------
    film : Film
    sites, pairs : DataFrame, optional
        Tables whose ``attrs`` (sources, verdict, rates) are recorded.
    method : Method or dict, optional
        The QM method (its dict and key are written).
    frames : sequence of int, optional
        Frames of the export (default: those of ``sites``).
    cutoff_A, criterion, refractive_index : optional
        Pair-table settings.
    extra : mapping, optional
        Free user entries, written under ``"user"``.

    Returns
    -------
    dict
        JSON-able; pass it to :func:`write_export` as ``metadata``.
    """
    if frames is None:
        frames = sorted({int(f) for f in sites["frame"]}) if sites is not None and "frame" in sites else []
    boxes = {}
    for f in frames:
        b = film.box(int(f))
        boxes[str(int(f))] = None if b is None else [float(x) for x in b]
    meth = None
    if method is not None:
        if hasattr(method, "to_dict") and hasattr(method, "key"):
            meth = {"dict": method.to_dict(), "key": method.key()}
        elif isinstance(method, Mapping):
            meth = {"dict": dict(method), "key": None}
    keys = []
    if sites is not None and "qm_method_key" in sites:
        keys = sorted({str(k) for k in sites["qm_method_key"].dropna() if str(k)})
    if meth is None and keys:
        meth = {"dict": None, "key": keys[0] if len(keys) == 1 else keys}
    sources = list(sites.attrs.get("sources", [])) if sites is not None else []
    radius: dict[str, Any] = {}
    if sites is not None and "qm_radius_A" in sites:
        r = sorted({float(x) for x in sites["qm_radius_A"].dropna()})
        radius["qm"] = r
    for s in sources:
        if s.get("kind") == "electrostatic-model":
            radius["model"] = s.get("radius_A")
    meta: dict[str, Any] = {
        "method": meth,
        "radius_A": radius,
        "models": sources,
        "verdict": sites.attrs.get("verdict") if sites is not None else None,
        "film": {
            "topology": film.topology_path, "trajectory": list(film.trajectory_paths),
            "film_id": film.film_id, "n_molecules": int(film.n_molecules), "n_frames": int(film.n_frames),
            "molecule_kind": film.molecule_kind, "frames": [int(f) for f in frames], "box_per_frame": boxes,
            "box_convention": "[lx, ly, lz, alpha, beta, gamma] in Å and degrees (a along x, b in the xy plane)",
            "charges": film.charge_source.describe() if hasattr(film.charge_source, "describe") else None,
        },
        "pairs": {"cutoff_A": cutoff_A, "criterion": criterion, "refractive_index": refractive_index},
        "rates": dict(pairs.attrs.get("rates", {})) if pairs is not None else {},
        "user": dict(extra or {}),
    }
    return _jsonable(meta)


def write_export(
    folder: str | os.PathLike[str],
    sites: pd.DataFrame,
    pairs: pd.DataFrame,
    *,
    metadata: Mapping[str, Any] | None = None,
) -> dict[str, str]:
    """Write both tables as Parquet and CSV plus the ``export.json`` sidecar.

    Parameters
    ----------
    folder : path
        Created if missing; existing export files in it are replaced.
    sites, pairs : DataFrame
        Site and pair tables.
    metadata : mapping, optional
        Provenance (usually :func:`export_metadata`); ``rates`` found in
        ``pairs.attrs`` are added when missing.

    Returns
    -------
    dict of str to str
        Absolute paths: ``sites_parquet, sites_csv, pairs_parquet, pairs_csv,
        sidecar``.

    Raises
    ------
    InputError
        If a table is not a DataFrame.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    for name, df in (("sites", sites), ("pairs", pairs)):
        if not isinstance(df, pd.DataFrame):
            raise InputError(f"{name} must be a pandas DataFrame; got {type(df).__name__}.")
    root = Path(folder)
    root.mkdir(parents=True, exist_ok=True)
    paths = {k: str((root / v).resolve()) for k, v in FILE_NAMES.items()}
    meta = dict(_jsonable(dict(metadata or {})))
    if not meta.get("rates") and pairs.attrs.get("rates"):
        meta["rates"] = _jsonable(pairs.attrs["rates"])
    sidecar = {
        "format": EXPORT_FORMAT,
        "format_version": EXPORT_FORMAT_VERSION,
        "written_utc": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "files": {
            "sites": {"parquet": FILE_NAMES["sites_parquet"], "csv": FILE_NAMES["sites_csv"], "rows": int(len(sites))},
            "pairs": {"parquet": FILE_NAMES["pairs_parquet"], "csv": FILE_NAMES["pairs_csv"], "rows": int(len(pairs))},
        },
        "columns": {"sites": _columns_doc(sites), "pairs": _columns_doc(pairs)},
        "sign_conventions": _SIGN_CONVENTIONS,
        "software": software_versions(),
        "limitations": _LIMITATIONS,
        **{k: v for k, v in meta.items() if k not in ("format", "format_version", "files", "columns")},
    }
    for name, df in (("sites", sites), ("pairs", pairs)):
        plain = pd.DataFrame(df).copy()
        plain.attrs = {}
        table = pa.Table.from_pandas(plain, preserve_index=False)
        table = table.replace_schema_metadata({**(table.schema.metadata or {}),
                                               b"clusterlab.export.format": EXPORT_FORMAT.encode(),
                                               b"clusterlab.export.version": str(EXPORT_FORMAT_VERSION).encode()})
        pq.write_table(table, paths[f"{name}_parquet"])
        plain.to_csv(paths[f"{name}_csv"], index=False)
    with open(paths["sidecar"], "w", encoding="utf-8") as fh:
        json.dump(sidecar, fh, indent=2, sort_keys=False, ensure_ascii=False)
        fh.write("\n")
    return paths


def read_export(folder: str | os.PathLike[str], *, prefer: Literal["parquet", "csv"] = "parquet") -> ExportTables:
    """Read an export folder back: ``(sites, pairs, metadata)``.

    Parameters
    ----------
    folder : path
    prefer : {'parquet', 'csv'}
        Which copy of the tables to read (CSV floats are written with
        Python's shortest round-trip repr; booleans get the sidecar's dtype).

    Returns
    -------
    ExportTables

    Raises
    ------
    InputError
        Missing sidecar, a sidecar of another format, or a newer format version.
    """
    root = Path(folder)
    side = root / FILE_NAMES["sidecar"]
    if not side.is_file():
        raise InputError(f"{str(root)!r} has no {FILE_NAMES['sidecar']}; it is not a clusterlab export folder.")
    with open(side, encoding="utf-8") as fh:
        meta = json.load(fh)
    if meta.get("format") != EXPORT_FORMAT:
        raise InputError(f"{str(side)!r} has format {meta.get('format')!r}, not {EXPORT_FORMAT!r}.")
    if int(meta.get("format_version", 0)) > EXPORT_FORMAT_VERSION:
        raise InputError(f"{str(side)!r} has format version {meta.get('format_version')}; this clusterlab reads "
                         f"up to {EXPORT_FORMAT_VERSION}. Update clusterlab.")
    if prefer not in ("parquet", "csv"):
        raise InputError(f"prefer={prefer!r} is not valid; use 'parquet' or 'csv'.")
    tables = []
    for name in ("sites", "pairs"):
        f = meta["files"][name][prefer]
        if prefer == "parquet":
            import pyarrow.parquet as pq

            df = pq.read_table(root / f).to_pandas()
        else:
            cols = meta.get("columns", {}).get(name, {})
            df = pd.read_csv(root / f)
            for c, info in cols.items():
                if c in df and info.get("dtype") == "bool":
                    df[c] = df[c].astype(bool)
        tables.append(df)
    return ExportTables(tables[0], tables[1], meta)


def export_study(
    film: "Film",
    folder: str | os.PathLike[str],
    *,
    sample: Any = None,
    model: pd.DataFrame | None = None,
    cutoff_A: float,
    frames: Iterable[int] | None = None,
    criterion: Literal["centroid", "atom"] = "centroid",
    transition_charges: Any = None,
    refractive_index: float = 1.0,
    transfer: pd.DataFrame | None = None,
    rates: Mapping[str, Any] | Sequence[Mapping[str, Any]] | None = None,
    method: Any = None,
    verdict: Any = None,
    vacuum_eV: Any = None,
    metadata: Mapping[str, Any] | None = None,
) -> dict[str, str]:
    """Site table, pair tables of every exported frame, optional rates, files: one call.

    Parameters
    ----------
    film : Film
    folder : path
    sample : SiteSample or DataFrame, optional
        QM results (see :func:`site_table`'s ``qm``).
    model : DataFrame, optional
        Electrostatic-model results.
    cutoff_A : float, Å
        Pair cutoff.
    frames : iterable of int, optional
        Default: the frames of the site table.
    criterion, transition_charges, refractive_index, transfer
        See :func:`pair_table`. When ``model.attrs["charges"]`` holds a
        state-charge set (as ``run_film_model`` leaves it), its transition
        charges are used when ``transition_charges`` is not given, and its
        reference fits' vacuum energies when ``vacuum_eV`` is not given.
    rates : mapping or sequence of mappings, optional
        Keyword arguments of :func:`hopping_rates` (one rate set each; give
        each a ``label`` when there are several).
    method : Method, optional
        The QM method, for the sidecar.
    verdict, vacuum_eV
        See :func:`site_table`.
    metadata : mapping, optional
        Free entries written under ``"user"`` in the sidecar.

    Returns
    -------
    dict of str to str
        Paths of the written files (see :func:`write_export`).

    Examples
    --------
    >>> paths = export_study(film, "export", sample=sample, cutoff_A=8.0)  # doctest: +SKIP
    >>> sorted(paths)  # doctest: +SKIP
    ['pairs_csv', 'pairs_parquet', 'sidecar', 'sites_csv', 'sites_parquet']
    """
    model_charges = model.attrs.get("charges") if model is not None else None
    if model_charges is not None and hasattr(model_charges, "transition_e"):
        # a model table that carries its state-charge set (run_film_model): use its
        # transition charges and reference-fit vacuum energies unless given
        if transition_charges is None and any(v is not None for v in model_charges.transition_e.values()):
            transition_charges = model_charges
        if vacuum_eV is None and getattr(model_charges, "fits", None):
            vacuum_eV = model_charges
    sites = site_table(film, qm=sample, model=model, frames=frames, verdict=verdict, vacuum_eV=vacuum_eV)
    frame_list = sorted({int(f) for f in sites["frame"]})
    tabs = [pair_table(film, f, cutoff_A, criterion=criterion, transition_charges=transition_charges,
                       refractive_index=refractive_index, transfer=transfer) for f in frame_list]
    pairs = pd.concat(tabs, ignore_index=True) if tabs else pd.DataFrame()
    if rates:
        for kw in ([rates] if isinstance(rates, Mapping) else list(rates)):
            attrs = dict(pairs.attrs)
            pairs = hopping_rates(sites, pairs, **dict(kw))
            pairs.attrs = {**attrs, **pairs.attrs}
    meta = export_metadata(film, sites=sites, pairs=pairs, method=method, frames=frame_list, cutoff_A=cutoff_A,
                           criterion=criterion, refractive_index=refractive_index, extra=metadata)
    return write_export(folder, sites, pairs, metadata=meta)
