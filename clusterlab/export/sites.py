"""The site table of a transport export: one row per (frame, molecule).

:func:`site_table` joins the whole-molecule centroids of each frame (wrapped
into the primary cell and unwrapped, continuous over frames), the embedded
QM site energies and the film model's environment shifts, chooses one value
per quantity (S1, T1, IP, EA) and flags where it comes from.
:func:`film_model_input` is the one reader of the film model given as
``model=``; :func:`column_info` documents every export column.

Sign conventions (:data:`SIGN_CONVENTIONS`) follow
:mod:`clusterlab.transport.rates`: the carrier site energy is ``+IP`` for a
hole, ``-EA`` for an electron and ``S1`` (or ``T1``) for an exciton; a hop
``i -> j`` changes the energy by ``E_j - E_i``.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Any, Iterable, Mapping, NamedTuple

import numpy as np
import numpy.typing as npt
import pandas as pd

from ..errors import InputError, ProvenanceError
from ..geometry import unwrap_over_frames

if TYPE_CHECKING:  # pragma: no cover
    from ..film import Film

FloatArray = npt.NDArray[np.float64]

__all__ = [
    "QUANTITIES",
    "NO_SOURCE",
    "SIGN_CONVENTIONS",
    "FilmModelInput",
    "film_model_input",
    "column_info",
    "unwrapped_centroids",
    "site_table",
]

QUANTITIES = ("S1", "T1", "IP", "EA")
#: file names inside an export folder
#: the text written when no model produced a value (CSV keeps it, unlike "")
NO_SOURCE = "none"

# model shift columns of film_site_energies for each quantity (engine sign convention)
_MODEL_SHIFT = {"S1": "S1_shift_eV", "T1": "T1_shift_eV", "IP": "IP_shift_eV", "EA": "EA_shift_eV"}

#: sign conventions of the exported quantities, written into the sidecar
SIGN_CONVENTIONS = {
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
    "species": ("", "molecular species of the site (film.molecules['species'], the residue name), e.g. host or "
                    "guest of a doped film; sites of one species share model parameters"),
    "x_A": ("Å", "centroid x, whole molecule, wrapped into the primary cell"),
    "y_A": ("Å", "centroid y, whole molecule, wrapped into the primary cell"),
    "z_A": ("Å", "centroid z, whole molecule, wrapped into the primary cell"),
    "x_unwrapped_A": ("Å", "centroid x, continuous over frames (consecutive-frame minimum-image unwrapping from frame 0)"),
    "y_unwrapped_A": ("Å", "centroid y, continuous over frames"),
    "z_unwrapped_A": ("Å", "centroid z, continuous over frames"),
    "dEST_eV": ("eV", "S1_eV - T1_eV"),
    "S1_osc": ("", "oscillator strength of S1 (QM)"),
    "qm_radius_A": ("Å", "radius of the QM cluster calculation used for the QM columns (inf = periodic limit); "
                         "with a polarizable QM method the outer radius (fixed charges out to it)"),
    "qm_polarizable_radius_A": ("Å", "inner (polarizable) radius of the QM calculation: environment molecules "
                                     "within it carried induced dipoles (only in exports of a polarizable QM "
                                     "method; NaN where the site has no QM row)"),
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
    "species_i": ("", "species of i"),
    "species_j": ("", "species of j"),
    "pair_class": ("", "the two species joined by '-' in sorted order, e.g. 'HST-HST', 'GST-HST', 'GST-GST' "
                       "(host-guest pairs of a doped film)"),
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
        # (column name, unit, meaning) of every per-quantity column of q
        per_quantity = (
            (f"{q}_eV", "eV", f"{word} of the site: the QM value when there is one, else the model value "
                              f"(see source_{q})"),
            (f"{q}_shift_eV", "eV", f"environment shift of {q} that goes with {q}_eV (embedded - vacuum)"),
            (f"{q}_qm_eV", "eV", f"{word} from the embedded QM calculation"),
            (f"{q}_shift_qm_eV", "eV", f"environment shift of {q} from the embedded QM calculation"),
            (f"{q}_vacuum_eV", "eV", f"{word} of the same molecule geometry without environment (QM)"),
            (f"{q}_polarization_qm_eV", "eV", f"polarization contribution to {q}_qm_eV: the polarizable QM value "
                                             "minus the same cluster with fixed charges only (only in exports of a "
                                             "polarizable QM method; NaN where the site has no QM row or the "
                                             "method skipped the fixed-charge reference)"),
            (f"{q}_model_eV", "eV", f"{word} from the electrostatic model: vacuum value of the species + model shift"),
            (f"{q}_shift_model_eV", "eV", f"environment shift of {q} from the electrostatic model"),
            (f"unconverged_{q}", "", f"True if {q}_eV comes from a calculation that did not converge"),
            (f"extrapolated_{q}", "", f"True if {q}_eV is not a converged-radius QM value (it comes from the "
                                      "electrostatic model, or its QM radius, or with a polarizable method "
                                      "its inner radius, is below the scan verdict's converged radius)"),
            (f"source_{q}", "", f"which model produced {q}_eV: 'qm:R=<radius>A:<method key prefix>' (fixed "
                                "charges), 'qm:R=<outer radius>A:polarizable=<inner radius>A:<method key prefix>' "
                                "(induced dipoles within the inner radius), "
                                f"'electrostatic-model:R=<radius>A:<kind>' or '{NO_SOURCE}'"),
        )
        for col, unit, meaning in per_quantity:
            if name == col:
                return unit, meaning
    if name.endswith("rate_ij_per_s") or name.endswith("rate_ji_per_s"):
        label = name[: -len("rate_ij_per_s")].rstrip("_")
        d = "i -> j" if "ij" in name[-12:] else "j -> i"
        return "s^-1", f"hopping rate {d} of the rate set {label!r} (see the sidecar's rates entry)"
    for suffix, unit in (("_eV", "eV"), ("_per_s", "s^-1"), ("_A", "Å"), ("_D", "D"), ("_K", "K")):
        if name.endswith(suffix):
            return unit, "(not documented)"
    return "", "(not documented)"


# ----------------------------------------------------------------------------


# ----------------------------------------------------------------------------
# site table
# ----------------------------------------------------------------------------
def unwrapped_centroids(film: "Film", last_frame: int) -> FloatArray:
    """Centroids of whole molecules, continuous across frames 0..last_frame.

    ``u(0)`` is the primary-cell centroid of frame 0 and
    ``u(f) = u(f-1) + minimum_image(c(f) - c(f-1), box(f))``, where ``c(f)`` is
    the primary-cell centroid of the whole molecule in frame ``f``
    (:func:`clusterlab.geometry.unwrap_over_frames` on the film's frames).
    Exact as long as no centroid moves by more than half the smallest box
    width between consecutive frames (true for MD snapshots of a solid film).
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
    periodic = film.has_box
    geos = [film.frame_geometry(f, periodic=periodic) for f in range(last + 1)]
    return unwrap_over_frames(np.stack([np.asarray(g.centroids_A, dtype=np.float64) for g in geos]),
                              [g.box for g in geos])


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


def _check_one_film_one_method(t: pd.DataFrame, film: "Film", sample_film_id: str | None) -> None:
    """QM rows must be of ``film`` and of one method: a column is never made of two."""
    held = set()
    if sample_film_id:
        held.add(str(sample_film_id))
    if "film.film_id" in t.columns:
        held |= set(t["film.film_id"].dropna().astype(str))
    if held and held != {film.film_id}:
        raise ProvenanceError(f"the QM results are of the film(s) {sorted(held)}, not of the film {film.film_id} "
                              f"({film.topology_path!r}) being exported: another film, or the same film with "
                              "moved atoms or other charges.")
    if "method_key" in t.columns:
        keys = t["method_key"].dropna().astype(str).value_counts().sort_index()
        if len(keys) > 1:
            raise ProvenanceError("the QM results hold " + str(len(keys)) + " methods ("
                                  + ", ".join(f"{k} ({n} rows)" for k, n in keys.items())
                                  + "); export one method (SiteSample.from_store(..., method_key=...)).")


def _is_polarizable(t: pd.DataFrame) -> bool:
    """QM rows of a polarizable method carry their inner radius."""
    return "polarizable_radius_A" in t.columns and bool(t["polarizable_radius_A"].notna().any())


def _pick_radius(t: pd.DataFrame, qm_radius_A: float | None) -> pd.DataFrame:
    if qm_radius_A is not None:
        sel = t[np.isclose(t["radius_A"], float(qm_radius_A)) | (np.isinf(t["radius_A"]) & math.isinf(qm_radius_A))]
        if sel.empty:
            raise InputError(f"the QM table has no rows at radius {qm_radius_A!r} Å; it has radii "
                             f"{sorted(set(t['radius_A'].tolist()))}.")
        t = sel
    # largest radius per site (the periodic limit, inf, counts as largest); of several inner
    # (polarizable) radii at that radius, the largest
    order = ["frame", "molecule", "radius_A"] + (["polarizable_radius_A"] if _is_polarizable(t) else [])
    t = t.sort_values(order, kind="stable")
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


def _inner_verdict_radius(verdict: Any) -> tuple[bool, float | None] | None:
    """``(converged, inner radius_A)`` of a polarizable scan's inner-radius verdict (a ScanResult's
    ``polarizable_verdict``, or a mapping's ``polarizable_converged`` / ``polarizable_radius_A``);
    None when the verdict has none."""
    if isinstance(verdict, Mapping):
        if "polarizable_converged" not in verdict:
            return None
        r = verdict.get("polarizable_radius_A")
        return bool(verdict["polarizable_converged"]), (None if r is None else float(r))
    inner = getattr(verdict, "polarizable_verdict", None)
    return None if inner is None else _verdict_radius(inner)


def _vacuum_table(vacuum_eV: Any) -> dict[str, dict[str, float]]:
    """Per-species vacuum values {resname: {quantity: eV}} from a mapping or a StateChargeSet."""
    if vacuum_eV is None:
        return {}
    fits = getattr(vacuum_eV, "fits", None)
    if fits is not None:  # a StateChargeSet: its reference fits carry vacuum energies
        out: dict[str, dict[str, float]] = {}
        for res, fit in fits.items():
            e = dict(fit.get("energy_eV", {}) or {})  # fits are plain JSON records of the QM fits
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


class FilmModelInput(NamedTuple):
    """The film model given as ``model=``, read once (:func:`film_model_input`)."""

    #: one row per (frame, molecule) with the model's environment shifts
    table: pd.DataFrame
    #: radius of the model's environment, Å (None when the input does not say)
    radius_A: float | None
    #: the kind of model, e.g. ``"charges"`` or ``"field"``
    label: str
    #: the model's :class:`~clusterlab.electrostatics.chargeset.StateChargeSet`
    charges: Any
    #: further provenance for the sidecar: ``rule``, ``environment``, ``charges_method`` (None when not known)
    details: dict[str, Any]


def film_model_input(model: Any) -> FilmModelInput:
    """Read the film model given to :func:`site_table` or :func:`~clusterlab.export.study.export_study`.

    Parameters
    ----------
    model : clusterlab.study.FilmModelResult
        What :func:`~clusterlab.study.filmmodel.film_site_energies`,
        :meth:`~clusterlab.study.filmmodel.FilmModel.run` and
        :func:`~clusterlab.study.filmmodel.run_film_model` return.

    Returns
    -------
    FilmModelInput
        ``table, radius_A, label, charges, details``.

    Raises
    ------
    InputError
        For any other type (a bare DataFrame carries neither the radius nor
        the charges), or a table without ``frame`` and ``molecule`` columns.

    Examples
    --------
    >>> film_model_input([1, 2])  # doctest: +IGNORE_EXCEPTION_DETAIL
    Traceback (most recent call last):
    InputError: model= must be a FilmModelResult ...; got list.
    """
    from ..study.filmmodel import FilmModelResult

    if not isinstance(model, FilmModelResult):
        hint = (" (a bare table carries neither the model's radius nor its charges)"
                if isinstance(model, pd.DataFrame) else "")
        raise InputError("model= must be a FilmModelResult (what film_site_energies, FilmModel.run and "
                         f"run_film_model return){hint}; got {type(model).__name__}.")
    table = model.table
    miss = [c for c in ("frame", "molecule") if c not in table.columns]
    if miss:
        raise InputError(f"the model table lacks the column(s) {miss}.")
    details = {"rule": model.options.get("rule"), "environment": model.options.get("environment"),
               "charges_method": getattr(model.charges, "method", None)}
    return FilmModelInput(table=table, radius_A=float(model.radius_A), label=str(model.model or "charges"),
                          charges=model.charges, details=details)


def site_table(
    film: "Film",
    *,
    qm: Any = None,
    model: Any = None,
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
    model : film model result, DataFrame or None
        The film model's environment shifts per state (read by
        :func:`film_model_input`).
    frames : iterable of int, optional
        Frames to export (default: the frames of ``qm`` and ``model``, or all
        frames when neither is given).
    verdict : ConvergenceVerdict, ScanResult or mapping, optional
        Radius-convergence verdict of a scan: QM values at a radius below its
        converged radius (or any QM value when it did not converge) are
        flagged ``extrapolated``. With a polarizable QM method the inner
        radius is judged as well, by a ScanResult's ``polarizable_verdict``
        or a mapping's ``polarizable_converged`` and ``polarizable_radius_A``.
    vacuum_eV : mapping or StateChargeSet, optional
        Vacuum values per species, ``{resname: {"S1": eV, "T1": eV, "IP": eV,
        "EA": eV}}``, or a state-charge set (its reference fits' energies).
        With them the model's shifts become absolute energies
        (``<Q>_model_eV = vacuum + shift``); without them the model gives
        shifts only.
    qm_radius_A : float, optional
        Use the QM rows at this radius instead of the largest.
    model_radius_A : float, optional
        Radius of the model (default: the model's ``radius_A``), for the
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
        ``Q_model_eV`` (model); with a polarizable QM method also
        ``Q_polarization_qm_eV`` (polarizable minus fixed charges, same
        cluster) and ``qm_polarizable_radius_A`` (absent for fixed-charge
        QM); ``dEST_eV``, ``S1_osc``, ``qm_radius_A``,
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
    With several inner (polarizable) radii at the chosen QM radius the
    largest is used. The source label of a polarizable QM value names both
    radii (``qm:R=10A:polarizable=6A:<key>``) and its ``attrs["sources"]``
    entry holds ``environment``, ``radius_A`` and ``polarizable_radius_A``.
    Unwrapped centroids: see :func:`unwrapped_centroids`.
    """
    qt = _qm_frame(qm)
    if qt is not None and len(qt):
        _check_one_film_one_method(qt, film, getattr(qm, "film_id", None))
        qt = _pick_radius(qt, qm_radius_A)
    mi = film_model_input(model) if model is not None else None
    if frames is not None:
        frame_list = sorted({film.check_frame(int(f)) for f in frames})
    else:
        fs: set[int] = set()
        if qt is not None:
            fs |= set(qt["frame"].astype(int).tolist())
        if mi is not None:
            fs |= set(mi.table["frame"].astype(int).tolist())
        frame_list = sorted(fs) if fs else list(range(film.n_frames))
    if not frame_list:
        raise InputError("no frames to export.")
    n_mol = film.n_molecules
    unwrapped = unwrapped_centroids(film, max(frame_list))
    resnames = np.asarray(film.molecule_resnames).astype(str)
    species = np.asarray(film.molecule_species).astype(str)
    parts = []
    for f in frame_list:
        geo = film.frame_geometry(f, periodic=film.has_box)
        c = np.asarray(geo.centroids_A, dtype=np.float64)
        parts.append(pd.DataFrame({
            "frame": np.full(n_mol, f, dtype=np.int64), "molecule": np.arange(n_mol, dtype=np.int64),
            "resname": resnames, "species": species,
            "x_A": c[:, 0], "y_A": c[:, 1], "z_A": c[:, 2],
            "x_unwrapped_A": unwrapped[f, :, 0], "y_unwrapped_A": unwrapped[f, :, 1],
            "z_unwrapped_A": unwrapped[f, :, 2],
        }))
    out = pd.concat(parts, ignore_index=True)
    sources: list[dict[str, Any]] = []

    # ---- QM columns
    has_qm = qt is not None and len(qt) > 0
    polarizable = has_qm and _is_polarizable(qt)
    if has_qm:
        keep = {"radius_A": "qm_radius_A"}
        if polarizable:
            keep["polarizable_radius_A"] = "qm_polarizable_radius_A"
        if "method_key" in qt.columns:
            keep["method_key"] = "qm_method_key"
        if "converged" in qt.columns:
            keep["converged"] = "qm_converged"
        for q in QUANTITIES:
            for src, dst in ((f"{q}_eV", f"{q}_qm_eV"), (f"{q}_shift_eV", f"{q}_shift_qm_eV"),
                             (f"{q}_vacuum_eV", f"{q}_vacuum_eV")):
                if src in qt.columns:
                    keep[src] = dst
            if polarizable and f"{q}_polarization_eV" in qt.columns:
                keep[f"{q}_polarization_eV"] = f"{q}_polarization_qm_eV"
        if "S1_osc" in qt.columns:
            keep["S1_osc"] = "S1_osc"
        sub = qt[["frame", "molecule", *keep]].rename(columns=keep)
        out = out.merge(sub, on=["frame", "molecule"], how="left")
        for col in keep.values():
            if col not in ("qm_method_key", "qm_converged"):
                out[col] = pd.to_numeric(out[col], errors="coerce").astype(float)
        mk = out["qm_method_key"].fillna("").astype(str) if "qm_method_key" in out else pd.Series("", index=out.index)
        rad = out["qm_radius_A"]
        tag = "qm:R=" + rad.map(lambda r: "inf" if np.isinf(r) else f"{r:g}A")
        if polarizable:
            inner = out["qm_polarizable_radius_A"]
            tag = tag + np.where(inner.notna(), ":polarizable=" + inner.map(lambda r: f"{r:g}A"), "")
        qm_label = np.where(rad.notna(), tag + ":" + mk.str[:10], NO_SOURCE)
        if "qm_converged" in out:
            qc = out["qm_converged"]
            out["qm_converged"] = qc.where(qc.notna(), False).astype(bool)
        for lab in sorted(set(qm_label) - {NO_SOURCE}):
            entry: dict[str, Any] = {"label": str(lab), "kind": "qm"}
            if polarizable:  # the embedding kind and both radii (fixed-charge entries stay as they were)
                row = out.iloc[int(np.flatnonzero(qm_label == lab)[0])]
                entry.update(environment="polarizable", radius_A=float(row["qm_radius_A"]),
                             polarizable_radius_A=float(row["qm_polarizable_radius_A"]))
            sources.append(entry)
    else:
        qm_label = np.full(len(out), NO_SOURCE, dtype=object)

    # ---- model columns
    has_model = mi is not None and len(mi.table) > 0
    model_label = NO_SOURCE
    if mi is not None and has_model:
        mr = model_radius_A if model_radius_A is not None else mi.radius_A
        mr = None if mr is None else float(mr)
        model_label = f"electrostatic-model:R={'?' if mr is None else f'{mr:g}'}A:{mi.label}"
        vac = _vacuum_table(vacuum_eV)
        cols = {v: f"{q}_shift_model_eV" for q, v in _MODEL_SHIFT.items() if v in mi.table.columns}
        extra = {}
        if "P_converged" in mi.table.columns:
            extra["P_converged"] = "model_converged"
        if "n_env_molecules" in mi.table.columns:
            extra["n_env_molecules"] = "n_env_molecules"
        m = mi.table[["frame", "molecule", *cols, *extra]].rename(columns={**cols, **extra}).copy()
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
                        "model": mi.label, **mi.details, "vacuum_eV": vac or None})

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
    inner_verdict = _inner_verdict_radius(verdict) if verdict is not None and polarizable else None
    if inner_verdict is not None:  # a polarizable scan's verdict covers the inner radius too
        conv_in, r_in = inner_verdict
        inner = out["qm_polarizable_radius_A"].to_numpy(dtype=float)
        has_in = ~np.isnan(inner)
        below |= has_in & ((inner < r_in - 1e-9) if conv_in and r_in is not None else True)
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
        inner_verdict = _inner_verdict_radius(verdict)
        if inner_verdict is not None:
            out.attrs["verdict"].update(polarizable_converged=inner_verdict[0],
                                        polarizable_radius_A=inner_verdict[1])
    return out


