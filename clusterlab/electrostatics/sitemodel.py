"""Film-wide electrostatic site-energy model: every molecule of every frame.

The model
---------
For state X of molecule i (X in S1, T1, cation, anion) the **environment
shift** is the first-order electrostatic energy of the change of the
molecule's charge distribution on going from S0 to X, in the potential of the
environment's ground-state charges:

.. math:: \\Delta E_X(i) = \\sum_{a\\in i} (q^X_a - q^{S0}_a)\\, V_{env}(\\mathbf r_a),
   \\qquad V_{env}(\\mathbf r_a) = k_e \\sum_{(j,\\mathbf T)\\in env(i)}\\sum_{b\\in j}
   \\frac{q_b}{|\\mathbf r_a-\\mathbf r_b-\\mathbf T|}

with ``k_e`` = :data:`clusterlab.units.COULOMB_EV_A`. For the ions the shift
is the electrostatic energy of the extra (or missing) charge in the
environment: ``cation_shift_eV`` is the environment part of
E(cation) - E(neutral), i.e. the shift of the ionization energy;
``anion_shift_eV`` that of E(anion) - E(neutral), i.e. minus the shift of the
electron affinity (the columns ``IP_shift_eV`` and ``EA_shift_eV`` repeat
them with the sign convention of :mod:`clusterlab.qm.engine`).

Radius semantics are those of :meth:`clusterlab.Film.carve` (see
:mod:`clusterlab.carve`): whole molecule images join env(i) when any of
their atoms is within ``radius`` of any atom of i (``rule="atom"``) or when
their centroid is within ``radius`` of i's centroid (``rule="centroid"``).
Radii beyond half the box are **handled**, as carving does: every periodic
image that qualifies joins once, images of molecule i itself included.

Charges
-------
State charges come from a :class:`StateChargeSet`: per residue name, ESP
charges of S0, S1, T1, cation and anion (and S0->S1 transition charges),
fitted by :func:`clusterlab.electrostatics.statecharges.state_charges` on one
reference copy of the molecule taken whole from the film. The environment's
ground-state charges are the film's charge source (``environment="film"``,
e.g. topology charges; what carving puts into clusters) or the fitted S0
charges (``environment="fitted"``).

Conformations
-------------
The fitted charges are reused for every copy of a molecule type by atom
correspondence (atom order within the molecule), with no refit per geometry.
:func:`conformer_spread` measures the error this makes: it refits a few copies
at their own geometries and reports how far the predicted shifts move.
Charges (scalars) need no rotation; only their assignment to atoms matters.

Polarization (``model="charges+polarization"``)
-----------------------------------------------
For the charged states the environment's atoms carry Thole-damped induced
dipoles (:mod:`clusterlab.electrostatics.thole`; van Duijnen & Swart, J. Phys.
Chem. A 102, 2399 (1998); Thole, Chem. Phys. 59, 341 (1981)) that respond to
the field of the difference charges ``q_X - q_S0`` of the central molecule;
``P_X_eV = -1/2 sum mu . E`` is the polarization energy (negative). Left
out: the response of the environment to its own permanent charges and the
cross term of the S0-induced dipoles with the difference field (both are
part of what fixed-charge models put into their charges), polarization of
the central molecule (it is in the QM charges), and periodic images of the
induced dipoles. Neutral excitations (S1, T1) are **not** polarized here:
their difference charges carry no net charge and the effect is small
(common practice: tens of meV against about 1 eV for ions). Each
polarization solve is a linear system over all environment atoms of one
molecule, so this model costs about a second per molecule; use
``molecules=`` to pick a sample.

Vectorisation
-------------
Per frame: one KD-tree search over molecule centroids and their periodic
images (scipy ``cKDTree``) gives the candidate molecule-image pairs; each
unordered pair is evaluated once, as a dense block of atom-atom distances
(numpy, in chunks), which decides membership (closest atom pair) and gives
both directions' potentials; potentials are accumulated with ``np.bincount``.
There is no Python loop over atoms or pairs (only over frames and chunks).

Units: Å, e, V (= eV/e), eV.
"""

from __future__ import annotations

import json
import warnings
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Iterable, Mapping, Sequence

import numpy as np
import numpy.typing as npt
import pandas as pd
from scipy.spatial import cKDTree

from ..errors import ChargeError, InputError
from ..geometry import box_vectors, perpendicular_widths, to_fractional
from ..units import COULOMB_EV_A
from .statecharges import KNOWN_STATES, StateCharges, state_charges
from .thole import atomic_polarizabilities, solve_induced_dipoles

if TYPE_CHECKING:  # pragma: no cover
    from ..film import Film

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]

SHIFT_STATES = ("S1", "T1", "cation", "anion")
CHARGED_STATES = ("cation", "anion")
MODELS = ("charges", "charges+polarization")
RULES = ("atom", "centroid")
#: array elements (float64) per chunk of atom-pair blocks (~48 MB per array)
_CHUNK_ELEMS = 2_000_000
#: largest 3n of a dense induced-dipole system (larger ones use the pair-list solver)
_DENSE_MAX = 5400

__all__ = [
    "StateChargeSet",
    "film_site_energies",
    "conformer_spread",
    "environment_pairs",
    "SHIFT_STATES",
]


