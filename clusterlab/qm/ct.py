"""Charge-transfer character of excited states.

Two published measures, both from the excitation amplitudes X (sum X^2 = 1):

* ``ct_distance_A``: the distance between the centroids of the hole and
  the electron. In the unrelaxed (TDA/CIS) picture the difference density
  splits exactly into a detachment density X X^T (occupied block) and an
  attachment density X^T X (virtual block) (Head-Gordon, Grana, Maurice,
  White, J. Phys. Chem. 99, 14261 (1995)); the measure is
  |<r>_attach - <r>_detach|. Small (< 1 Å) for local excitations, of the
  order of the donor-acceptor distance for charge transfer.
* ``ct_lambda``: the orbital-overlap diagnostic of Peach, Benfield,
  Helgaker, Tozer, J. Chem. Phys. 128, 044118 (2008),
  Lambda = sum_ia X_ia^2 O_ia / sum_ia X_ia^2 with O_ia = int |phi_i||phi_a|,
  integrated on a DFT grid. Values below about 0.3 flag charge-transfer
  states that (semi)local and global hybrids underestimate (their paper).
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from ..units import BOHR_A

FloatArray = npt.NDArray[np.float64]


def hole_electron_distance_A(amps: FloatArray, mo_coeff: FloatArray, nocc: int, dip_ao_bohr: FloatArray) -> FloatArray:
    """Hole-electron centroid distance of each state.

    Parameters
    ----------
    amps : ndarray, shape (n, nocc, nvir)
    mo_coeff : ndarray, shape (nao, nmo)
    nocc : int
    dip_ao_bohr : ndarray, shape (3, nao, nao)
        Position integrals <mu|r|nu> (bohr), any common origin.

    Returns
    -------
    ndarray, shape (n,), Å
    """
    if len(amps) == 0:
        return np.zeros(0)
    co, cv = mo_coeff[:, :nocc], mo_coeff[:, nocc:]
    r_occ = np.einsum("up,xuv,vq->xpq", co, dip_ao_bohr, co, optimize=True)
    r_vir = np.einsum("up,xuv,vq->xpq", cv, dip_ao_bohr, cv, optimize=True)
    out = np.empty(len(amps))
    for n, x in enumerate(amps):
        w = float(np.sum(x * x)) or 1.0
        hole = np.einsum("ia,ja,xij->x", x, x, r_occ) / w
        elec = np.einsum("ia,ib,xab->x", x, x, r_vir) / w
        out[n] = np.linalg.norm(elec - hole) * BOHR_A
    return out


#: Pairs with X_ia^2 below this hardly contribute to Lambda and are skipped.
LAMBDA_PAIR_THRESHOLD = 1e-4


def significant_pairs(amps_sets, threshold: float = LAMBDA_PAIR_THRESHOLD) -> list[tuple[int, int]]:
    """The (i, a) pairs with X_ia^2 >= ``threshold`` in any state of any of
    ``amps_sets`` (arrays of shape (n, nocc, nvir)), sorted."""
    pairs: set[tuple[int, int]] = set()
    for amps in amps_sets:
        for x in amps:
            pairs.update((int(i), int(a)) for i, a in np.argwhere(x * x >= threshold))
    return sorted(pairs)


def pair_overlaps(mo_on_grid: FloatArray, weights: FloatArray, nocc: int, pairs) -> dict[tuple[int, int], float]:
    """O_ia = int |phi_i||phi_a| on a grid for each (i, a) of ``pairs``
    (``mo_on_grid`` of shape (ngrid, nmo))."""
    if not pairs:
        return {}
    ii = np.array([i for i, _ in pairs])
    aa = np.array([nocc + a for _, a in pairs])
    o = weights @ (np.abs(mo_on_grid[:, ii]) * np.abs(mo_on_grid[:, aa]))
    return {p: float(v) for p, v in zip(pairs, o)}


def orbital_overlaps(mol, coords: FloatArray, weights: FloatArray, mo_coeff: FloatArray, nocc: int, pairs,
                     block: int = 20000) -> dict[tuple[int, int], float]:
    """:func:`pair_overlaps` with the orbitals evaluated on the grid block by
    block, and only the orbitals the pairs use (a 60-atom molecule's 386
    orbitals on 250k points would be 0.8 GB)."""
    if not pairs:
        return {}
    from pyscf.dft import numint

    used = sorted({i for i, _ in pairs} | {nocc + a for _, a in pairs})
    col = {m: k for k, m in enumerate(used)}  # orbital index -> its column among the evaluated ones
    ii = np.array([col[i] for i, _ in pairs])
    aa = np.array([col[nocc + a] for _, a in pairs])
    c = mo_coeff[:, used]
    total = np.zeros(len(pairs))
    for p0 in range(0, len(weights), block):
        mo = np.abs(numint.eval_ao(mol, coords[p0:p0 + block]) @ c)
        total += weights[p0:p0 + block] @ (mo[:, ii] * mo[:, aa])
    return {p: float(v) for p, v in zip(pairs, total)}


def lambda_from_overlaps(amps: FloatArray, overlaps: dict[tuple[int, int], float],
                         threshold: float = LAMBDA_PAIR_THRESHOLD) -> FloatArray:
    """Lambda of each state of ``amps`` (n, nocc, nvir) from the pair
    overlaps O_ia (pairs below ``threshold`` skipped)."""
    out = np.empty(len(amps))
    for n, x in enumerate(amps):
        k2 = x * x
        idx = [(int(i), int(a)) for i, a in np.argwhere(k2 >= threshold)]
        w = np.array([k2[p] for p in idx])
        den = float(w.sum())
        out[n] = float(w @ np.array([overlaps[p] for p in idx])) / den if den > 0 else np.nan
    return out


def peach_lambda(amps: FloatArray, mo_on_grid: FloatArray, weights: FloatArray, nocc: int,
                 threshold: float = LAMBDA_PAIR_THRESHOLD) -> FloatArray:
    """Peach et al. (2008) Lambda diagnostic of each state.

    Parameters
    ----------
    amps : ndarray, shape (n, nocc, nvir)
    mo_on_grid : ndarray, shape (ngrid, nmo)
        Orbital values on the grid points.
    weights : ndarray, shape (ngrid,)
    nocc : int
    threshold : float
        Pairs with X_ia^2 below this are skipped (they hardly contribute).

    Returns
    -------
    ndarray, shape (n,), in [0, 1]
    """
    if len(amps) == 0:
        return np.zeros(0)
    pairs = significant_pairs([amps], threshold)
    return lambda_from_overlaps(amps, pair_overlaps(mo_on_grid, weights, nocc, pairs), threshold)


def dominant_pairs(amps: FloatArray, nocc: int, *, min_weight: float = 0.1, max_pairs: int = 3) -> list[str]:
    """Leading orbital pairs of each state as text, e.g. ``"H->L 0.97"``
    (weight X_ia^2 of the normalised amplitudes; H = HOMO, L = LUMO)."""
    out = []
    for x in amps:
        k2 = (x * x) / (float(np.sum(x * x)) or 1.0)
        order = np.argsort(k2.ravel())[::-1][:max_pairs]
        parts = []
        for flat in order:
            w = k2.ravel()[flat]
            if w < min_weight and parts:
                break
            i, a = divmod(int(flat), x.shape[1])
            h = nocc - 1 - i
            parts.append(f"{'H' if h == 0 else f'H-{h}'}->{'L' if a == 0 else f'L+{a}'} {w:.2f}")
        out.append(", ".join(parts))
    return out
