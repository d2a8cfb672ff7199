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
their atoms is within ``radius_A`` of any atom of i (``rule="atom"``) or when
their centroid is within ``radius_A`` of i's centroid (``rule="centroid"``).
Radii beyond half the box are **handled**, as carving does: every periodic
image that qualifies joins once, images of molecule i itself included.

Charges
-------
State charges come from a :class:`~clusterlab.electrostatics.chargeset.StateChargeSet`
(per molecular species, i.e. the ``species`` column of ``film.molecules``, ESP charges of S0, S1, T1, cation and anion, fitted on
reference copies by :func:`clusterlab.study.chargefits.fit_state_charges`).
The environment's ground-state charges are the film's charge source
(``environment="film"``, e.g. topology charges; what carving puts into
clusters) or the fitted S0 charges (``environment="fitted"``).

Conformations
-------------
Charges are mapped onto every copy of a molecule type by atom correspondence
(atom order within the molecule); charges are scalars and need no rotation.
Conformational change is handled in three ways, none of them a refit per
geometry: **conformer families** (each copy in each frame takes the numbers
of the reference it superposes best onto, :mod:`clusterlab.electrostatics.conformers`;
columns ``conformer``, ``conformer_rmsd_A``), **symmetrized charges**
(:meth:`StateChargeSet.symmetrized`) and **an error estimate**
(:func:`clusterlab.study.chargefits.conformer_spread`).

Second order and field response (``second_order``, ``field_response``)
----------------------------------------------------------------------
A fixed set of difference charges gives only the first-order energy. In a
field F an excitation energy also changes by ``-1/2 F·Δα·F`` (Δα = alpha_X -
alpha_S0), which for a bright pi->pi* state of a conjugated molecule can
dominate: measured on the demo film (``bench/diagnose_s1.py``) the part of the
embedded-QM S1 shift that is even in the environment charges has three times
the spread of the odd part. The polarizability changes come from finite fields
with the QM engine itself (:func:`clusterlab.study.chargefits.add_field_response`),
per conformer reference, turned into each copy's orientation by the
superposition; F is the uniform field that best reproduces the environment
potential over the molecule's atoms
(:func:`~clusterlab.electrostatics.fieldfit.uniform_field_fit`).
``field_response`` replaces the charges of the chosen neutral excitations by
their whole finite-field response, ``-Δμ·F - 1/2 F·Δα·F``: its Δμ is an
energy derivative (a relaxed dipole change), where difference charges from
unrelaxed TDA densities overstate it (2-4x on the demo film). Both leave out
the field's variation across the molecule beyond its uniform part (and, for
the field response, every multipole above the dipole) and any change of Δα
with the copy's own distortion beyond its family.

Polarization (``polarization=True``)
------------------------------------
For the charged states the environment's atoms carry Thole-damped induced
dipoles (:mod:`clusterlab.electrostatics.thole`; van Duijnen & Swart, J. Phys.
Chem. A 102, 2399 (1998); Thole, Chem. Phys. 59, 341 (1981)) that respond to
the field of the difference charges ``q_X - q_S0`` of the central molecule.
``P_X_eV`` is the change of the Thole energy on going from the neutral to
state X, ``U(F0 + dF_X) - U(F0) = -1/2 dF_X·A·dF_X - dF_X·mu0`` (A the relay
matrix, dF_X the difference field, mu0 = A F0 the dipoles that the neutral
molecule's S0 charges and the charges of the *other* environment molecules
induce): the first term is the response to the added charge (negative,
nearly the same for both ions), the second (``neutral_induction``, on by
default) the energy of the added charge in the dipoles already induced in
the neutral film; it has opposite signs for the cation and the anion and is
what makes P+ and P- differ. This is the same quantity as polarizable minus
fixed-charge QM on the same cluster (:class:`~clusterlab.Method`
``environment="polarizable"``, same atomic polarizabilities, damping and
exclusion rule): ``polarizable_radius_A`` picks the polarizable images as
``Film.carve(polarizable_radius=)`` does; on 6 demo molecules it follows that
QM to 4 meV (P+) and 10 meV (P-) RMS without calibration
(``bench/parity_polarization.py``; a fitted ``polarization_scale`` is 1.005).
Left out: the central molecule's own density response to the induced dipoles
(the QM has it; small on the demo film), charge penetration of the QM
density, and periodic images of the induced dipoles. Neutral excitations (S1, T1) are **not** polarized here:
their difference charges carry no net charge and the effect is small
(common practice: tens of meV against about 1 eV for ions). Each
polarization solve is a linear system over all environment atoms of one
molecule, so this costs about a second per molecule; use ``molecules=`` to
pick a sample.

Vectorisation
-------------
Per frame, :func:`clusterlab.electrostatics.pairsum.environment_potential`:
one KD-tree search over centroids and their periodic replicas gives the
unordered candidate pairs; for each molecule, one BLAS matrix product of
augmented coordinates gives the squared distances to all its partners' atoms,
block minima decide membership, and ``1/r`` with two matrix-vector products
gives the potential in both directions. The sum is exact (agreement with a
direct per-molecule sum to about 1e-13 relative). One Python iteration per
molecule and frame, none per pair or atom; ``threads=`` splits the work.

