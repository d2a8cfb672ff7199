"""Hopping rates between sites: Marcus and Miller-Abrahams.

Sign conventions (used everywhere in :mod:`clusterlab.transport`)
------------------------------------------------------------------
*Carrier site energy* ``E_i`` (eV) is the energy of the whole system with
the carrier (hole, electron or exciton) sitting on site ``i``; a carrier
prefers low ``E``.

- hole: ``E_i = +IP_i`` (ionising a site with a small IP costs less), i.e.
  the negative of the HOMO-like level ``-IP``;
- electron: ``E_i = -EA_i`` (the LUMO-like level);
- exciton: ``E_i = S1_i`` or ``T1_i``.

:func:`carrier_site_energies` applies these rules.

For a hop ``i -> j`` the energy change is ``dE = E_j - E_i`` (positive =
uphill). In an applied field ``F`` (V/Å) a carrier of charge ``q`` (units
of e: +1 hole, -1 electron, 0 exciton) moving by ``dr = r_j - r_i`` (Å)
gains ``-q F . dr`` eV: ``dE = E_j - E_i - q F . dr``
(:func:`field_energy_change`).

Both rate laws obey detailed balance, ``k_ij / k_ji = exp(-dE/kT)``.
"""

from __future__ import annotations

from typing import Literal

import numpy as np
import numpy.typing as npt

from ..errors import InputError
from ..units import HBAR_EV_S, KB_EV

FloatArray = npt.NDArray[np.float64]
ArrayLike = npt.ArrayLike

__all__ = [
    "marcus_rate",
    "miller_abrahams_rate",
    "carrier_site_energies",
    "field_energy_change",
    "carrier_charge",
]

_CHARGES = {"hole": 1.0, "electron": -1.0, "exciton": 0.0}


def _positive(name: str, value: ArrayLike) -> FloatArray:
    arr = np.asarray(value, dtype=np.float64)
    if not np.all(np.isfinite(arr)) or np.any(arr <= 0):
        raise InputError(f"{name} must be finite and > 0; got {value!r}.")
    return arr


def _finite(name: str, value: ArrayLike) -> FloatArray:
    arr = np.asarray(value, dtype=np.float64)
    if not np.all(np.isfinite(arr)):
        raise InputError(f"{name} must be finite; got non-finite values in {name}.")
    return arr


def carrier_charge(carrier: str) -> float:
    """Charge of a carrier kind in units of e (+1 hole, -1 electron, 0 exciton).

    Raises
    ------
    InputError
        If ``carrier`` is not ``'hole'``, ``'electron'`` or ``'exciton'``.
    """
    try:
        return _CHARGES[carrier]
    except (KeyError, TypeError):
        raise InputError(
            f"{carrier!r} is not a carrier kind. Use 'hole', 'electron' or 'exciton'."
        ) from None


def carrier_site_energies(
    values_eV: ArrayLike, quantity: Literal["ip", "ea", "excitation"]
) -> FloatArray:
    """Turn per-site IP, EA or excitation energies into carrier site energies.

    Parameters
    ----------
    values_eV : array_like of float, shape (n,), eV
        Ionisation potentials (``quantity='ip'``), electron affinities
        (``'ea'``) or excitation energies S1/T1 (``'excitation'``).
    quantity : {'ip', 'ea', 'excitation'}

    Returns
    -------
    ndarray of float, shape (n,), eV
        ``+IP`` for holes, ``-EA`` for electrons, the excitation energy itself
        for excitons (see the module docstring).

    Raises
    ------
    InputError
        For an unknown ``quantity`` or non-finite values.
    """
    v = _finite("values_eV", values_eV)
    if quantity == "ip":
        return v.copy()
    if quantity == "ea":
        return -v
    if quantity == "excitation":
        return v.copy()
    raise InputError(f"{quantity!r} is not a site quantity. Use 'ip', 'ea' or 'excitation'.")


def field_energy_change(
    dE_eV: ArrayLike, dr_A: ArrayLike, field_V_per_A: ArrayLike, carrier: str
) -> FloatArray:
    """Add the work of an applied field to hop energy changes.

    Parameters
    ----------
    dE_eV : array_like, shape (m,), eV
        ``E_j - E_i`` without field.
    dr_A : array_like, shape (m, 3), Å
        Hop vectors ``r_j - r_i`` (minimum image).
    field_V_per_A : array_like, shape (3,), V/Å
        Field vector (1 V/Å = 1e10 V/m).
    carrier : {'hole', 'electron', 'exciton'}

    Returns
    -------
    ndarray, shape (m,), eV
        ``dE - q F . dr``.
    """
    q = carrier_charge(carrier)
    dE = _finite("dE_eV", dE_eV)
    dr = _finite("dr_A", dr_A).reshape(-1, 3)
    F = _finite("field_V_per_A", field_V_per_A).reshape(3)
    return dE - q * (dr @ F)


