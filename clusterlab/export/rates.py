"""Hopping rates on exported tables, and a hopping graph from them.

:func:`hopping_rates` joins the carrier site energies of the site table to
the pairs and evaluates the Marcus or Miller-Abrahams kernels of
:mod:`clusterlab.transport.rates` in both directions, recording the law,
its parameters and formula for the sidecar; :func:`graph_from_export` turns
a pair table with rates (as written or read back) into a
:class:`~clusterlab.transport.hopping.HoppingGraph`.

Sign conventions follow :mod:`clusterlab.transport.rates`: a hop ``i -> j``
changes the energy by ``E_j - E_i - q F . dr``.
"""

from __future__ import annotations

import warnings
from typing import Any, Literal

import numpy as np
import numpy.typing as npt
import pandas as pd

from ..errors import InputError
from ..transport.hopping import HoppingGraph
from ..transport.rates import carrier_charge, field_energy_change, marcus_rate, miller_abrahams_rate
from ..units import HBAR_EV_S, KB_EV

__all__ = ["hopping_rates", "graph_from_export"]

_MARCUS_FORMULA = ("k = (2 pi / hbar) |J|^2 (4 pi lambda kB T)^(-1/2) exp[-(dE + lambda)^2 / (4 lambda kB T)] "
                   "(Marcus, Rev. Mod. Phys. 65, 599 (1993))")
_MA_FORMULA = ("k = nu0 exp(-2 gamma r) exp(-max(dE, 0) / kB T) "
               "(Miller & Abrahams, Phys. Rev. 120, 745 (1960)); r = distance_A")


def _field_vector(field_V_per_A: npt.ArrayLike) -> npt.NDArray[np.float64]:
    try:
        F = np.asarray(field_V_per_A, dtype=np.float64)
    except (TypeError, ValueError):
        F = np.zeros(0)
    if F.shape != (3,) or not np.all(np.isfinite(F)):
        raise InputError(f"field_V_per_A={field_V_per_A!r} must be three finite numbers (Fx, Fy, Fz) in V/Å.")
    return F


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
        A site table (:func:`~clusterlab.export.sites.site_table`), joined on ``(frame, molecule)``.
    pairs : DataFrame
        A pair table (:func:`~clusterlab.export.pairs.pair_table`, or several concatenated).
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
        :func:`~clusterlab.export.files.write_export`).

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
    F = np.zeros(3) if field_V_per_A is None else _field_vector(field_V_per_A)
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
            neg = np.flatnonzero(lam <= 0)
            if neg.size:
                raise InputError(f"lambda_eV column {lambda_eV!r} holds {neg.size} value(s) <= 0 eV (e.g. "
                                 f"{lam[neg[0]]!r} for pair {int(out['i'].iloc[neg[0]])}-{int(out['j'].iloc[neg[0]])}); "
                                 "a reorganisation energy must be > 0 eV (NaN marks a pair without one).")
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
                      label: str | None = None) -> HoppingGraph:
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