Units: Å, e, V (= eV/e), eV.
"""

from __future__ import annotations

import dataclasses
import json
import warnings
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Callable, Iterable, Iterator, Sequence

import numpy as np
import numpy.typing as npt
import pandas as pd

from ..electrostatics.chargeset import StateChargeSet
from ..electrostatics.ewald import ewald_potential
from ..electrostatics.fieldfit import uniform_field_fit
from ..electrostatics.pairsum import EnvironmentPairs, PotentialResult, environment_potential
from ..electrostatics.stark import stark_energy_eV
from ..electrostatics.thole import atomic_polarizabilities, solve_induced_dipoles
from ..errors import ChargeError, InputError
from ..progress import progress_bar
from ..qm.method import Method, require_method
from ..store import task_key
from ..units import COULOMB_EV_A, DEBYE_E_A
from ..versions import software_versions
from .chargefits import add_field_response, fit_state_charges
from .filmmap import (
    CHARGED_STATES,
    NEUTRAL_STATES,
    SHIFT_STATES,
    FrameFamilies,
    check_radius_A,
    check_rule,
    frame_families,
)
from .jsonio import json_of_kind, table_from_dict, table_to_dict

if TYPE_CHECKING:  # pragma: no cover
    from ..film import Film

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]
BoolArray = npt.NDArray[np.bool_]

#: Ground-state charges of the environment.
ENVIRONMENTS = ("film", "fitted")

__all__ = ["FilmModel", "FilmModelResult", "film_site_energies", "run_film_model", "environment_pairs",
           "fit_polarization_scale", "SHIFT_STATES"]


def environment_pairs(film: "Film", radius_A: float, *, frame: int = 0, rule: str = "atom") -> EnvironmentPairs:
    """Which molecule images form each molecule's environment in one frame
    (the same choice as :meth:`~clusterlab.Film.carve`), for all molecules at once."""
    geo = film.frame_geometry(frame, periodic=film.has_box)
    res = environment_potential(geo.positions_A, np.zeros(film.n_atoms), film.index.atoms, film.index.offsets,
                                geo.centroids_A, geo.box, check_radius_A(radius_A), rule=check_rule(rule))
    return res.pairs


def fit_polarization_scale(model_eV: npt.ArrayLike, reference_eV: npt.ArrayLike) -> float:
    """Least-squares scale ``s`` (through the origin) with ``s * model ≈ reference``:
    ``s = sum(m r) / sum(m m)`` over the finite pairs; the value of
    :class:`FilmModel`'s ``polarization_scale`` fitted on a parity set
    (e.g. model P against polarizable QM, ``bench/parity_polarization.py``).

    Raises
    ------
    InputError
        Arrays of different shapes, or no finite pair with a nonzero model value.

    Examples
    --------
    >>> fit_polarization_scale([-1.0, -0.5], [-0.9, -0.45])
    0.9
    """
    m = np.asarray(model_eV, dtype=np.float64).ravel()
    r = np.asarray(reference_eV, dtype=np.float64).ravel()
    if m.shape != r.shape:
        raise InputError(f"model_eV and reference_eV must have the same length; got {m.size} and {r.size}.")
    ok = np.isfinite(m) & np.isfinite(r)
    den = float(m[ok] @ m[ok])
    if den == 0.0:
        raise InputError("fit_polarization_scale needs at least one finite pair with a nonzero model value.")
    return round(float(m[ok] @ r[ok]) / den, 12)


# ----------------------------------------------------------------------------
# charges laid onto the film
# ----------------------------------------------------------------------------
def _difference_arrays(film: "Film", charges: StateChargeSet, states: Sequence[str]
                       ) -> tuple[dict[str, FloatArray], BoolArray]:
    """Per-atom ``q_X - q_S0`` for every state, and which molecules are covered."""
    names = np.asarray(film.molecule_species)
    covered = np.isin(names, list(charges.charges_e))
    out = {s: np.full(film.n_atoms, np.nan) for s in states}
    for res in charges.resnames:
        ids = np.flatnonzero(names == res)
        if ids.size == 0:
            continue
        film.species_formula(res)  # one composition per species, or the set cannot fit it
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


def _family_overrides(film: "Film", charges: StateChargeSet, fams: FrameFamilies, states: Sequence[str],
                      dq: dict[str, FloatArray], q_env: FloatArray | None) -> None:
    """Put each copy's family charges into the per-atom arrays (in place)."""
    names = np.asarray(film.molecule_species)
    for res, refs in charges.conformers.items():
        ids = np.flatnonzero(names == res)
        if ids.size == 0 or len(refs) < 2:
            continue                                  # one reference: the static arrays hold it already
        n = len(refs[0].positions_A)
        atoms = film.index.atoms[(film.index.offsets[ids][:, None] + np.arange(n)).ravel()]
        f = fams.family[ids]
        for s in states:
            table = np.stack([c.charges_e[s] - c.charges_e["S0"] for c in refs])
            dq[s][atoms] = table[f].ravel()
        if q_env is not None:
            q_env[atoms] = np.stack([c.charges_e["S0"] for c in refs])[f].ravel()


def _reference_tensors(film: "Film", charges: StateChargeSet, fams: FrameFamilies | None,
                       pick: Callable[[Any], FloatArray]) -> Iterator[tuple[IntArray, FloatArray, FloatArray]]:
    """Per molecule type: the molecules of that type, ``pick(reference)`` of each
    molecule's conformer reference (stacked) and the rotation of each molecule from
    its reference's frame into the film."""
    names = np.asarray(film.molecule_species)
    for res, refs in charges.conformers.items():
        ids = np.flatnonzero(names == res)
        if ids.size == 0:
            continue
        fam = np.maximum(fams.family[ids], 0) if fams is not None else np.zeros(ids.size, int)
        r = fams.rotation[ids] if fams is not None else np.tile(np.eye(3), (ids.size, 1, 1))
        yield ids, np.stack([pick(c) for c in refs])[fam], r


def _dipole_term(film: "Film", charges: StateChargeSet, fams: FrameFamilies | None, state: str,
                 fld: FloatArray) -> FloatArray:
    """``-Δμ·F`` (eV) of every molecule, Δμ of its conformer reference turned into its orientation."""
    out = np.full(film.n_molecules, np.nan)
    for ids, dmu, r in _reference_tensors(film, charges, fams, lambda c: c.dmu_D[state]):
        out[ids] = -np.einsum("ni,nij,nj->n", fld[ids], r, dmu * DEBYE_E_A)
    return out


def _stark_term(film: "Film", charges: StateChargeSet, fams: FrameFamilies | None, state: str,
                fld: FloatArray) -> FloatArray:
    """``-1/2 F·Δα·F`` (eV) of every molecule, Δα of its conformer reference turned into its orientation."""
    out = np.full(film.n_molecules, np.nan)
    for ids, da, r in _reference_tensors(film, charges, fams, lambda c: c.dalpha_A3[state]):
        out[ids] = stark_energy_eV(np.einsum("nij,njk,nlk->nil", r, da, r), fld[ids])
    return out