# ----------------------------------------------------------------------------
# state charges per molecule type
# ----------------------------------------------------------------------------
@dataclass
class StateChargeSet:
    """Charges of S0, S1, T1, cation and anion per residue name.

    Attributes
    ----------
    charges_e : dict resname -> dict state -> ndarray (n_atoms_of_type,)
        In the molecule's atom order (as in the film), e.
    transition_e : dict resname -> ndarray (n,) or None
        S0->S1 transition charges (e), when fitted.
    fits : dict resname -> StateCharges
        The full fits (geometry, method, dipoles, misfit, convergence), when
        the set was made by :meth:`from_film`; empty for :meth:`from_arrays`.
    reference : dict resname -> dict
        Where the reference copy came from: ``{"frame", "molecule"}``.
    method : str
        ``"xc/basis"`` of the fits, or a label.

    Examples
    --------
    >>> s = StateChargeSet.from_arrays({"WAT": {"S0": [-0.8, 0.4, 0.4],
    ...                                          "cation": [0.2, 0.4, 0.4]}})
    >>> s.difference("WAT", "cation").tolist()
    [1.0, 0.0, 0.0]
    >>> StateChargeSet.from_json(s.to_json()).difference("WAT", "cation").tolist()
    [1.0, 0.0, 0.0]
    """

    charges_e: dict[str, dict[str, FloatArray]]
    transition_e: dict[str, FloatArray | None] = field(default_factory=dict)
    fits: dict[str, StateCharges] = field(default_factory=dict)
    reference: dict[str, dict[str, int]] = field(default_factory=dict)
    method: str = "given"

    # -------------------------------------------------------------- building
    @classmethod
    def from_arrays(cls, charges: Mapping[str, Mapping[str, npt.ArrayLike]], *,
                    transition: Mapping[str, npt.ArrayLike] | None = None,
                    method: str = "given") -> "StateChargeSet":
        """A set from plain arrays ``{resname: {state: charges}}`` (S0 required).

        Raises
        ------
        InputError
            Unknown states, missing S0, or vectors of different lengths.
        """
        out: dict[str, dict[str, FloatArray]] = {}
        for res, by_state in charges.items():
            bad = [s for s in by_state if s not in KNOWN_STATES]
            if bad:
                raise InputError(f"unknown state(s) {bad} for {res!r}; valid states are {list(KNOWN_STATES)}.")
            if "S0" not in by_state:
                raise InputError(f"residue {res!r} has no S0 charges; every state is relative to S0.")
            vecs = {s: np.asarray(v, dtype=np.float64).ravel() for s, v in by_state.items()}
            n = {len(v) for v in vecs.values()}
            if len(n) != 1:
                raise InputError(f"residue {res!r}: charge vectors of different lengths {sorted(n)}.")
            out[str(res)] = vecs
        tr = {str(k): (None if v is None else np.asarray(v, float).ravel()) for k, v in (transition or {}).items()}
        return cls(charges_e=out, transition_e=tr, method=method)

    @classmethod
    def from_film(cls, film: "Film", method_like: Any, *, resnames: Sequence[str] | None = None,
                  frame: int = 0, molecules: Mapping[str, int] | None = None,
                  states: Sequence[str] = KNOWN_STATES, transition: bool = True,
                  **fit_kw: Any) -> "StateChargeSet":
        """Fit state charges on one reference copy of each molecule type.

        Parameters
        ----------
        film : Film
        method_like : "xc/basis" string or an object with ``.xc``/``.basis``
        resnames : sequence of str, optional
            Molecule types to fit (default: all residue names of the film).
        frame : int
            Frame the reference copies are taken from (whole, own geometry).
        molecules : mapping resname -> molecule id, optional
            Which copy to take (default: the first molecule of each type).
        states, transition, **fit_kw
            Passed to :func:`~clusterlab.electrostatics.statecharges.state_charges`
            (the molecule's net charge from the film's charges, when known).

        Raises
        ------
        InputError
            A resname the film does not have.
        """
        names = np.asarray(film.molecule_resnames)
        wanted = list(dict.fromkeys(names.tolist())) if resnames is None else [str(r) for r in resnames]
        if "S0" not in states:
            states = ("S0", *states)
        geo = film.frame_geometry(frame, periodic=film.has_box)
        charges, trans, fits, ref = {}, {}, {}, {}
        for res in wanted:
            ids = np.flatnonzero(names == res)
            if ids.size == 0:
                raise InputError(f"the film has no molecules named {res!r}; it has {sorted(set(names))}.")
            mol = int(molecules[res]) if molecules and res in molecules else int(ids[0])
            atoms = film.molecule_atoms(mol)
            net = film.molecules["charge"].iloc[mol]
            charge = int(round(float(net))) if np.isfinite(net) else 0
            sc = state_charges(list(film.symbols[atoms]), geo.positions_A[atoms], method_like,
                               states=tuple(states), transition=transition, charge=charge, **fit_kw)
            charges[res] = {s: np.asarray(q, float) for s, q in sc.charges_e.items()}
            trans[res] = sc.transition_charges_e
            fits[res] = sc
            ref[res] = {"frame": int(geo.frame), "molecule": mol}
        method = next(iter(fits.values())).method if fits else str(method_like)
        return cls(charges_e=charges, transition_e=trans, fits=fits, reference=ref, method=method)

    # --------------------------------------------------------------- access
    @property
    def resnames(self) -> list[str]:
        return sorted(self.charges_e)

    def states_of(self, resname: str) -> tuple[str, ...]:
        return tuple(self.charges_e[resname])

    def difference(self, resname: str, state: str) -> FloatArray:
        """``q_state - q_S0`` (e) of one molecule type, in atom order.

        Raises
        ------
        InputError
            Unknown residue name or state.
        """
        if resname not in self.charges_e:
            raise InputError(f"no charges for residue {resname!r}; the set has {self.resnames}.")
        by = self.charges_e[resname]
        if state not in by:
            raise InputError(f"residue {resname!r} has no {state!r} charges; it has {list(by)}.")
        return by[state] - by["S0"]

    def ground_source(self, fallback: Any = None):
        """The fitted S0 charges as a :class:`~clusterlab.charges.MoleculeTypeCharges`
        source (for carving or for ``environment="fitted"``)."""
        from ..charges import MoleculeTypeCharges

        return MoleculeTypeCharges({r: v["S0"] for r, v in self.charges_e.items()},
                                   fallback=fallback, label=f"S0 ESP ({self.method})")

    def to_frame(self) -> pd.DataFrame:
        """Tidy table ``resname, atom, state, charge_e`` (transition charges as state "S0->S1")."""
        rows = []
        for res in self.resnames:
            for st, q in self.charges_e[res].items():
                rows += [(res, a, st, float(v)) for a, v in enumerate(q)]
            t = self.transition_e.get(res)
            if t is not None:
                rows += [(res, a, "S0->S1", float(v)) for a, v in enumerate(t)]
        return pd.DataFrame(rows, columns=["resname", "atom", "state", "charge_e"])

    # ----------------------------------------------------------------- JSON
    def to_json(self) -> str:
        """JSON text; :meth:`from_json` rebuilds the set (fits included)."""
        return json.dumps({
            "kind": "clusterlab.StateChargeSet", "version": 1, "method": self.method,
            "charges_e": {r: {s: q.tolist() for s, q in d.items()} for r, d in self.charges_e.items()},
            "transition_e": {r: (None if t is None else np.asarray(t).tolist()) for r, t in self.transition_e.items()},
            "reference": self.reference,
            "fits": {r: json.loads(f.to_json()) for r, f in self.fits.items()},
        })

    @classmethod
    def from_json(cls, text: str) -> "StateChargeSet":
        """Inverse of :meth:`to_json`.

        Raises
        ------
        InputError
            Text that is not a state-charge set.
        """
        try:
            d = json.loads(text)
        except json.JSONDecodeError as exc:
            raise InputError(f"not JSON text: {exc}") from exc
        if not isinstance(d, dict) or d.get("kind") != "clusterlab.StateChargeSet":
            raise InputError("this JSON is not a state-charge set (kind 'clusterlab.StateChargeSet').")
        out = cls.from_arrays(d["charges_e"], transition=d.get("transition_e") or {}, method=d.get("method", "given"))
        out.reference = {r: {k: int(v) for k, v in ref.items()} for r, ref in d.get("reference", {}).items()}
        out.fits = {r: StateCharges.from_json(json.dumps(f)) for r, f in d.get("fits", {}).items()}
        return out

    def save(self, path: str) -> None:
        with open(path, "w", encoding="utf-8") as fh:
            fh.write(self.to_json())

    @classmethod
    def load(cls, path: str) -> "StateChargeSet":
        with open(path, encoding="utf-8") as fh:
            return cls.from_json(fh.read())


