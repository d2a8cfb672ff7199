"""Ewald summation for point charges in a periodic (triclinic) box.

The potential at a point :math:`\\mathbf r` from charges :math:`q_j` at
:math:`\\mathbf r_j` and all their periodic images is split (Ewald 1921) into

.. math::

    \\phi(\\mathbf r) = \\sum_{j,\\mathbf n} q_j
        \\frac{\\operatorname{erfc}(\\alpha |\\mathbf r - \\mathbf r_j - \\mathbf n|)}
              {|\\mathbf r - \\mathbf r_j - \\mathbf n|}
      + \\frac{4\\pi}{V} \\sum_{\\mathbf k \\ne 0}
        \\frac{e^{-k^2/4\\alpha^2}}{k^2}
        \\operatorname{Re}\\Big[e^{i\\mathbf k\\cdot\\mathbf r}
              \\sum_j q_j e^{-i\\mathbf k\\cdot \\mathbf r_j}\\Big]

with the :math:`\\mathbf k = 0` term left out. Leaving it out is the
"tinfoil" (conducting) boundary condition: the infinite lattice is surrounded
by a conductor, so no surface-dipole term appears. The cell must be neutral;
for a charged cell the k = 0 term diverges, and the only finite choice is a
uniform neutralising background (``non_neutral="background"``), which shifts
every potential by :math:`-\\pi Q/(V\\alpha^2)`.

Units: positions in Å, charges in e, potentials in V (= eV per e), fields in
V/Å, energies in eV. Boxes are ``[lx, ly, lz, alpha, beta, gamma]`` (Å,
degrees; the convention of MDAnalysis: ``a`` along x, ``b`` in the xy plane)
or a (3, 3) array of lattice vectors in rows.

Everything is vectorised: the real-space part uses a KD-tree over the
source charges replicated into the images that can lie within the cutoff;
the reciprocal part uses arrays of k vectors, processed in chunks.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from scipy.spatial import cKDTree
from scipy.special import erfc

from ..geometry import box_vectors as lattice_vectors
from ..geometry import minimum_image, perpendicular_widths
from ..errors import ChargeError, InputError
from ..units import COULOMB_EV_A

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]

#: A charge closer than this to an evaluation point counts as sitting on it (Å).
COINCIDENT_A = 1e-8
#: Net cell charge (e) below which a cell counts as neutral.
NEUTRAL_TOL_E = 1e-6
_CHUNK = 2_000_000  # array elements per chunk in the reciprocal sum

__all__ = [
    "EwaldParameters",
    "lattice_vectors",
    "choose_ewald_parameters",
    "ewald_potential",
    "ewald_energy",
    "minimum_image",
    "group_pairs",
]


# --------------------------------------------------------------------------
# box handling
# --------------------------------------------------------------------------
def group_pairs(point_groups: npt.ArrayLike, charge_groups: npt.ArrayLike) -> tuple[IntArray, IntArray]:
    """All (point, charge) index pairs that share a group id (vectorised).

    Group ids below 0 match nothing.

    Returns
    -------
    point_index, charge_index : ndarray of int, shape (n_pairs,)
    """
    pg = np.asarray(point_groups, dtype=np.int64).ravel()
    cg = np.asarray(charge_groups, dtype=np.int64).ravel()
    order = np.argsort(cg, kind="stable")
    sg = cg[order]
    lo = np.searchsorted(sg, pg, side="left")
    hi = np.searchsorted(sg, pg, side="right")
    counts = np.where(pg >= 0, hi - lo, 0)
    total = int(counts.sum())
    pi = np.repeat(np.arange(len(pg)), counts)
    start = np.cumsum(counts) - counts
    offs = np.arange(total) - np.repeat(start, counts)
    cj = order[np.repeat(lo, counts) + offs]
    return pi.astype(np.int64), cj.astype(np.int64)


# --------------------------------------------------------------------------
# parameters
# --------------------------------------------------------------------------
@dataclass(frozen=True)
class EwaldParameters:
    """Splitting and cutoffs of one Ewald sum.

    Attributes
    ----------
    alpha_per_A : float
        Splitting parameter α (1/Å); the real-space part decays as erfc(α r).
    r_cut_A : float
        Real-space cutoff (Å).
    k_cut_per_A : float
        Reciprocal-space cutoff |k| (1/Å).
    accuracy : float
        Requested relative accuracy ε: erfc-type errors of order
        exp(-(α r_cut)^2) = exp(-(k_cut/2α)^2) = ε.
    """

    alpha_per_A: float
    r_cut_A: float
    k_cut_per_A: float
    accuracy: float


def choose_ewald_parameters(
    box: npt.ArrayLike,
    n_charges: int,
    *,
    accuracy: float = 1e-8,
    r_cut_A: float | None = None,
    alpha_per_A: float | None = None,
) -> EwaldParameters:
    """Pick α and the cutoffs for a requested accuracy.

    With :math:`s = \\sqrt{-\\ln \\varepsilon}` the real-space terms beyond
    ``r_cut = s/α`` and the reciprocal terms beyond ``k_cut = 2 α s`` are
    both of relative size ε (common practice). If neither α nor ``r_cut_A``
    is given, α balances the cost of the two sums,
    :math:`\\alpha = \\sqrt{\\pi}\\,(N/V^2)^{1/6}` (Fincham, Mol. Simul. 13, 1
    (1994), from memory).

    Parameters
    ----------
    box : box as in :func:`lattice_vectors`
    n_charges : int
        Number of charges in the cell (sets the balanced α).
    accuracy : float, optional
        Relative accuracy ε in (0, 0.1).
    r_cut_A, alpha_per_A : float, optional
        Fix one of them; the other follows from ``accuracy``.

    Raises
    ------
    InputError
        If ``accuracy`` is outside (0, 0.1) or both r_cut and α are given.
    """
    if not 0 < accuracy < 0.1:
        raise InputError(f"accuracy must lie in (0, 0.1); got {accuracy!r}.")
    if r_cut_A is not None and alpha_per_A is not None:
        raise InputError("give r_cut_A or alpha_per_A, not both (the other follows from accuracy).")
    vec = lattice_vectors(box)
    s = float(np.sqrt(-np.log(accuracy)))
    if alpha_per_A is not None:
        if alpha_per_A <= 0:
            raise InputError(f"alpha_per_A must be positive; got {alpha_per_A!r}.")
        alpha = float(alpha_per_A)
    elif r_cut_A is not None:
        if r_cut_A <= 0:
            raise InputError(f"r_cut_A must be positive; got {r_cut_A!r}.")
        alpha = s / float(r_cut_A)
    else:
        vol = abs(np.linalg.det(vec))
        alpha = float(np.sqrt(np.pi) * (max(n_charges, 1) / vol**2) ** (1.0 / 6.0))
    return EwaldParameters(alpha, s / alpha, 2.0 * alpha * s, float(accuracy))


def _k_vectors(vec: FloatArray, k_cut: float, with_m: bool = False):
    """Half-space of reciprocal vectors with 0 < |k| <= k_cut (1/Å), shape (nk, 3)
    (and their integer indices m, shape (nk, 3), if ``with_m``)."""
    recip = 2.0 * np.pi * np.linalg.inv(vec).T  # rows b_i with a_i . b_j = 2 pi delta_ij
    m_max = np.ceil(k_cut * np.linalg.norm(vec, axis=1) / (2 * np.pi)).astype(int)
    grids = [np.arange(-m, m + 1) for m in m_max]
    m = np.array(np.meshgrid(*grids, indexing="ij")).reshape(3, -1).T
    half = (m[:, 0] > 0) | ((m[:, 0] == 0) & (m[:, 1] > 0)) | ((m[:, 0] == 0) & (m[:, 1] == 0) & (m[:, 2] > 0))
    m = m[half]
    k = m @ recip
    k2 = np.einsum("ij,ij->i", k, k)
    keep = k2 <= k_cut * k_cut
    if with_m:
        return k[keep], m[keep], m_max
    return k[keep]


# --------------------------------------------------------------------------
# sums
# --------------------------------------------------------------------------
def _check_arrays(points_A: npt.ArrayLike, positions_A: npt.ArrayLike, charges_e: npt.ArrayLike):
    pts = np.atleast_2d(np.asarray(points_A, dtype=np.float64))
    pos = np.atleast_2d(np.asarray(positions_A, dtype=np.float64))
    q = np.asarray(charges_e, dtype=np.float64).ravel()
    if pts.shape[-1] != 3 or pts.ndim != 2:
        raise InputError(f"points_A must have shape (n, 3) in Å; got {pts.shape}.")
    if pos.shape[-1] != 3 or pos.ndim != 2:
        raise InputError(f"positions_A must have shape (m, 3) in Å; got {pos.shape}.")
    if len(q) != len(pos):
        raise InputError(f"charges_e has {len(q)} values but positions_A has {len(pos)} rows.")
    if not (np.all(np.isfinite(pts)) and np.all(np.isfinite(pos)) and np.all(np.isfinite(q))):
        raise InputError("points, positions and charges must be finite.")
    return pts, pos, q


def _real_space(
    pts: FloatArray, pos: FloatArray, q: FloatArray, vec: FloatArray, p: EwaldParameters, want_field: bool
) -> tuple[FloatArray, FloatArray | None, FloatArray]:
    """Real-space sum over all images within r_cut (coincident pairs left out).

    Returns potential (e/Å), field (e/Å^2) and, per point, the summed charge
    that sits on it (for the self term).
    """
    inv = np.linalg.inv(vec)
    fs = pos @ inv
    fs -= np.floor(fs)
    ft = pts @ inv
    ft -= np.floor(ft)
    widths = perpendicular_widths(vec)
    reach = p.r_cut_A / widths  # in fractional units
    n_max = np.floor(reach).astype(int) + 1
    shifts = np.array(
        np.meshgrid(*[np.arange(-n, n + 1) for n in n_max], indexing="ij")
    ).reshape(3, -1).T
    img_f = (fs[None, :, :] + shifts[:, None, :]).reshape(-1, 3)
    img_idx = np.tile(np.arange(len(pos)), len(shifts))
    keep = np.all((img_f >= -reach - 1e-12) & (img_f <= 1 + reach + 1e-12), axis=1)
    img_f, img_idx = img_f[keep], img_idx[keep]
    src = img_f @ vec
    tgt = ft @ vec
    phi = np.zeros(len(pts))
    fld = np.zeros((len(pts), 3)) if want_field else None
    on_site = np.zeros(len(pts))
    if len(src) == 0:
        return phi, fld, on_site
    tree = cKDTree(src)
    a = p.alpha_per_A
    # chunk targets so the pair arrays stay moderate
    dens = len(src) / max(abs(np.linalg.det(vec)) * np.prod(2 * reach + 1), 1e-30)
    per_point = max(1.0, dens * 4.19 * p.r_cut_A**3)
    step = int(max(1, min(len(pts), _CHUNK / per_point)))
    for s in range(0, len(pts), step):
        sub = cKDTree(tgt[s : s + step])
        pairs = sub.sparse_distance_matrix(tree, p.r_cut_A, output_type="ndarray")
        if len(pairs) == 0:
            continue
        i = pairs["i"].astype(np.int64) + s
        j = pairs["j"].astype(np.int64)
        r = pairs["v"]
        qj = q[img_idx[j]]
        close = r < COINCIDENT_A
        if np.any(close):
            np.add.at(on_site, i[close], qj[close])
            far = ~close
            i, j, r, qj = i[far], j[far], r[far], qj[far]
        erfc_ar = erfc(a * r)
        phi += np.bincount(i, weights=qj * erfc_ar / r, minlength=len(pts))
        if want_field:
            d = tgt[i] - src[j]
            g = qj * (erfc_ar / r**3 + 2 * a / np.sqrt(np.pi) * np.exp(-(a * r) ** 2) / r**2)
            for x in range(3):
                fld[:, x] += np.bincount(i, weights=g * d[:, x], minlength=len(pts))
    return phi, fld, on_site


def _phase_tables(x: FloatArray, vec: FloatArray, m_max: npt.NDArray[np.int64]) -> list:
    """Per lattice direction d, exp(i m (b_d . x)) for m = -M_d..M_d; shapes (n, 2 M_d + 1)."""
    recip = 2.0 * np.pi * np.linalg.inv(vec).T
    theta = x @ recip.T
    return [np.exp(1j * theta[:, d, None] * np.arange(-m_max[d], m_max[d] + 1)[None, :]) for d in range(3)]


def _recip_space(
    pts: FloatArray, pos: FloatArray, q: FloatArray, vec: FloatArray, p: EwaldParameters, want_field: bool
) -> tuple[FloatArray, FloatArray | None]:
    """Reciprocal-space sum. exp(i k.r) is built as a product of per-direction
    phase tables (k = sum_d m_d b_d), which avoids trigonometric functions of
    every (point, k) pair."""
    k, m, m_max = _k_vectors(vec, p.k_cut_per_A, with_m=True)
    vol = abs(np.linalg.det(vec))
    phi = np.zeros(len(pts))
    fld = np.zeros((len(pts), 3)) if want_field else None
    if len(k) == 0:
        return phi, fld
    k2 = np.einsum("ij,ij->i", k, k)
    # factor 2 for the -k half of the sphere
    pref = 2.0 * (4.0 * np.pi / vol) * np.exp(-k2 / (4 * p.alpha_per_A**2)) / k2
    same = pts.shape == pos.shape and np.array_equal(pts, pos)
    tab_s = _phase_tables(pos, vec, m_max)
    tab_t = tab_s if same else _phase_tables(pts, vec, m_max)
    idx = m + m_max[None, :]
    nmax = max(len(pos), len(pts))
    step = max(1, _CHUNK // max(nmax, 1))
    for s in range(0, len(k), step):
        sl = slice(s, s + step)
        i0, i1, i2 = idx[sl, 0], idx[sl, 1], idx[sl, 2]
        e_s = tab_s[0][:, i0] * tab_s[1][:, i1] * tab_s[2][:, i2]  # exp(i k.r_j), (m, chunk)
        sk = q @ np.conj(e_s)  # S(k) = sum_j q_j exp(-i k.r_j)
        e_t = e_s if same else tab_t[0][:, i0] * tab_t[1][:, i1] * tab_t[2][:, i2]
        w = pref[sl]
        # Re[e^{ikr} S]
        phi += (e_t.real * sk.real - e_t.imag * sk.imag) @ w
        if want_field:
            # E = sum pref k Im[e^{ikr} S]
            im = (e_t.imag * sk.real + e_t.real * sk.imag) * w
            fld += im @ k[sl]
    return phi, fld


def ewald_potential(
    points_A: npt.ArrayLike,
    positions_A: npt.ArrayLike,
    charges_e: npt.ArrayLike,
    box: npt.ArrayLike,
    *,
    point_groups: npt.ArrayLike | None = None,
    charge_groups: npt.ArrayLike | None = None,
    accuracy: float = 1e-8,
    r_cut_A: float | None = None,
    alpha_per_A: float | None = None,
    non_neutral: str = "error",
    field: bool = False,
) -> FloatArray | tuple[FloatArray, FloatArray]:
    """Periodic electrostatic potential (and field) of point charges at points.

    Parameters
    ----------
    points_A : array_like, shape (n, 3), Å
        Where to evaluate the potential (anywhere; they are wrapped into the cell).
    positions_A : array_like, shape (m, 3), Å
        Charge positions.
    charges_e : array_like, shape (m,), e
    box : array_like, shape (6,) or (3, 3)
        ``[lx, ly, lz, alpha, beta, gamma]`` (Å, degrees) or lattice vectors.
    point_groups, charge_groups : array_like of int, shapes (n,) and (m,), optional
        Exclusion groups (e.g. molecule ids). Charge j is left out of the
        potential at point i when both have the same group id >= 0: only its
        minimum-image copy is removed; its other periodic images stay (they are
        other molecules). Molecules must be smaller than half the narrowest
        cell width for "minimum image" to pick the right copy.
    accuracy, r_cut_A, alpha_per_A : see :func:`choose_ewald_parameters`
    non_neutral : {"error", "background"}
        What to do when the cell's net charge is not zero: raise
        :class:`~clusterlab.errors.ChargeError`, or add a uniform neutralising
        background (potential shift -πQ/(Vα²) per point; no field).
    field : bool
        Also return the electric field.

    Returns
    -------
    potential_V : ndarray, shape (n,), V
    field_V_per_A : ndarray, shape (n, 3), V/Å  (only if ``field=True``)

    Notes
    -----
    A charge closer than ``COINCIDENT_A`` to a point is always left out (its
    Gaussian self term 2αq/√π is removed), so the potential at a charge's own
    site is the potential of all other charges and images. Boundary: tinfoil
    (no surface term).

    Raises
    ------
    InputError
        On bad shapes, boxes or options.
    ChargeError
        If the cell is charged and ``non_neutral="error"``.

    Examples
    --------
    >>> import numpy as np
    >>> pos = np.array([[0, 0, 0], [0.5, 0.5, 0.5]])  # CsCl, a = 1 Å
    >>> phi = ewald_potential(pos, pos, [1, -1], [1, 1, 1, 90, 90, 90])
    >>> from clusterlab.units import COULOMB_EV_A
    >>> round(float(-phi[0] / COULOMB_EV_A * np.sqrt(3) / 2), 6)
    1.762675
    """
    pts, pos, q = _check_arrays(points_A, positions_A, charges_e)
    if non_neutral not in ("error", "background"):
        raise InputError(f"{non_neutral!r} is an invalid non_neutral option. Use 'error' or 'background'.")
    vec = lattice_vectors(box)
    total = float(q.sum())
    if abs(total) > NEUTRAL_TOL_E and non_neutral == "error":
        raise ChargeError(
            f"the periodic cell has net charge {total:+.6g} e; Ewald sums need a neutral cell. "
            "Neutralise the charges, or pass non_neutral='background' for a uniform background."
        )
    p = choose_ewald_parameters(vec, len(q), accuracy=accuracy, r_cut_A=r_cut_A, alpha_per_A=alpha_per_A)
    phi_r, fld_r, on_site = _real_space(pts, pos, q, vec, p, field)
    phi_k, fld_k = _recip_space(pts, pos, q, vec, p, field)
    phi = phi_r + phi_k - 2.0 * p.alpha_per_A / np.sqrt(np.pi) * on_site
    fld = fld_r + fld_k if field else None
    if abs(total) > NEUTRAL_TOL_E or non_neutral == "background":
        phi -= np.pi * total / (abs(np.linalg.det(vec)) * p.alpha_per_A**2)
    if point_groups is not None or charge_groups is not None:
        if point_groups is None or charge_groups is None:
            raise InputError("give both point_groups and charge_groups, or neither.")
        pg = np.asarray(point_groups, dtype=np.int64).ravel()
        cg = np.asarray(charge_groups, dtype=np.int64).ravel()
        if len(pg) != len(pts) or len(cg) != len(pos):
            raise InputError(
                f"point_groups needs {len(pts)} entries and charge_groups {len(pos)}; "
                f"got {len(pg)} and {len(cg)}."
            )
        i, j = group_pairs(pg, cg)
        if len(i):
            d = minimum_image(pts[i] - pos[j], vec)
            r = np.linalg.norm(d, axis=1)
            ok = r >= COINCIDENT_A  # coincident pairs are already left out
            i, j, d, r = i[ok], j[ok], d[ok], r[ok]
            phi -= np.bincount(i, weights=q[j] / r, minlength=len(pts))
            if field:
                g = q[j] / r**3
                for x in range(3):
                    fld[:, x] -= np.bincount(i, weights=g * d[:, x], minlength=len(pts))
    if field:
        return phi * COULOMB_EV_A, fld * COULOMB_EV_A
    return phi * COULOMB_EV_A


def ewald_energy(
    positions_A: npt.ArrayLike,
    charges_e: npt.ArrayLike,
    box: npt.ArrayLike,
    *,
    groups: npt.ArrayLike | None = None,
    accuracy: float = 1e-8,
    r_cut_A: float | None = None,
    alpha_per_A: float | None = None,
    non_neutral: str = "error",
) -> float:
    """Electrostatic energy per cell (eV), :math:`\\tfrac12 \\sum_i q_i \\phi_i`.

    ``phi_i`` leaves out charge i itself and (when ``groups`` is given) the
    minimum-image copies of charges of its own group, so ``groups`` = molecule
    ids gives the intermolecular energy (intramolecular pairs excluded, but a
    molecule does interact with its own periodic images).

    Parameters and Raises are as in :func:`ewald_potential`.
    """
    pos = np.atleast_2d(np.asarray(positions_A, dtype=np.float64))
    q = np.asarray(charges_e, dtype=np.float64).ravel()
    phi = ewald_potential(
        pos, pos, q, box,
        point_groups=groups, charge_groups=groups,
        accuracy=accuracy, r_cut_A=r_cut_A, alpha_per_A=alpha_per_A, non_neutral=non_neutral,
    )
    return float(0.5 * np.dot(q, phi))