def _fitted_s0(film: "Film", charges: StateChargeSet) -> FloatArray:
    """Per-atom fitted S0 charges of the covered molecules (NaN elsewhere)."""
    base = np.full(film.n_atoms, np.nan)
    names = np.asarray(film.molecule_species)
    for res in charges.resnames:
        q0 = charges.charges_e[res]["S0"]
        for k in np.flatnonzero(names == res):
            base[film.index.of(int(k))] = q0
    return base


def _environment_charges(film: "Film", charges: StateChargeSet, environment: str) -> FloatArray:
    if environment == "film":
        return np.asarray(film.charges, dtype=np.float64)
    base = _fitted_s0(film, charges)
    if film.charges_available:
        base = np.where(np.isnan(base), np.asarray(film.charges, dtype=np.float64), base)
    if np.isnan(base).any():
        names = np.asarray(film.molecule_species)
        missing = sorted(set(names[np.isnan(base[film.index.atoms[film.index.offsets[:-1]]])].tolist()))
        raise ChargeError(f"environment='fitted' covers only the fitted species {charges.resnames} and the "
                          f"film has no charges for the species {missing}.")
    return base


@dataclass(frozen=True)
class _PolarizationSetup:
    """The options of the Thole term (see :class:`FilmModel`)."""

    cutoff_A: float | None
    tol_eA: float
    radius_A: float | None
    rule: str
    neutral_induction: bool
    scale: float