# ----------------------------------------------------------------------------
# environment pairs of one frame
# ----------------------------------------------------------------------------
@dataclass(frozen=True)
class EnvironmentPairs:
    """Directed molecule-image pairs of one frame: image ``shift_A[k]`` of
    molecule ``env[k]`` belongs to the environment of molecule ``center[k]``
    (``image[k]``: integer lattice translation)."""

    center: IntArray
    env: IntArray
    image: IntArray
    shift_A: FloatArray


def _padded(positions_A: FloatArray, index: Any, values: Sequence[FloatArray]) -> tuple[FloatArray, list[FloatArray], npt.NDArray[np.bool_]]:
    """Molecule-major padded arrays: positions (n_mol, m, 3), values (n_mol, m), mask."""
    sizes = index.sizes()
    n_mol, m = len(sizes), int(sizes.max())
    within = np.arange(len(index.atoms)) - np.repeat(index.offsets[:-1], sizes)
    rows = np.repeat(np.arange(n_mol), sizes)
    mask = np.zeros((n_mol, m), bool)
    mask[rows, within] = True
    pos = np.zeros((n_mol, m, 3))
    pos[rows, within] = positions_A[index.atoms]
    vals = []
    for v in values:
        out = np.zeros((n_mol, m))
        out[rows, within] = np.asarray(v)[index.atoms]
        vals.append(out)
    return pos, vals, mask