def marcus_rate(
    J_eV: ArrayLike, dG_eV: ArrayLike, lambda_eV: ArrayLike, T_K: ArrayLike
) -> FloatArray:
    """Non-adiabatic Marcus hopping rate.

    ``k = (2 pi / hbar) |J|^2 (4 pi lambda kT)^(-1/2) exp[-(dG + lambda)^2 / (4 lambda kT)]``
    (Marcus, Rev. Mod. Phys. 65, 599 (1993)).

    Parameters
    ----------
    J_eV : array_like of float, eV
        Electronic coupling (transfer integral or excitonic coupling); only
        ``|J|`` enters.
    dG_eV : array_like of float, eV
        Free-energy change of the hop ``i -> j``: ``E_j - E_i`` (plus the
        field term, see :func:`field_energy_change`). Negative = downhill.
    lambda_eV : array_like of float, eV, > 0
        Reorganisation energy.
    T_K : array_like of float, K, > 0
        Temperature.

    Returns
    -------
    ndarray of float, s^-1
        Rates, broadcast over all inputs. Maximal at ``dG = -lambda``
        (activationless); ``k(dG)/k(-dG) = exp(-dG/kT)`` (detailed balance).

    Raises
    ------
    InputError
        If ``lambda_eV`` or ``T_K`` is not positive, or any input is not finite.

    Notes
    -----
    Classical (high-temperature) limit for the nuclear modes; no tunnelling
    through high-frequency modes (Marcus-Levich-Jortner) and no adiabatic
    corrections, so it overestimates rates for large ``|J|`` (>~ lambda/10).

    Examples
    --------
    >>> k = marcus_rate(0.01, 0.0, 0.2, 300.0)
    >>> bool(1e11 < k < 1e13)
    True
    """
    J = _finite("J_eV", J_eV)
    dG = _finite("dG_eV", dG_eV)
    lam = _positive("lambda_eV", lambda_eV)
    T = _positive("T_K", T_K)
    kT = KB_EV * T
    pref = 2.0 * np.pi / HBAR_EV_S * J**2 / np.sqrt(4.0 * np.pi * lam * kT)
    return np.asarray(pref * np.exp(-((dG + lam) ** 2) / (4.0 * lam * kT)), dtype=np.float64)


def miller_abrahams_rate(
    dE_eV: ArrayLike,
    r_A: ArrayLike,
    T_K: ArrayLike,
    *,
    nu0_per_s: float,
    gamma_per_A: float,
) -> FloatArray:
    """Miller-Abrahams hopping rate.

    ``k = nu0 exp(-2 gamma r) exp(-dE/kT)`` for ``dE > 0`` (uphill) and
    ``k = nu0 exp(-2 gamma r)`` for ``dE <= 0`` (downhill)
    (Miller & Abrahams, Phys. Rev. 120, 745 (1960)).

    Parameters
    ----------
    dE_eV : array_like of float, eV
        ``E_j - E_i`` for the hop ``i -> j`` (plus the field term).
    r_A : array_like of float, Å, >= 0
        Hop distance.
    T_K : array_like of float, K, > 0
    nu0_per_s : float, s^-1, > 0
        Attempt-to-hop frequency.
    gamma_per_A : float, Å^-1, >= 0
        Inverse localisation length (the wavefunction decays as
        ``exp(-gamma r)``, so the rate as ``exp(-2 gamma r)``).

    Returns
    -------
    ndarray of float, s^-1

    Raises
    ------
    InputError
        For non-positive ``T_K`` or ``nu0_per_s``, negative ``r_A`` or
        ``gamma_per_A``, or non-finite inputs.

    Examples
    --------
    >>> float(miller_abrahams_rate(-0.1, 0.0, 300.0, nu0_per_s=1e12, gamma_per_A=0.5))
    1000000000000.0
    """
    dE = _finite("dE_eV", dE_eV)
    r = _finite("r_A", r_A)
    if np.any(r < 0):
        raise InputError(f"r_A must be >= 0 Å; got a minimum of {float(np.min(r))}.")
    T = _positive("T_K", T_K)
    nu0 = float(_positive("nu0_per_s", nu0_per_s))
    gamma = float(_finite("gamma_per_A", gamma_per_A))
    if gamma < 0:
        raise InputError(f"gamma_per_A must be >= 0 Å^-1; got {gamma_per_A!r}.")
    boltz = np.exp(-np.maximum(dE, 0.0) / (KB_EV * T))
    return np.asarray(nu0 * np.exp(-2.0 * gamma * r) * boltz, dtype=np.float64)