def _field_V_A(points_A: FloatArray, sources_A: FloatArray, q_e: FloatArray,
               exclude: BoolArray | None = None) -> FloatArray:
    """Bare Coulomb field (V/Å) of charges ``q_e`` at ``sources_A`` on ``points_A``,
    pairs where ``exclude[p, s]`` is true left out (blocks of points bound the memory)."""
    out = np.zeros((len(points_A), 3))
    step = max(1, 2_000_000 // max(1, len(sources_A)))
    for a in range(0, len(points_A), step):
        d = points_A[a:a + step, None, :] - sources_A[None, :, :]
        r = np.linalg.norm(d, axis=2)
        if exclude is not None:
            r = np.where(exclude[a:a + step], np.inf, r)  # a site's own molecule (and the site itself) left out
        out[a:a + step] = np.einsum("ps,psx->px", q_e[None, :] / r ** 3, d)
    return COULOMB_EV_A * out


def _polarize(geo: Any, film: "Film", mol: int, pairs: EnvironmentPairs, sel: IntArray,
              dq: dict[str, FloatArray], q_env: FloatArray, q_s0: FloatArray, alpha_all: FloatArray,
              setup: _PolarizationSetup) -> dict[str, tuple[float, bool]]:
    """Thole polarization energies of the environment of one molecule, every state's field at once.

    ``P_X = U(F0 + dF_X) - U(F0) = -1/2 dF_X·A·dF_X - dF_X·mu0`` with U the Thole
    energy, A the relay matrix, dF_X the field of the difference charges and
    mu0 = A F0 the dipoles the neutral molecule and the environment's own charges
    induce (the second term only with ``neutral_induction``)."""
    idx = film.index
    c_atoms = idx.of(mol)
    env_m = pairs.env[sel]
    sizes = idx.sizes()[env_m]
    starts = idx.offsets[env_m]
    within = np.arange(sizes.sum()) - np.repeat(np.cumsum(sizes) - sizes, sizes)
    atoms = idx.atoms[np.repeat(starts, sizes) + within]
    image_of = np.repeat(np.arange(len(env_m)), sizes)
    sites = geo.positions_A[atoms] + np.repeat(pairs.shift_A[sel], sizes, axis=0)
    c_pos = geo.positions_A[c_atoms]
    keep = np.ones(len(env_m), bool)
    if setup.radius_A is not None and len(env_m):
        # the images carving makes polarizable (Film.carve(polarizable_radius=)): same rule, same distance
        if setup.rule == "atom":
            near = np.linalg.norm(sites[:, None, :] - c_pos[None, :, :], axis=2).min(axis=1)
            dist = np.minimum.reduceat(near, np.cumsum(sizes) - sizes)
        else:
            cent = geo.centroids_A[env_m] + pairs.shift_A[sel]
            dist = np.linalg.norm(cent - geo.centroids_A[mol], axis=1)
        keep = dist <= setup.radius_A
    on = keep[image_of]
    pol_sites = sites[on]
    names = list(dq)
    fields = [_field_V_A(pol_sites, c_pos, dq[st][c_atoms]) for st in names]
    if setup.neutral_induction:
        # neutral state: central molecule's S0 charges and every other environment image's charges
        same = image_of[on][:, None] == image_of[None, :]
        fields.append(_field_V_A(pol_sites, c_pos, q_s0[c_atoms]) + _field_V_A(pol_sites, sites, q_env[atoms], same))
    pols = solve_induced_dipoles(pol_sites, alpha_all[atoms][on], np.stack(fields), tol_eA=setup.tol_eA,
                                 cutoff_A=setup.cutoff_A, max_iter=1000)
    out = {}
    for k, st in enumerate(names):
        e, ok = pols[k].energy_eV, pols[k].converged
        if setup.neutral_induction:
            e -= float(np.sum(pols[-1].dipoles_eA * fields[k]))
            ok = ok and pols[-1].converged
        out[st] = (setup.scale * e, ok)
    return out


# ----------------------------------------------------------------------------
# the model
# ----------------------------------------------------------------------------
@dataclass(frozen=True)
class _FrameInputs:
    """What one frame's sums need: geometry, conformer families, per-atom
    difference charges and environment charges (the families' where they apply)."""

    geo: Any
    families: FrameFamilies | None
    dq: dict[str, FloatArray]
    q_env: FloatArray
    q_s0: FloatArray


@dataclass(frozen=True)
class _Selection:
    """The molecules whose rows a run gives, and the pair-sum mask (None: all)."""

    molecules: IntArray
    want: BoolArray | None


def _check_bool(name: str, value: Any) -> bool:
    if not isinstance(value, (bool, np.bool_)):
        raise InputError(f"{name} must be True or False; got {value!r}.")
    return bool(value)


class FilmModel:
    """The film-wide site-energy model (see the module docstring) with its options checked once.

    Parameters
    ----------
    film : Film
    charges : StateChargeSet
        State charges (and field responses) per species, keyed by the
        species name (:attr:`Film.molecule_species`, today the residue name),
        each species with its own conformer references; molecules of species
        the set lacks get NaN. A species whose molecules have several
        compositions is refused (:meth:`Film.species_formula`).
    radius_A : float, Å
        Environment radius with the semantics of :meth:`Film.carve`; radii
        beyond half the box include every qualifying periodic image once.
    states : sequence of {"S1", "T1", "cation", "anion"}
    rule : {"atom", "centroid"}
    environment : {"film", "fitted"}
        Ground-state charges of the environment: the film's charge source
        (what carving uses) or the fitted S0 charges of the set.
    second_order : bool
        Add the second-order (quadratic Stark) term ``-1/2 F·Δα_X·F`` to the
        first-order charge shift of the neutral excitations, with F the
        uniform field that best reproduces the environment potential over the
        molecule's atoms and Δα_X the polarizability change of the molecule's
        conformer reference turned into the copy's orientation (the set must
        carry Δα: :func:`~clusterlab.study.chargefits.add_field_response`).
        Leaves out the field's variation across the molecule beyond its
        uniform part and Δα's change with each copy's own distortion.
        Columns ``<state>_first_order_eV``, ``<state>_stark_eV`` and
        ``field_V_A`` (``|F|``); ``<state>_shift_eV`` is their sum.
    field_response : sequence of {"S1", "T1"}
        Neutral excitations (among ``states``) whose shift is their whole
        finite-field response ``-Δμ_X·F - 1/2 F·Δα_X·F`` instead of their
        charges (Δμ from the same fit: an energy derivative, i.e. the
        *relaxed* dipole change, where difference charges carry the unrelaxed
        one). Leaves out, beyond what ``second_order`` leaves out, every
        multipole of the change above the dipole. ``<state>_first_order_eV``
        then holds ``-Δμ·F``. On the demo film the response is what S1 needs,
        while T1 follows QM better with its charges (README).
    polarization : bool
        The charged states also get Thole polarization energies
        ``P_cation_eV``, ``P_anion_eV`` (negative) and totals
        ``<state>_total_eV`` (IP/EA then include them) with ``P_converged``;
        leaves out the environment's response to its own charges, the central
        molecule's polarization beyond its QM charges and periodic images of
        the induced dipoles (module docstring; about a second per molecule).
    periodic_limit : bool
        Also give ``<state>_shift_periodic_eV``: the same sum with the full
        periodic (tinfoil Ewald) potential of all other molecules and images,
        via :func:`clusterlab.electrostatics.ewald.ewald_potential` (slow:
        seconds per frame; needs a box and a neutral cell).
    polarization_cutoff_A : float, optional
        Leave out induced dipole-dipole couplings beyond this distance
        (default: all pairs in the environment). It does not choose which
        molecules are polarized: that is ``polarizable_radius_A``.
    polarization_tol_eA : float
        Convergence threshold of the induced dipoles (e·Å).
    polarizable_radius_A : float, Å, optional
        Only environment images within this distance (the ``rule``'s
        distance, as :meth:`Film.carve`'s ``polarizable_radius``) carry
        induced dipoles; the others stay fixed charges, whose field still
        enters the neutral-state induction. Default: every image within
        ``radius_A``.
    neutral_induction : bool
        Include ``-dF_X·mu0``, the energy of the added charge in the dipoles
        induced in the neutral film (module docstring). ``False`` gives the
        response to the difference charges alone (the model before this
        option).
    polarization_scale : float
        Factor on every ``P_<state>_eV`` (default 1: none). A calibration
        against polarizable QM (:func:`fit_polarization_scale` on
        ``bench/parity_polarization.py``'s set) goes here, explicitly; the
        value is kept in the result's options and shown in its label.
    ewald_accuracy : float
        Relative accuracy of the periodic limit.
    threads : int
        Threads for the pair sums (numpy/BLAS release the GIL): over frames
        when a run has several (frames are finished in order, at most
        ``threads`` ahead), over the molecules of the frame otherwise; 1 runs
        everything in the calling thread.

    Raises
    ------
    InputError
        Bad states, options, rule, radius or environment; a set without the
        charges of a state, or without the Δα (and, for ``field_response``,
        Δμ) the options need; ``periodic_limit`` without a box.
    ChargeError
        Charges that do not fit the film's molecules, or no film charges.

    Examples
    --------
    >>> model = FilmModel(film, charge_set, radius_A=15.0, field_response=["S1"])  # doctest: +SKIP
    >>> result = model.run(frames=[0, 10])  # doctest: +SKIP
    >>> result.table.groupby("frame")["cation_shift_eV"].std()  # doctest: +SKIP
    """

    def __init__(self, film: "Film", charges: StateChargeSet, *, radius_A: float,
                 states: Sequence[str] = SHIFT_STATES, rule: str = "atom", environment: str = "film",
                 second_order: bool = False, field_response: Sequence[str] = (), polarization: bool = False,
                 periodic_limit: bool = False, polarization_cutoff_A: float | None = None,
                 polarization_tol_eA: float = 1e-6, polarizable_radius_A: float | None = None,
                 neutral_induction: bool = True, polarization_scale: float = 1.0,
                 ewald_accuracy: float = 1e-6, threads: int = 1) -> None:
        states = tuple(states) if not isinstance(states, str) else (states,)
        bad = [s for s in states if s not in SHIFT_STATES]
        if bad or not states:
            raise InputError(f"states {list(states)!r} are invalid; choose from {list(SHIFT_STATES)}.")
        if not isinstance(charges, StateChargeSet):
            raise InputError(f"charges= must be a StateChargeSet; got {type(charges).__name__}.")
        if environment not in ENVIRONMENTS:
            raise InputError(f"{environment!r} is an invalid environment. Use 'film' or 'fitted'.")
        response = [str(s) for s in ([field_response] if isinstance(field_response, str) else field_response)]
        bad = [s for s in response if s not in NEUTRAL_STATES or s not in states]
        if bad:
            raise InputError(f"field_response {bad} is invalid: it takes neutral excitations among states {states} "
                             f"({list(NEUTRAL_STATES)}).")
        self.film = film
        self.charges = charges
        self.radius_A = check_radius_A(radius_A)
        self.states = states
        self.rule = check_rule(rule)
        self.environment = environment
        self.second_order = _check_bool("second_order", second_order)
        self.field_response = tuple(s for s in states if s in response)
        self.polarization = _check_bool("polarization", polarization)
        self.periodic_limit = _check_bool("periodic_limit", periodic_limit)
        if polarization_cutoff_A is not None:
            polarization_cutoff_A = check_radius_A(polarization_cutoff_A)
        self.polarization_cutoff_A = polarization_cutoff_A
        self.polarization_tol_eA = float(polarization_tol_eA)
        self.ewald_accuracy = float(ewald_accuracy)
        if polarizable_radius_A is not None:
            polarizable_radius_A = check_radius_A(polarizable_radius_A)
            if polarizable_radius_A > self.radius_A:
                raise InputError(f"polarizable_radius_A={polarizable_radius_A!r} Å must not exceed radius_A="
                                 f"{self.radius_A:g} Å (only environment molecules can be polarized).")
        self.polarizable_radius_A = polarizable_radius_A
        self.neutral_induction = _check_bool("neutral_induction", neutral_induction)
        try:
            self.polarization_scale = float(polarization_scale)
        except (TypeError, ValueError) as exc:
            raise InputError(f"polarization_scale must be a positive number; got {polarization_scale!r}.") from exc
        if isinstance(polarization_scale, (bool, np.bool_)) or not 0 < self.polarization_scale < np.inf:
            raise InputError(f"polarization_scale must be a positive number; got {polarization_scale!r}.")
        if not (self.polarization_tol_eA > 0 and 0 < self.ewald_accuracy < 1):
            raise InputError(f"polarization_tol_eA must be positive and ewald_accuracy in (0, 1); got "
                             f"{polarization_tol_eA!r} and {ewald_accuracy!r}.")
        if isinstance(threads, (bool, np.bool_)) or not isinstance(threads, (int, np.integer)) or threads < 1:
            raise InputError(f"threads must be a positive integer; got {threads!r}.")
        self.threads = int(threads)
        if self.periodic_limit and not film.has_box:
            raise InputError("periodic_limit=True needs a film with a periodic box.")
        for res in charges.resnames:
            miss = [s for s in states if s not in charges.charges_e[res]]
            if miss:
                raise InputError(f"the charge set has no {miss} charges for {res!r}; it has {charges.states_of(res)}.")
        # neutral excitations with a second-order term: all with second_order, else those of the field response
        self._second = [s for s in states if s in NEUTRAL_STATES and (self.second_order or s in self.field_response)]
        for res in charges.resnames:
            refs = charges.conformers.get(res, [])
            miss = [s for s in self._second if not refs or any(
                s not in c.dalpha_A3 or (s in self.field_response and s not in c.dmu_D) for c in refs)]
            if miss:
                raise InputError(f"second_order / field_response needs polarizability (and, for field_response, "
                                 f"dipole) changes of {miss} for {res!r}; fit them with "
                                 "clusterlab.study.chargefits.add_field_response(charges, film, method).")
        self._pol_states = [s for s in states if s in CHARGED_STATES] if self.polarization else []
        dq, self._covered = _difference_arrays(film, charges, states)
        self._dq0 = {s: np.nan_to_num(v) for s, v in dq.items()}
        self._q_env0 = _environment_charges(film, charges, environment)
        self._alpha = atomic_polarizabilities(list(film.symbols)) if self._pol_states else None
        self._q_s0 = _fitted_s0(film, charges)
        self._pol_setup = _PolarizationSetup(self.polarization_cutoff_A, self.polarization_tol_eA,
                                             self.polarizable_radius_A, self.rule, self.neutral_induction,
                                             self.polarization_scale)
        self._names = np.asarray(film.molecule_species).astype(str)
        self._resnames = np.asarray(film.molecule_resnames).astype(str)

    # ------------------------------------------------------------ description
    @property
    def label(self) -> str:
        """Short name of the model for reports: ``charges`` or ``field`` (some
        state from its field response), ``+stark`` with ``second_order``,
        ``+polarization`` (``+polarizationx0.9`` with a ``polarization_scale``)."""
        scale = f"x{self.polarization_scale:g}" if self.polarization_scale != 1.0 else ""
        return (("field" if self.field_response else "charges") + ("+stark" if self.second_order else "")
                + (f"+polarization{scale}" if self.polarization else ""))

    @property
    def options(self) -> dict[str, Any]:
        """Every option (JSON data), with the film and the charge set's method."""
        return {"states": list(self.states), "rule": self.rule, "environment": self.environment,
                "second_order": self.second_order, "field_response": list(self.field_response),
                "polarization": self.polarization, "periodic_limit": self.periodic_limit,
                "polarization_cutoff_A": self.polarization_cutoff_A, "polarization_tol_eA": self.polarization_tol_eA,
                "polarizable_radius_A": self.polarizable_radius_A, "neutral_induction": self.neutral_induction,
                "polarization_scale": self.polarization_scale,
                "ewald_accuracy": self.ewald_accuracy, "threads": self.threads, "film_id": self.film.film_id,
                "charges_method": self.charges.method}

    def __repr__(self) -> str:
        return (f"FilmModel({self.label}, radius_A={self.radius_A:g}, states={list(self.states)}, "
                f"rule={self.rule!r}, environment={self.environment!r})")

    # --------------------------------------------------------------- one frame
    def _selection(self, molecules: Sequence[int] | None) -> _Selection:
        if molecules is None:
            return _Selection(np.arange(self.film.n_molecules), None)
        mol_sel = np.unique(self.film.select(list(molecules)))
        want = np.zeros(self.film.n_molecules, bool)
        want[mol_sel] = True
        return _Selection(mol_sel, want)

    def _frame_inputs(self, frame: int) -> _FrameInputs:
        film = self.film
        geo = film.frame_geometry(frame, periodic=film.has_box)
        if not self.charges.conformers:
            return _FrameInputs(geo, None, self._dq0, self._q_env0, self._q_s0)
        fams = frame_families(film, self.charges, geo.positions_A)
        dq = {s: v.copy() for s, v in self._dq0.items()}
        q_env = self._q_env0.copy() if self.environment == "fitted" else None
        _family_overrides(film, self.charges, fams, self.states, dq, q_env)
        q_s0 = self._q_s0.copy()
        _family_overrides(film, self.charges, fams, (), {}, q_s0)
        return _FrameInputs(geo, fams, dq, self._q_env0 if q_env is None else q_env, q_s0)

    def _potential(self, inp: _FrameInputs, sel: _Selection, threads: int) -> PotentialResult:
        film, geo = self.film, inp.geo
        return environment_potential(geo.positions_A, inp.q_env, film.index.atoms, film.index.offsets,
                                     geo.centroids_A, geo.box, self.radius_A, rule=self.rule, want=sel.want,
                                     threads=threads)

    def _columns(self, inp: _FrameInputs, env: PotentialResult, sel: _Selection) -> dict[str, np.ndarray]:
        """The table columns of one frame from its inputs and environment potential."""
        film, geo, fams, mols = self.film, inp.geo, inp.families, sel.molecules
        pot, pairs, covered = env.potential_V, env.pairs, self._covered[sel.molecules]
        col: dict[str, np.ndarray] = {
            "frame": np.full(len(mols), geo.frame), "molecule": mols, "resname": self._resnames[mols],
            "species": self._names[mols],
            "x_A": geo.centroids_A[mols, 0], "y_A": geo.centroids_A[mols, 1], "z_A": geo.centroids_A[mols, 2],
            "n_env_molecules": np.bincount(pairs.center, minlength=film.n_molecules)[mols],
        }
        if fams is not None:
            col["conformer"] = fams.family[mols]
            col["conformer_rmsd_A"] = fams.rmsd_A[mols]
        for s in self.states:
            val = np.bincount(film.molecule_of_atom, weights=inp.dq[s] * pot, minlength=film.n_molecules)[mols]
            col[f"{s}_shift_eV"] = np.where(covered, val, np.nan)
        if self._second:
            fld = uniform_field_fit(geo.positions_A, pot, film.index.atoms, film.index.offsets).field_V_A
            col["field_V_A"] = np.linalg.norm(fld, axis=1)[mols]
            for s in self._second:
                e2 = _stark_term(film, self.charges, fams, s, fld)[mols]
                first = col[f"{s}_shift_eV"]
                if s in self.field_response:
                    first = np.where(covered, _dipole_term(film, self.charges, fams, s, fld)[mols], np.nan)
                col[f"{s}_first_order_eV"] = first
                col[f"{s}_stark_eV"] = e2
                col[f"{s}_shift_eV"] = first + e2
        if self.periodic_limit:
            phi = ewald_potential(geo.positions_A, geo.positions_A, inp.q_env, geo.box,
                                  point_groups=film.molecule_of_atom, charge_groups=film.molecule_of_atom,
                                  accuracy=self.ewald_accuracy)
            for s in self.states:
                v = np.bincount(film.molecule_of_atom, weights=inp.dq[s] * phi, minlength=film.n_molecules)[mols]
                col[f"{s}_shift_periodic_eV"] = np.where(covered, v, np.nan)
        if self._pol_states:
            col.update(self._polarization_columns(inp, pairs, sel, col))
        tot = "_total_eV" if self._pol_states else "_shift_eV"
        if "cation" in self.states:
            col["IP_shift_eV"] = col[f"cation{tot}"]
        if "anion" in self.states:
            col["EA_shift_eV"] = -col[f"anion{tot}"]
        return col

    def _polarization_columns(self, inp: _FrameInputs, pairs: EnvironmentPairs, sel: _Selection,
                              col: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
        """``P_<state>_eV``, ``<state>_total_eV`` and ``P_converged`` of one frame's molecules."""
        n_mol = self.film.n_molecules
        order = np.argsort(pairs.center, kind="stable")
        bounds = np.searchsorted(pairs.center[order], np.arange(n_mol + 1))
        p_vals = {s: np.full(len(sel.molecules), np.nan) for s in self._pol_states}
        p_ok = np.ones(len(sel.molecules), bool)
        for k, mol in enumerate(sel.molecules):
            if not self._covered[mol]:
                continue
            res = _polarize(inp.geo, self.film, int(mol), pairs, order[bounds[mol]:bounds[mol + 1]],
                            {s: inp.dq[s] for s in self._pol_states}, inp.q_env, inp.q_s0, self._alpha,
                            self._pol_setup)
            for s, (e, ok) in res.items():
                p_vals[s][k] = e
                p_ok[k] &= ok
        out: dict[str, np.ndarray] = {}
        for s in self._pol_states:
            out[f"P_{s}_eV"] = p_vals[s]
            out[f"{s}_total_eV"] = col[f"{s}_shift_eV"] + p_vals[s]
        out["P_converged"] = p_ok
        return out

    def step(self, frame: int, molecules: Sequence[int] | None = None) -> pd.DataFrame:
        """The rows of one frame (``molecules``: only these; default all), in the calling thread."""
        sel = self._selection(molecules)
        inp = self._frame_inputs(self.film.check_frame(frame))
        return pd.DataFrame(self._columns(inp, self._potential(inp, sel, self.threads), sel))

    # ------------------------------------------------------------------ run
    def run(self, frames: Iterable[int] | None = None, molecules: Sequence[int] | None = None,
            progress: bool = True) -> "FilmModelResult":
        """Evaluate the model on ``frames`` (default: all) for ``molecules`` (default: all).

        Returns
        -------
        FilmModelResult
            ``table``: one row per (frame, molecule): ``frame, molecule,
            resname, species, x_A, y_A, z_A`` (centroid, primary cell),
            ``n_env_molecules`` (environment molecule images),
            ``<state>_shift_eV`` per state, ``IP_shift_eV`` / ``EA_shift_eV``
            when the ions are asked for (engine sign convention: EA =
            E(neutral) - E(anion)), with conformer references ``conformer``
            (index of the reference each copy took) and ``conformer_rmsd_A``,
            and the columns of the options (see the class docstring).

        Raises
        ------
        InputError
            ``frames`` that select no frame.
        CarvingError
            A frame or molecule id that does not exist.
        """
        film = self.film
        frame_list = list(range(film.n_frames)) if frames is None else [film.check_frame(f) for f in frames]
        if not frame_list:
            raise InputError("frames= selects no frame; give at least one frame index.")
        sel = self._selection(molecules)
        parts: list[dict[str, np.ndarray]] = []
        pool = None
        bar = progress_bar(len(frame_list), desc="site energies", enabled=progress, unit="frame")
        try:
            if self.threads > 1 and len(frame_list) > 1:
                pool = ThreadPoolExecutor(max_workers=self.threads)
            pending: deque[tuple[_FrameInputs, Any]] = deque()
            for f in frame_list:
                inp = self._frame_inputs(f)
                if pool is None:
                    parts.append(self._columns(inp, self._potential(inp, sel, self.threads), sel))
                    bar.update(1)
                    continue
                # each thread sums whole frames; frames are finished here in order, at most `threads` ahead
                pending.append((inp, pool.submit(self._potential, inp, sel, 1)))
                if len(pending) > self.threads:
                    done, fut = pending.popleft()
                    parts.append(self._columns(done, fut.result(), sel))
                    bar.update(1)
            while pending:
                done, fut = pending.popleft()
                parts.append(self._columns(done, fut.result(), sel))
                bar.update(1)
        finally:
            if pool is not None:
                pool.shutdown(wait=True, cancel_futures=True)
            bar.close()
        # one table at the end: per-frame DataFrames cost more than the pair sums of a small film
        table = pd.DataFrame({k: np.concatenate([p[k] for p in parts]) for k in parts[0]})
        if self._pol_states and not table["P_converged"].all():
            warnings.warn(f"induced dipoles did not converge for {(~table['P_converged']).sum()} molecule(s); "
                          "see the P_converged column.", stacklevel=2)
        options = {**self.options, "frames": frame_list,
                   "molecules": None if molecules is None else sel.molecules.tolist()}
        return FilmModelResult(table=table, radius_A=self.radius_A, model=self.label, options=options,
                               charges=self.charges, versions=software_versions())


# ----------------------------------------------------------------------------
# the result
# ----------------------------------------------------------------------------
@dataclass
class FilmModelResult:
    """Site-energy shifts of a film model run.

    Attributes
    ----------
    table : pandas.DataFrame
        One row per (frame, molecule) (columns: :meth:`FilmModel.run`).
    radius_A : float
        Environment radius (Å).
    model : str
        Short label for reports: ``charges``, ``charges+stark``, ``field``,
        with ``+polarization`` (:attr:`FilmModel.label`).
    options : dict
        Every option of the model (:attr:`FilmModel.options`) plus the
        ``frames`` and ``molecules`` of the run (JSON data).
    charges : StateChargeSet
        The state charges the model used (transition charges and reference
        fits included).
    versions : dict
        :func:`clusterlab.versions.software_versions` of the run.
    """

    table: pd.DataFrame
    radius_A: float
    model: str
    options: dict[str, Any]
    charges: StateChargeSet
    versions: dict[str, str] = field(default_factory=dict)

    def to_frame(self) -> pd.DataFrame:
        """A copy of the table."""
        return self.table.copy()

    def summary(self) -> dict[str, Any]:
        """Flat dict: radius, label, rows, frames, molecules, and per state the
        mean and standard deviation of its shift (and of its total with polarization)."""
        t = self.table
        out: dict[str, Any] = {"radius_A": self.radius_A, "model": self.model, "n_rows": int(len(t)),
                               "n_frames": int(t["frame"].nunique()), "n_molecules": int(t["molecule"].nunique())}
        for s in SHIFT_STATES:
            for kind in ("shift", "total"):
                c = f"{s}_{kind}_eV"
                if c in t:
                    out[f"{s}_{kind}_mean_eV"] = float(t[c].mean())
                    out[f"{s}_{kind}_std_eV"] = float(t[c].std())
        return out

    def to_json(self) -> str:
        """JSON text; :meth:`from_json` rebuilds the result exactly (table, options, charges)."""
        return json.dumps({"kind": "clusterlab.FilmModelResult", "version": 1, "radius_A": self.radius_A,
                           "model": self.model, "options": self.options,
                           "charges": json.loads(self.charges.to_json()), "versions": self.versions,
                           "table": table_to_dict(self.table)})

    @classmethod
    def from_json(cls, text: str) -> "FilmModelResult":
        """Inverse of :meth:`to_json`.

        Raises
        ------
        InputError
            Text that is not a film model result.
        """
        d = json_of_kind(text, "clusterlab.FilmModelResult", "a film model result")
        return cls(table=table_from_dict(d["table"]), radius_A=float(d["radius_A"]), model=str(d["model"]),
                   options=dict(d["options"]), charges=StateChargeSet.from_json(json.dumps(d["charges"])),
                   versions=dict(d.get("versions") or {}))


# ----------------------------------------------------------------------------
# conveniences
# ----------------------------------------------------------------------------
def film_site_energies(film: "Film", charges: StateChargeSet, *, radius_A: float,
                       states: Sequence[str] = SHIFT_STATES, frames: Iterable[int] | None = None,
                       molecules: Sequence[int] | None = None, progress: bool = True,
                       **options: Any) -> FilmModelResult:
    """Environment shifts of every molecule of every frame in one call:
    ``FilmModel(film, charges, radius_A=..., states=..., **options).run(frames, molecules, progress)``.

    Examples
    --------
    >>> result = film_site_energies(film, charge_set, radius_A=15.0)  # doctest: +SKIP
    >>> result.table.groupby("frame")["cation_shift_eV"].std()  # doctest: +SKIP
    """
    return FilmModel(film, charges, radius_A=radius_A, states=states, **options).run(frames, molecules, progress)


def run_film_model(film: "Film", method: Method, *, radius_A: float, frames: Sequence[int] | None = None,
                   polarization: bool = False, polarize_molecules: Sequence[int] | None = None,
                   reference_molecule: int = 0, charges: StateChargeSet | None = None,
                   progress: bool = True, n_conformers: int = 1, response: bool = False,
                   symmetrize: bool = False, response_states: Sequence[str] = ("S1",),
                   polarizable_radius_A: float | None = None, polarization_scale: float = 1.0,
                   store: Any = None, species: Sequence[str] | None = None,
                   workers: int | None = 1) -> FilmModelResult:
    """Fit state charges on reference copies (unless given) and evaluate the
    film-wide model for S1, T1, cation and anion of every molecule and frame.

    ``method`` (a :class:`~clusterlab.Method`) is the QM method of the
    state-charge fits (TDA for S1/T1, ΔSCF for the ions) and of the finite
    fields.

    Polarization (Thole, charged states only) costs seconds per molecule, so
    it is computed for ``polarize_molecules`` (default: all) in the first
    frame of ``frames``; other rows have NaN polarization columns. It is
    :class:`FilmModel`'s Thole term with the neutral-state induction, over the
    environment images within ``polarizable_radius_A`` (default: all within
    ``radius_A``), times ``polarization_scale`` (default 1: uncalibrated; see
    the README's parity against polarizable QM).

    ``n_conformers`` and ``symmetrize`` are passed to
    :func:`~clusterlab.study.chargefits.fit_state_charges`. ``response=True``
    also fits the dipole and polarizability changes of ``response_states``
    (default S1; T1 keeps its charges) on every reference by finite fields
    (:func:`~clusterlab.study.chargefits.add_field_response`, triplets left out
    unless T1 is asked for; 25 engine calculations per reference) and
    evaluates them as ``field_response`` (see :class:`FilmModel`): on the demo
    film this is what makes the S1 shifts follow embedded QM (README).

    The result's ``charges`` is the fitted set (transition charges included,
    for excitonic couplings). Every species of ``species`` (default: every
    species of the film, so host and guest of a doped film) gets its own
    fits: ``reference_molecule`` is the first reference of its own species,
    the first molecule of each other species that of its species.

    With a :class:`~clusterlab.store.ResultStore` as ``store``, the fitted set
    is saved in the store's metadata once the state charges are fitted and
    again after each reference's finite fields, under a key of the film and of
    every fit setting; a later call with the same settings (a study resumed
    after a crash) starts from it, so only the reference being fitted when the
    run stopped is redone (or the state-charge fits, if it stopped in those).

    ``workers`` processes fit the finite fields of the references side by side
    (default 1: in this process; None: one per core; the numbers are the same).

    Raises
    ------
    InputError
        ``method`` not a :class:`~clusterlab.Method`, or response states other
        than S1 and T1.
    """
    require_method(method, "run_film_model")
    response_states = [str(s) for s in response_states]
    bad = [s for s in response_states if s not in NEUTRAL_STATES]
    if response and (bad or not response_states):
        raise InputError(f"response_states {response_states!r} are invalid; the field response knows 'S1' and 'T1'.")
    save: Callable[[StateChargeSet], None] | None = None
    if store is not None:
        store.claim_film(film.film_id, topology=film.topology_path)
    ref_species = str(film.molecule_species[film.check_molecule(reference_molecule)])
    fitted = film.check_species(list(film.species.index) if species is None else species)
    if store is not None and charges is None:
        # a one-species fit keeps the key it had before species were fitted apart
        extra = {} if fitted == [ref_species] else {"species": fitted}
        slot = "film_model_charges:" + task_key(
            kind="film-model-charges", film_id=film.film_id, reference_molecule=int(reference_molecule),
            method=method.to_dict(), n_conformers=int(n_conformers), symmetrize=bool(symmetrize),
            response_states=response_states if response else [], **extra)
        def _save(cset: StateChargeSet) -> None:
            store.meta[slot] = cset.to_json()

        save = _save
        if slot in store.meta:
            charges = StateChargeSet.from_json(store.meta[slot])
    if charges is None:
        charges = fit_state_charges(film, method, species=fitted, molecules={ref_species: reference_molecule},
                                    n_conformers=n_conformers, symmetrize=symmetrize, progress=progress)
        if save is not None:
            save(charges)
    if response and not charges.has_response(response_states):
        stark_m = method.replace(n_singlets=max(method.n_singlets, 1) if "S1" in response_states else 0,
                                 n_triplets=max(method.n_triplets, 1) if "T1" in response_states else 0)
        charges = add_field_response(charges, film, stark_m, states=response_states, refit=False,
                                     progress=progress, on_reference=save, workers=workers)
        if save is not None:
            save(charges)
    result = FilmModel(film, charges, radius_A=radius_A, field_response=response_states if response else ()
                       ).run(frames, progress=progress)
    result.options.update({"fit_method": method.to_dict(), "reference_molecule": int(reference_molecule),
                           "fitted_species": list(charges.species),
                           "n_conformers": int(n_conformers), "symmetrize": bool(symmetrize)})
    if not polarization:
        return result
    f0 = [int(result.table.frame.min())]
    pol = FilmModel(film, charges, radius_A=radius_A, states=CHARGED_STATES, polarization=True,
                    polarizable_radius_A=polarizable_radius_A, polarization_scale=polarization_scale
                    ).run(f0, polarize_molecules, progress=progress)
    cols = [c for c in pol.table.columns if c.startswith("P_") or c.endswith("_total_eV")]
    table = result.table.merge(pol.table[["frame", "molecule", *cols]], on=["frame", "molecule"], how="left")
    options = {**result.options, "polarization": True, "polarization_frames": f0,
               "polarize_molecules": pol.options["molecules"],
               **{k: pol.options[k] for k in ("polarizable_radius_A", "neutral_induction", "polarization_scale")}}
    label = pol.model[pol.model.index("+polarization"):]
    return dataclasses.replace(result, table=table, model=result.model + label, options=options)