def _candidate_pairs(centroids_A: FloatArray, box: FloatArray | None, cutoff_A: float
                     ) -> tuple[IntArray, IntArray, IntArray, FloatArray]:
    """Unordered molecule-image pairs with centroid distance <= cutoff.

    Returns ``(i, j, image, distance)`` with one entry per unordered pair:
    either ``i < j``, or ``i == j`` and a lattice translation that is
    lexicographically positive; ``image`` is the translation of j.
    """
    n = len(centroids_A)
    if box is None:
        pairs = cKDTree(centroids_A).query_pairs(cutoff_A, output_type="ndarray").astype(np.int64)
        i, j = pairs[:, 0], pairs[:, 1]
        d = np.linalg.norm(centroids_A[i] - centroids_A[j], axis=1)
        return i, j, np.zeros((len(i), 3), np.int64), d
    h = box_vectors(box)
    w = perpendicular_widths(h)
    n_max = np.ceil(cutoff_A / w).astype(int) + 1
    grid = np.stack(np.meshgrid(*[np.arange(-k, k + 1) for k in n_max], indexing="ij"), -1).reshape(-1, 3)
    frac = to_fractional(centroids_A, h)
    margin = cutoff_A / w + 1e-9
    rep_f = frac[None, :, :] + grid[:, None, :]           # (n_t, n, 3)
    keep = np.all((rep_f >= -margin) & (rep_f < 1 + margin), axis=2)
    t_idx, j_idx = np.nonzero(keep)
    rep = rep_f[t_idx, j_idx] @ h
    tree_rep = cKDTree(rep)
    sdm = cKDTree(centroids_A).sparse_distance_matrix(tree_rep, cutoff_A, output_type="ndarray")
    i = sdm["i"].astype(np.int64)
    k = sdm["j"].astype(np.int64)
    j = j_idx[k].astype(np.int64)
    img = grid[t_idx[k]].astype(np.int64)
    d = np.asarray(sdm["v"], float)
    lexpos = (img[:, 0] > 0) | ((img[:, 0] == 0) & ((img[:, 1] > 0) | ((img[:, 1] == 0) & (img[:, 2] > 0))))
    canon = (i < j) | ((i == j) & lexpos)
    # sparse_distance_matrix drops exact zero distances; images never coincide with
    # another molecule's centroid in a physical film, so nothing is lost there
    del n
    return i[canon], j[canon], img[canon], d[canon]


def _pair_blocks(
    pos_pad: FloatArray, mask: npt.NDArray[np.bool_], q_pad: FloatArray, ext: FloatArray,
    centroids_A: FloatArray, box: FloatArray | None, radius_A: float, rule: str,
    want: npt.NDArray[np.bool_] | None,
) -> tuple[FloatArray, EnvironmentPairs]:
    """Environment potential (V) at every atom (padded, (n_mol, m)) and the
    directed member pairs, for all molecules flagged in ``want`` (None: all)."""
    n_mol, m, _ = pos_pad.shape
    if rule == "atom":
        cut = radius_A + 2.0 * float(ext.max()) + 1e-9
    else:
        cut = radius_A * (1 + 1e-12) + 1e-9
    i, j, img, dcen = _candidate_pairs(centroids_A, box, cut)
    if rule == "atom":
        ok = dcen <= radius_A + ext[i] + ext[j] + 1e-9
    else:
        ok = dcen <= radius_A * (1 + 1e-12) + 1e-9
    if want is not None:
        ok &= want[i] | want[j]
    i, j, img = i[ok], j[ok], img[ok]
    h = box_vectors(box) if box is not None else np.zeros((3, 3))
    shift = img @ h
    pot = np.zeros(n_mol * m)
    full = bool(mask.all())
    keep_all = np.zeros(len(i), bool)
    step = max(1, _CHUNK_ELEMS // (m * m * 3))
    for s in range(0, len(i), step):
        ii, jj, sh = i[s:s + step], j[s:s + step], shift[s:s + step]
        pj = pos_pad[jj] + sh[:, None, :]
        diff = pos_pad[ii][:, :, None, :] - pj[:, None, :, :]          # (c, m, m, 3)
        r2 = np.einsum("cabx,cabx->cab", diff, diff)
        if not full:
            r2 = np.where(mask[ii][:, :, None] & mask[jj][:, None, :], r2, np.inf)
        if rule == "atom":
            member = np.sqrt(r2.reshape(len(ii), -1).min(axis=1)) <= radius_A
        else:
            member = np.ones(len(ii), bool)
        keep_all[s:s + step] = member
        if not member.any():
            continue
        if not member.all():
            ii, jj, r2 = ii[member], jj[member], r2[member]
        inv = 1.0 / np.sqrt(r2)
        v_i = np.einsum("cab,cb->ca", inv, q_pad[jj])                  # potential at i's atoms from j
        v_j = np.einsum("cab,ca->cb", inv, q_pad[ii])                  # potential at j's atoms from i
        pot += np.bincount((ii[:, None] * m + np.arange(m)).ravel(), weights=v_i.ravel(), minlength=n_mol * m)
        pot += np.bincount((jj[:, None] * m + np.arange(m)).ravel(), weights=v_j.ravel(), minlength=n_mol * m)
    i, j, img, shift = i[keep_all], j[keep_all], img[keep_all], shift[keep_all]
    pairs = EnvironmentPairs(center=np.r_[i, j], env=np.r_[j, i], image=np.r_[img, -img],
                             shift_A=np.r_[shift, -shift])
    return pot.reshape(n_mol, m) * COULOMB_EV_A, pairs


def environment_pairs(film: "Film", radius: float, *, frame: int = 0, rule: str = "atom") -> EnvironmentPairs:
    """Which molecule images form each molecule's environment in one frame
    (the same choice as :meth:`~clusterlab.Film.carve`), for all molecules at once."""
    geo = film.frame_geometry(frame, periodic=film.has_box)
    pos_pad, (q_pad,), mask = _padded(geo.positions_A, film.index, [np.zeros(film.n_atoms)])
    ext = _extents(geo.positions_A, geo.centroids_A, film.index)
    _, pairs = _pair_blocks(pos_pad, mask, q_pad, ext, geo.centroids_A, geo.box, _check_radius(radius),
                            _check_rule(rule), None)
    return pairs


def _extents(positions_A: FloatArray, centroids_A: FloatArray, index: Any) -> FloatArray:
    sizes = index.sizes()
    d = np.linalg.norm(positions_A[index.atoms] - np.repeat(centroids_A, sizes, axis=0), axis=1)
    return np.maximum.reduceat(d, index.offsets[:-1])


def _check_radius(radius: Any) -> float:
    try:
        r = float(radius)
    except (TypeError, ValueError) as exc:
        raise InputError(f"radius must be a number of Å; got {radius!r}.") from exc
    if not np.isfinite(r) or r <= 0:
        raise InputError(f"radius must be a finite positive number of Å; got {radius!r}.")
    return r


def _check_rule(rule: str) -> str:
    if rule not in RULES:
        raise InputError(f"{rule!r} is an invalid rule. Use 'atom' or 'centroid'.")
    return rule


# ----------------------------------------------------------------------------
# the film-wide driver
# ----------------------------------------------------------------------------
def _difference_arrays(film: "Film", charges: StateChargeSet, states: Sequence[str]
                       ) -> tuple[dict[str, FloatArray], npt.NDArray[np.bool_]]:
    """Per-atom ``q_X - q_S0`` for every state, and which molecules are covered."""
    names = np.asarray(film.molecule_resnames)
    covered = np.isin(names, list(charges.charges_e))
    out = {s: np.full(film.n_atoms, np.nan) for s in states}
    for res in charges.resnames:
        ids = np.flatnonzero(names == res)
        if ids.size == 0:
            continue
        sizes = film.index.sizes()[ids]
        for s in states:
            dq = charges.difference(res, s)
            if np.any(sizes != len(dq)):
                bad = ids[sizes != len(dq)][0]
                raise ChargeError(f"charges for {res!r} have {len(dq)} atoms, but molecule {bad} has "
                                  f"{film.index.sizes()[bad]}; the set does not fit this film.")
            atoms = film.index.atoms[(film.index.offsets[ids][:, None] + np.arange(len(dq))).ravel()]
            out[s][atoms] = np.tile(dq, len(ids))
    return out, covered


def _env_charges(film: "Film", charges: StateChargeSet, environment: str) -> FloatArray:
    if environment == "film":
        return np.asarray(film.charges, dtype=np.float64)
    if environment == "fitted":
        base = np.array(film.charges, dtype=np.float64) if film.charges_available else np.full(film.n_atoms, np.nan)
        names = np.asarray(film.molecule_resnames)
        for res in charges.resnames:
            q0 = charges.charges_e[res]["S0"]
            for k in np.flatnonzero(names == res):
                base[film.index.of(int(k))] = q0
        if np.isnan(base).any():
            raise ChargeError("environment='fitted' covers only the fitted residue names and the film "
                              "has no charges for the others.")
        return base
    raise InputError(f"{environment!r} is an invalid environment. Use 'film' or 'fitted'.")


def _polarize(geo: Any, film: "Film", mol: int, pairs: EnvironmentPairs, sel: IntArray,
              dq: dict[str, FloatArray], alpha_all: FloatArray, cutoff_A: float | None,
              tol_eA: float) -> dict[str, tuple[float, bool]]:
    """Thole polarization energies of the environment of one molecule."""
    idx = film.index
    c_atoms = idx.of(mol)
    env_m = pairs.env[sel]
    sizes = idx.sizes()[env_m]
    starts = idx.offsets[env_m]
    within = np.arange(sizes.sum()) - np.repeat(np.cumsum(sizes) - sizes, sizes)
    atoms = idx.atoms[np.repeat(starts, sizes) + within]
    sites = geo.positions_A[atoms] + np.repeat(pairs.shift_A[sel], sizes, axis=0)
    alpha = alpha_all[atoms]
    src = geo.positions_A[c_atoms]
    d = sites[:, None, :] - src[None, :, :]
    r3 = np.linalg.norm(d, axis=2) ** 3
    fields = {st: COULOMB_EV_A * np.einsum("sa,sax->sx", dqa[c_atoms][None, :] / r3, d) for st, dqa in dq.items()}
    if cutoff_A is None and 3 * len(sites) <= _DENSE_MAX:
        return _block_cg(sites, alpha, fields, tol_eA)
    out = {}
    for st, e in fields.items():
        pol = solve_induced_dipoles(sites, alpha, e, method="cg", tol_eA=tol_eA, cutoff_A=cutoff_A,
                                    max_iter=1000)
        out[st] = (pol.energy_eV, pol.converged)
    return out


def _block_cg(sites: FloatArray, alpha: FloatArray, fields: dict[str, FloatArray], tol_eA: float,
              max_iter: int = 500) -> dict[str, tuple[float, bool]]:
    """Induced dipoles for several fields at once: conjugate gradients on the
    symmetric system (1 - s T s) y = s E0, s = alpha^1/2, mu = s y, with the
    dense Thole tensor of :func:`~clusterlab.electrostatics.thole.dipole_tensor_matrix`
    (the same equations as :func:`~clusterlab.electrostatics.thole.solve_induced_dipoles`)."""
    from .thole import dipole_tensor_matrix

    names = list(fields)
    s = np.repeat(np.sqrt(alpha), 3)
    a = -(s[:, None] * dipole_tensor_matrix(sites, alpha) * s[None, :])
    a[np.diag_indices_from(a)] += 1.0
    e0 = np.stack([fields[k].ravel() / COULOMB_EV_A for k in names], axis=1)     # (3n, k), e/Å^2
    b = s[:, None] * e0
    y = b.copy()
    r = b - a @ y
    p = r.copy()
    rs = np.einsum("ik,ik->k", r, r)
    done = np.max(np.abs(s[:, None] * r), axis=0) < tol_eA
    for _ in range(max_iter):
        if done.all():
            break
        ap = a @ p
        pap = np.einsum("ik,ik->k", p, ap)
        step = np.where(done | (pap <= 0), 0.0, rs / np.where(pap > 0, pap, 1.0))
        y += step * p
        r -= step * ap
        rs_new = np.einsum("ik,ik->k", r, r)
        done |= np.max(np.abs(s[:, None] * r), axis=0) < tol_eA
        done |= pap <= 0
        p = r + np.where(rs > 0, rs_new / np.where(rs > 0, rs, 1.0), 0.0) * p
        rs = rs_new
    mu = s[:, None] * y
    resid = np.max(np.abs(s[:, None] * (b - a @ y)), axis=0)
    energy = -0.5 * np.einsum("ik,ik->k", mu, e0) * COULOMB_EV_A
    return {k: (float(energy[n]), bool(resid[n] < tol_eA and np.all(np.isfinite(mu[:, n]))))
            for n, k in enumerate(names)}


def film_site_energies(
    film: "Film",
    states: Sequence[str] = SHIFT_STATES,
    *,
    radius: float,
    frames: Iterable[int] | None = None,
    model: str = "charges",
    charges: StateChargeSet,
    periodic_limit: bool = False,
    rule: str = "atom",
    progress: bool = True,
    molecules: Sequence[int] | None = None,
    environment: str = "film",
    polarization_cutoff_A: float | None = None,
    polarization_tol_eA: float = 1e-6,
    ewald_accuracy: float = 1e-6,
) -> pd.DataFrame:
    """Electrostatic environment shifts of every molecule of every frame.

    Parameters
    ----------
    film : Film
    states : sequence of {"S1", "T1", "cation", "anion"}
    radius : float, Å
        Environment radius with the semantics of :meth:`Film.carve`; radii
        beyond half the box include every qualifying periodic image once.
    frames : iterable of int, optional
        Default: all frames.
    model : {"charges", "charges+polarization"}
        With polarization, the charged states also get Thole polarization
        energies ``P_cation_eV``, ``P_anion_eV`` (negative) and totals
        (see the module docstring; about a second per molecule).
    charges : StateChargeSet
        State charges per residue name; molecules of other residue names get NaN.
    periodic_limit : bool
        Also give ``<state>_shift_periodic_eV``: the same sum with the full
        periodic (tinfoil Ewald) potential of all other molecules and images,
        via :func:`clusterlab.electrostatics.ewald.ewald_potential` (slow:
        seconds per frame; needs a box and a neutral cell).
    rule : {"atom", "centroid"}
    progress : bool
        Show a progress bar over frames.
    molecules : sequence of int, optional
        Only these molecules (default: all).
    environment : {"film", "fitted"}
        Ground-state charges of the environment: the film's charge source
        (what carving uses) or the fitted S0 charges of the set.
    polarization_cutoff_A : float, optional
        Leave out induced dipole-dipole couplings beyond this distance
        (default: all pairs in the environment).
    polarization_tol_eA : float
        Convergence threshold of the induced dipoles (e·Å).
    ewald_accuracy : float
        Relative accuracy of the periodic limit.

    Returns
    -------
    pandas.DataFrame
        One row per (frame, molecule): ``frame, molecule, resname, x_A, y_A,
        z_A`` (centroid, primary cell), ``n_env_molecules`` (environment
        molecule images), ``<state>_shift_eV`` per state, ``IP_shift_eV``
        / ``EA_shift_eV`` when the ions are asked for (engine sign
        convention: EA = E(neutral) - E(anion)), and with polarization
        ``P_cation_eV, P_anion_eV, cation_total_eV, anion_total_eV,
        P_converged`` (IP/EA then include polarization).

    Raises
    ------
    InputError
        Bad states, model, rule, radius or environment.
    ChargeError
        Charges that do not fit the film's molecules, or no film charges.

    Examples
    --------
    >>> table = film_site_energies(film, radius=15.0, charges=charge_set)  # doctest: +SKIP
    >>> table.groupby("frame")["cation_shift_eV"].std()  # doctest: +SKIP
    """
    from ..progress import progress_bar

    states = tuple(states)
    bad = [s for s in states if s not in SHIFT_STATES]
    if bad or not states:
        raise InputError(f"states {list(states)!r} are invalid; choose from {list(SHIFT_STATES)}.")
    if model not in MODELS:
        raise InputError(f"{model!r} is an invalid model. Use 'charges' or 'charges+polarization'.")
    if not isinstance(charges, StateChargeSet):
        raise InputError(f"charges= must be a StateChargeSet; got {type(charges).__name__}.")
    radius = _check_radius(radius)
    rule = _check_rule(rule)
    for res in charges.resnames:
        miss = [s for s in states if s not in charges.charges_e[res]]
        if miss:
            raise InputError(f"the charge set has no {miss} charges for {res!r}; it has {charges.states_of(res)}.")
    frame_list = list(range(film.n_frames)) if frames is None else [film._check_frame(f) for f in frames]
    mol_sel = np.arange(film.n_molecules) if molecules is None else np.unique(film.select(list(molecules)))
    want = np.zeros(film.n_molecules, bool)
    want[mol_sel] = True
    if periodic_limit and not film.has_box:
        raise InputError("periodic_limit=True needs a film with a periodic box.")
    dq, covered = _difference_arrays(film, charges, states)
    q_env = _env_charges(film, charges, environment)
    polar = model == "charges+polarization"
    pol_states = [s for s in states if s in CHARGED_STATES] if polar else []
    alpha_all = atomic_polarizabilities(list(film.symbols)) if pol_states else None
    names = np.asarray(film.molecule_resnames)

    tables = []
    bar = progress_bar(len(frame_list), desc="site energies", enabled=progress, unit="frame")
    try:
        for f in frame_list:
            geo = film.frame_geometry(f, periodic=film.has_box)
            ext = _extents(geo.positions_A, geo.centroids_A, film.index)
            pos_pad, (q_pad, *dq_pad), mask = _padded(geo.positions_A, film.index,
                                                      [q_env, *[np.nan_to_num(dq[s]) for s in states]])
            pot, pairs = _pair_blocks(pos_pad, mask, q_pad, ext, geo.centroids_A, geo.box, radius, rule,
                                      None if molecules is None else want)
            row: dict[str, Any] = {
                "frame": np.full(len(mol_sel), geo.frame), "molecule": mol_sel, "resname": names[mol_sel],
                "x_A": geo.centroids_A[mol_sel, 0], "y_A": geo.centroids_A[mol_sel, 1],
                "z_A": geo.centroids_A[mol_sel, 2],
                "n_env_molecules": np.bincount(pairs.center, minlength=film.n_molecules)[mol_sel],
            }
            for s, d in zip(states, dq_pad):
                val = np.einsum("ma,ma->m", d, pot)[mol_sel]
                row[f"{s}_shift_eV"] = np.where(covered[mol_sel], val, np.nan)
            if periodic_limit:
                from .ewald import ewald_potential

                phi = ewald_potential(geo.positions_A, geo.positions_A, q_env, geo.box,
                                      point_groups=film.molecule_of_atom, charge_groups=film.molecule_of_atom,
                                      accuracy=ewald_accuracy)
                for s in states:
                    v = np.bincount(film.molecule_of_atom, weights=np.nan_to_num(dq[s]) * phi,
                                    minlength=film.n_molecules)[mol_sel]
                    row[f"{s}_shift_periodic_eV"] = np.where(covered[mol_sel], v, np.nan)
            if pol_states:
                order = np.argsort(pairs.center, kind="stable")
                bounds = np.searchsorted(pairs.center[order], np.arange(film.n_molecules + 1))
                p_vals = {s: np.full(len(mol_sel), np.nan) for s in pol_states}
                p_ok = np.ones(len(mol_sel), bool)
                for k, mol in enumerate(mol_sel):
                    if not covered[mol]:
                        continue
                    sel = order[bounds[mol]:bounds[mol + 1]]
                    res = _polarize(geo, film, int(mol), pairs, sel, {s: dq[s] for s in pol_states}, alpha_all,
                                    polarization_cutoff_A, polarization_tol_eA)
                    for s, (e, ok) in res.items():
                        p_vals[s][k] = e
                        p_ok[k] &= ok
                for s in pol_states:
                    row[f"P_{s}_eV"] = p_vals[s]
                    row[f"{s}_total_eV"] = row[f"{s}_shift_eV"] + p_vals[s]
                row["P_converged"] = p_ok
            tot = "_total_eV" if pol_states else "_shift_eV"
            if "cation" in states:
                row["IP_shift_eV"] = row[f"cation{tot}"]
            if "anion" in states:
                row["EA_shift_eV"] = -row[f"anion{tot}"]
            tables.append(pd.DataFrame(row))
            if bar is not None:
                bar.update(1)
    finally:
        if bar is not None:
            bar.close()
    out = pd.concat(tables, ignore_index=True)
    if pol_states and not out["P_converged"].all():
        warnings.warn(f"induced dipoles did not converge for {(~out['P_converged']).sum()} molecule(s); "
                      "see the P_converged column.", stacklevel=2)
    out.attrs.update({"radius_A": radius, "rule": rule, "model": model, "environment": environment,
                      "charges_method": charges.method, "film_id": film.film_id})
    return out


# ----------------------------------------------------------------------------
# conformational error estimate
# ----------------------------------------------------------------------------
def conformer_spread(
    film: "Film",
    charges: StateChargeSet,
    method_like: Any,
    *,
    radius: float,
    resname: str | None = None,
    n_copies: int = 4,
    frame: int = 0,
    states: Sequence[str] = SHIFT_STATES,
    rule: str = "atom",
    seed: int = 0,
    molecules: Sequence[int] | None = None,
    **fit_kw: Any,
) -> pd.DataFrame:
    """Error of reusing one copy's charges for every conformation.

    Refits the state charges of ``n_copies`` molecules of ``resname`` at their
    own geometries (same method and fit options) and recomputes their
    environment shifts in the same environment, with the refitted difference
    charges in place of the reference ones.

    Returns
    -------
    pandas.DataFrame
        One row per (molecule, state): ``frame, molecule, state,
        shift_reference_eV, shift_refit_eV, error_eV`` (reference - refit).
        ``df.groupby("state")["error_eV"].agg(["mean", "std"])`` is the
        estimate to quote; ``df.attrs["rms_error_eV"]`` holds the RMS per state.

    Raises
    ------
    InputError
        Unknown residue name or a bad state.
    """
    res = resname if resname is not None else charges.resnames[0]
    names = np.asarray(film.molecule_resnames)
    ids = np.flatnonzero(names == res)
    if ids.size == 0 or res not in charges.charges_e:
        raise InputError(f"residue {res!r} is not in both the film and the charge set.")
    if molecules is None:
        rng = np.random.default_rng(seed)
        picks = np.sort(rng.choice(ids, size=min(n_copies, ids.size), replace=False))
    else:
        picks = np.asarray(molecules, dtype=np.int64)
    ref = film_site_energies(film, states, radius=radius, frames=[frame], charges=charges, rule=rule,
                             progress=False, molecules=picks.tolist()).set_index("molecule")
    geo = film.frame_geometry(frame, periodic=film.has_box)
    base = {s: charges.charges_e[res][s] for s in ("S0", *states)}
    rows = []
    for mol in picks:
        atoms = film.molecule_atoms(int(mol))
        net = film.molecules["charge"].iloc[int(mol)]
        sc = state_charges(list(film.symbols[atoms]), geo.positions_A[atoms], method_like,
                           states=("S0", *states), transition=False,
                           charge=int(round(float(net))) if np.isfinite(net) else 0, **fit_kw)
        own = StateChargeSet.from_arrays({res: {**base}})
        # only this copy gets its own charges: give it a private residue name
        tag = f"{res}\x1f{int(mol)}"
        own.charges_e[tag] = {s: np.asarray(sc.charges_e[s], float) for s in ("S0", *states)}
        new = _shift_with_override(film, own, tag, int(mol), states, radius, frame, rule)
        for s in states:
            r0 = float(ref.loc[int(mol), f"{s}_shift_eV"])
            rows.append((geo.frame, int(mol), s, r0, new[s], r0 - new[s]))
    out = pd.DataFrame(rows, columns=["frame", "molecule", "state", "shift_reference_eV", "shift_refit_eV", "error_eV"])
    out.attrs["rms_error_eV"] = out.groupby("state")["error_eV"].apply(lambda e: float(np.sqrt(np.mean(e**2)))).to_dict()
    return out


def _shift_with_override(film: "Film", cset: StateChargeSet, tag: str, mol: int, states: Sequence[str],
                         radius: float, frame: int, rule: str) -> dict[str, float]:
    """Shifts of one molecule with its own difference charges (environment: film charges)."""
    geo = film.frame_geometry(frame, periodic=film.has_box)
    want = np.zeros(film.n_molecules, bool)
    want[mol] = True
    pos_pad, (q_pad,), mask = _padded(geo.positions_A, film.index, [film.charges])
    ext = _extents(geo.positions_A, geo.centroids_A, film.index)
    pot, _ = _pair_blocks(pos_pad, mask, q_pad, ext, geo.centroids_A, geo.box, radius, rule, want)
    n = film.index.sizes()[mol]
    return {s: float(np.dot(cset.difference(tag, s), pot[mol, :n])) for s in states}


def run_film_model(film: "Film", method: Any, *, radius_A: float, frames: Sequence[int] | None = None,
                   polarization: bool = False, polarize_molecules: Sequence[int] | None = None,
                   reference_molecule: int = 0, charges: StateChargeSet | None = None,
                   progress: bool = True) -> pd.DataFrame:
    """Fit state charges on one reference copy (unless given) and evaluate the
    film-wide model for S1, T1, cation and anion of every molecule and frame.

    ``method`` is a :class:`~clusterlab.Method` (its grid level and density
    fitting are used) or an ``"xc/basis"`` string (then grid level 1 with
    density fitting) for the state-charge fit (TDA for S1/T1, ΔSCF for the ions).

    Polarization (Thole, charged states only) costs seconds per molecule, so
    it is computed for ``polarize_molecules`` (default: all) in the first
    frame of ``frames``; other rows have NaN polarization columns.

    The fitted :class:`StateChargeSet` is kept in ``table.attrs["charges"]``
    (transition charges included, for excitonic couplings).
    """
    if charges is None:
        res = str(film.molecule_resnames[film._check_molecule(reference_molecule)])
        fit_kw: dict[str, Any] = {"grid_level": 1, "density_fit": True}
        if hasattr(method, "grid_level"):
            fit_kw = {"grid_level": method.grid_level, "density_fit": method.density_fit}
        charges = StateChargeSet.from_film(film, method, resnames=[res], molecules={res: reference_molecule},
                                           **fit_kw)
    states = ("S1", "T1", "cation", "anion")
    table = film_site_energies(film, states, radius=radius_A, frames=frames, model="charges", charges=charges,
                               progress=progress)
    if polarization:
        f0 = [int(table.frame.min())]
        pol = film_site_energies(film, ("cation", "anion"), radius=radius_A, frames=f0,
                                 model="charges+polarization", charges=charges, progress=progress,
                                 molecules=polarize_molecules)
        cols = [c for c in pol.columns if c.startswith("P_") or c.endswith("_total_eV")]
        table = table.merge(pol[["frame", "molecule", *cols]], on=["frame", "molecule"], how="left")
    table.attrs["charges"] = charges
    table.attrs["radius_A"] = float(radius_A)
    return table
