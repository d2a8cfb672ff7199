"""The :class:`Method`: everything that defines a quantum calculation.

A method is written once, hashed stably (:meth:`Method.key`) and attached to
every result, so results can be cached and compared. Named starting points
come from :meth:`Method.preset`.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import numbers
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import InputError

#: Valid values of :attr:`Method.excited`.
EXCITED_MODELS = ("tda", "tddft", "stda", "stda-refined")

#: Valid values of :attr:`Method.environment`: fixed point charges, or the
#: charges plus induced dipoles on the polarizable molecules of the cluster
#: (those inside its polarizable radius; see :mod:`clusterlab.qm.induction`).
ENVIRONMENTS = ("charges", "polarizable")

#: Fields added after method keys were first stored, with their defaults: they
#: enter :meth:`Method.key` only when they differ from these, so that the keys
#: of every method written before them stay the same.
_KEY_OMITS_DEFAULTS = {"environment": "charges", "polarization_reference": True, "response_kernel": "ao",
                       "orbital_window_Eh": None}

#: Valid values of :attr:`Method.response_kernel`.
RESPONSE_KERNELS = ("ao", "mo")

#: Default Gaussian width (Å) of the environment charges. A Gaussian charge
#: exp(-r^2/w^2) differs from a point charge in its potential by
#: q erfc(r/w)/r; for w = 1.0 Å that is below 0.2 % at 2.2 Å (the shortest
#: intermolecular H...H contacts in organic solids) and below 1e-5 at 3 Å,
#: so the field at the QM nuclei is unchanged, while the 1/r singularity the
#: tail of the QM electron density would otherwise fall into (over-
#: polarisation by bare charges, "electron spill-out") is removed. This is
#: common practice in electrostatic embedding; 0 gives bare point charges.
DEFAULT_SMEARING_A = 1.0

_PRESETS: dict[str, tuple[str, dict[str, Any]]] = {
    "draft": (
        "B3LYP/6-31G, density fitting, coarse grids, TDA 3+3 states: tests and quick looks",
        dict(xc="b3lyp", basis="6-31g", density_fit=True, grid_level=2, response_grid_level=1,
             n_singlets=3, n_triplets=3, excited="tda"),
    ),
    "balanced": (
        "B3LYP/def2-SVP, density fitting, SCF grid 3 / response grid 1, TDA 5+5 states: standard",
        dict(xc="b3lyp", basis="def2-svp", density_fit=True, grid_level=3, response_grid_level=1,
             n_singlets=5, n_triplets=5, excited="tda"),
    ),
    "ct-rsh": (
        "CAM-B3LYP/def2-SVP (range-separated hybrid), density fitting, TDA 5+5: charge-transfer states",
        dict(xc="camb3lyp", basis="def2-svp", density_fit=True, grid_level=3, response_grid_level=1,
             n_singlets=5, n_triplets=5, excited="tda"),
    ),
    "fast-stda": (
        "B3LYP/6-31G, density fitting, grid 1, sTDA 3+3 states: large samples and notebooks "
        "(S1 within ~0.2 eV of full TDA; sTDA triplets are ~1 eV too high: use fast-refined for T1/ΔEST)",
        dict(xc="b3lyp", basis="6-31g", density_fit=True, grid_level=1, response_grid_level=1,
             n_singlets=3, n_triplets=3, excited="stda"),
    ),
    "fast-refined": (
        "B3LYP/6-31G, density fitting, grid 1, sTDA refined by two full-TDA subspace steps, 3+3 states: "
        "S1, T1 and ΔEST within ~0.01 eV of full TDA at a fraction of its cost",
        dict(xc="b3lyp", basis="6-31g", density_fit=True, grid_level=1, response_grid_level=1,
             n_singlets=3, n_triplets=3, excited="stda-refined"),
    ),
    "fast-large": (
        "fast-refined for large molecules (50-100 atoms): the same B3LYP/6-31G states, the TDA operator "
        "in the MO basis on orbitals within 1 Eh of the gap, SCF and response on PySCF's grid level 0, "
        "SCF converged to 1e-7 Eh (S1/T1 shifts within ~1 meV of grid 1, 1e-9 Eh and the full space)",
        # measured on the doped film's emitter (README, large-site row): grid 0 moved the S1/T1 shifts by
        # 0.3 meV, the response grid 0 by < 0.1 meV, 1e-7 Eh by 0.05 meV; tests/test_shared_integrals.py
        # holds a small molecule to 1 meV
        dict(xc="b3lyp", basis="6-31g", density_fit=True, grid_level=0, response_grid_level=0, conv_tol=1e-7,
             n_singlets=3, n_triplets=3, excited="stda-refined", response_kernel="mo", orbital_window_Eh=1.0),
    ),
    "site-energy": (
        "B3LYP/def2-SVP ground state plus cation/anion by ΔSCF, no excited states: IP/EA site energies",
        dict(xc="b3lyp", basis="def2-svp", density_fit=True, grid_level=3, response_grid_level=None,
             n_singlets=0, n_triplets=0, excited="tda", charged_states=True),
    ),
}


def _as_int(name: str, v: Any, what: str) -> int:
    """``v`` as an int, or an InputError naming the field (bools, NaN, text and
    fractions are refused)."""
    ok = isinstance(v, numbers.Real) and not isinstance(v, (bool, np.bool_))
    if ok:
        try:
            ok = float(v) == int(v)
        except (ValueError, OverflowError):  # nan, inf
            ok = False
    if not ok:
        raise InputError(f"{name}={v!r} must be {what}.")
    return int(v)


def _as_float(name: str, v: Any, what: str) -> float:
    if isinstance(v, (bool, np.bool_)) or not isinstance(v, numbers.Real):
        raise InputError(f"{name}={v!r} must be {what}.")
    return float(v)


@dataclass(frozen=True)
class Method:
    """A quantum-chemistry method for embedded-cluster calculations.

    Parameters
    ----------
    xc : str
        Exchange-correlation functional as PySCF spells it ("b3lyp",
        "camb3lyp", "pbe0", ...), or "hf" for Hartree-Fock/CIS.
    basis : str
        Basis set name as PySCF spells it ("sto-3g", "6-31g", "def2-svp").
    density_fit : bool
        Density fitting of the Coulomb/exchange integrals (SCF and response).
    grid_level : int
        PySCF integration-grid level (0-9) of the SCF.
    response_grid_level : int or None
        Grid level for the exchange-correlation kernel of the response step
        (TDA/TDDFT); None uses the SCF grid. The kernel is smooth, so a
        coarser grid costs little accuracy (see ``bench/``).
    n_singlets, n_triplets : int
        Number of excited states of each spin kind (0 allowed).
    excited : {"tda", "tddft", "stda", "stda-refined"}
        Response model: Tamm-Dancoff, full linear response, the
        simplified TDA of :mod:`clusterlab.qm.stda` (published sTDA), or
        "stda-refined": the sTDA states refined by two subspace iterations
        with the full TDA operator (Rayleigh-Ritz in the span of the sTDA
        vectors, then one Davidson correction step); close to full TDA for
        singlets *and* triplets at a fraction of its cost (README).
    charged_states : bool
        Also compute the cation and anion by ΔSCF (IP/EA site energies).
    charge_smearing_A : float
        Gaussian width w (Å) of each environment charge, rho ~ exp(-r^2/w^2)
        (PySCF's ``radii``); 0 means bare point charges. Default
        :data:`DEFAULT_SMEARING_A` (1.0 Å, see its note for the reason).
    conv_tol : float
        SCF energy convergence threshold (Hartree).
    max_cycle : int
        SCF iteration limit of each attempt.
    min_charge_distance_A : float
        A point charge closer than this to a QM atom raises
        :class:`~clusterlab.errors.GeometryError`.
    threads : int or None
        OpenMP threads for PySCF (None: leave PySCF's setting).
    response_conv_tol : float
        Residual threshold of the Davidson solver.
    environment : {"charges", "polarizable"}
        What the environment is: fixed point charges (default), or the
        charges plus isotropic atomic polarizabilities (van Duijnen-Swart
        Thole set) on the molecules inside the cluster's polarizable radius,
        their induced dipoles solved self-consistently with the QM density
        in the SCF, in the ΔSCF ions and, for singlets, in the response to
        the transition density (TDA/TDDFT; the sTDA models see them through
        the orbitals only). Charges beyond that radius stay fixed.
    polarization_reference : bool
        With ``environment="polarizable"``, also compute the same cluster
        with fixed charges in the same call, giving the polarization
        contribution (polarizable minus fixed) of every state; its density
        and response vectors start the polarizable calculation.
    response_kernel : {"ao", "mo"}
        How the TDA operator (full TDA and the refined model) is applied:
        "ao" is PySCF's AO-basis route; "mo" is clusterlab's MO-basis
        density-fitted operator (:mod:`clusterlab.qm.mokernel`: the same
        matrix, several times cheaper for large molecules; needs
        ``density_fit``). Where "mo" does not apply (range-separated or
        meta-GGA functionals, full TDDFT) PySCF's route runs and the result
        says so (``extra["kernel"]``).
    orbital_window_Eh : float or None
        With ``response_kernel="mo"``: the response sees only occupied
        orbitals within this energy (Hartree) of the HOMO and virtual ones
        within it of the LUMO (None: all orbitals). Its error on S1/T1 and
        their shifts is measured in the tests and ``bench/bench_large_site.py``.

    Examples
    --------
    >>> m = Method.preset("draft").replace(n_singlets=2)
    >>> m.n_singlets
    2
    >>> len(m.key())
    64
    """

    xc: str = "b3lyp"
    basis: str = "def2-svp"
    density_fit: bool = True
    grid_level: int = 3
    response_grid_level: int | None = 1
    n_singlets: int = 5
    n_triplets: int = 5
    excited: str = "tda"
    charged_states: bool = False
    charge_smearing_A: float = DEFAULT_SMEARING_A
    conv_tol: float = 1e-9
    max_cycle: int = 100
    min_charge_distance_A: float = 0.8
    threads: int | None = None
    response_conv_tol: float = 1e-5
    environment: str = "charges"
    polarization_reference: bool = True
    response_kernel: str = "ao"
    orbital_window_Eh: float | None = None

    def __post_init__(self) -> None:
        set_ = object.__setattr__
        if not isinstance(self.xc, str) or not self.xc.strip():
            raise InputError(f"xc={self.xc!r} is not a functional name; use e.g. 'b3lyp', 'camb3lyp' or 'hf'.")
        if not isinstance(self.basis, str) or not self.basis.strip():
            raise InputError(f"basis={self.basis!r} is not a basis name; use e.g. 'sto-3g', '6-31g' or 'def2-svp'.")
        set_(self, "xc", self.xc.strip().lower())
        set_(self, "basis", self.basis.strip().lower())
        excited = str(self.excited).strip().lower()
        if excited not in EXCITED_MODELS:
            raise InputError(
                f"excited={self.excited!r} is not a response model. Use one of {', '.join(map(repr, EXCITED_MODELS))}."
            )
        set_(self, "excited", excited)
        env = str(self.environment).strip().lower()
        if env not in ENVIRONMENTS:
            raise InputError(f"environment={self.environment!r} is not an environment model. Use one of "
                             f"{', '.join(map(repr, ENVIRONMENTS))}.")
        set_(self, "environment", env)
        for name in ("n_singlets", "n_triplets"):
            v = getattr(self, name)
            what = "a non-negative integer number of states"
            if _as_int(name, v, what) < 0:
                raise InputError(f"{name}={v!r} must be {what}.")
            set_(self, name, int(v))
        for name in ("grid_level", "response_grid_level"):
            v = getattr(self, name)
            if v is None and name == "response_grid_level":
                continue
            what = ("an integer PySCF grid level from 0 to 9"
                    + (" (or None for the SCF grid)" if name == "response_grid_level" else ""))
            if not 0 <= _as_int(name, v, what) <= 9:
                raise InputError(f"{name}={v!r} must be {what}.")
            set_(self, name, int(v))
        for name in ("density_fit", "charged_states", "polarization_reference"):
            v = getattr(self, name)
            if not isinstance(v, bool):
                raise InputError(f"{name}={v!r} must be True or False.")
        for name, positive in (("charge_smearing_A", False), ("conv_tol", True),
                               ("min_charge_distance_A", False), ("response_conv_tol", True)):
            what = f"a finite {'positive' if positive else 'non-negative'} number"
            v = _as_float(name, getattr(self, name), what)
            if not v == v or v < 0 or (positive and v == 0) or v == float("inf"):
                raise InputError(f"{name}={getattr(self, name)!r} must be a finite "
                                 f"{'positive' if positive else 'non-negative'} number.")
            set_(self, name, v)
        kern = str(self.response_kernel).strip().lower()
        if kern not in RESPONSE_KERNELS:
            raise InputError(f"response_kernel={self.response_kernel!r} is not a response kernel. Use one of "
                             f"{', '.join(map(repr, RESPONSE_KERNELS))}.")
        set_(self, "response_kernel", kern)
        if kern == "mo" and not self.density_fit:
            raise InputError("response_kernel='mo' needs density_fit=True (it contracts the fitted integrals).")
        if self.orbital_window_Eh is not None:
            w = _as_float("orbital_window_Eh", self.orbital_window_Eh, "a positive number of Hartree or None")
            if not (w > 0 and w != float("inf")):
                raise InputError(f"orbital_window_Eh={self.orbital_window_Eh!r} must be a positive number of "
                                 "Hartree or None (all orbitals).")
            if kern != "mo":
                raise InputError("orbital_window_Eh applies to response_kernel='mo' only; set both or neither.")
            set_(self, "orbital_window_Eh", w)
        if _as_int("max_cycle", self.max_cycle, "a positive integer") < 1:
            raise InputError(f"max_cycle={self.max_cycle!r} must be a positive integer.")
        set_(self, "max_cycle", int(self.max_cycle))
        if self.threads is not None:
            if _as_int("threads", self.threads, "a positive integer or None") < 1:
                raise InputError(f"threads={self.threads!r} must be a positive integer or None.")
            set_(self, "threads", int(self.threads))

    # ------------------------------------------------------------ presets
    @classmethod
    def preset(cls, name: str, **overrides: Any) -> "Method":
        """A named starting point, optionally with fields overridden.

        Raises
        ------
        InputError
            If ``name`` is not a preset (the message lists them).
        """
        key = str(name).strip().lower()
        if key not in _PRESETS:
            raise InputError(f"{name!r} is not a method preset. Use one of {', '.join(map(repr, _PRESETS))}.")
        fields = dict(_PRESETS[key][1])
        names = {f.name for f in dataclasses.fields(cls)}
        unknown = sorted(set(overrides) - names)
        if unknown:
            raise InputError(f"Unknown Method field(s) {unknown} in Method.preset({name!r}, ...); valid fields are "
                             f"{sorted(names)}.")
        fields.update(overrides)
        return cls(**fields)

    @staticmethod
    def presets() -> dict[str, str]:
        """Preset names with a one-line description each."""
        return {k: v[0] for k, v in _PRESETS.items()}

    # ----------------------------------------------------------- identity
    def to_dict(self) -> dict[str, Any]:
        """All fields as a JSON-friendly dict."""
        return dataclasses.asdict(self)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> "Method":
        """Inverse of :meth:`to_dict`; unknown keys raise :class:`InputError`."""
        if not isinstance(data, dict):
            raise InputError(f"Method.from_dict needs a dict of fields; got {type(data).__name__} ({data!r:.80}).")
        names = {f.name for f in dataclasses.fields(cls)}
        unknown = sorted(set(data) - names)
        if unknown:
            raise InputError(f"Unknown Method field(s) {unknown}; valid fields are {sorted(names)}.")
        return cls(**data)

    def replace(self, **changes: Any) -> "Method":
        """A copy with some fields changed (validated again)."""
        names = {f.name for f in dataclasses.fields(self)}
        unknown = sorted(set(changes) - names)
        if unknown:
            raise InputError(f"Unknown Method field(s) {unknown}; valid fields are {sorted(names)}.")
        return dataclasses.replace(self, **changes)

    def canonical_json(self) -> str:
        """Canonical JSON of the fields (sorted keys, floats by repr); the
        later fields of ``_KEY_OMITS_DEFAULTS`` only when not at their default."""
        d = self.to_dict()
        for name, default in _KEY_OMITS_DEFAULTS.items():
            if d[name] == default:
                del d[name]
        return json.dumps(d, sort_keys=True, separators=(",", ":"))

    @property
    def is_polarizable(self) -> bool:
        """The environment carries induced dipoles."""
        return self.environment == "polarizable"

    def key(self) -> str:
        """SHA-256 hex digest of :meth:`canonical_json`: stable across
        processes, machines and Python versions (unlike ``hash()``)."""
        return hashlib.sha256(self.canonical_json().encode("utf-8")).hexdigest()

    @property
    def is_hf(self) -> bool:
        return self.xc in ("hf", "rhf", "uhf")

    def describe(self) -> str:
        """One-line human summary, logged once at the start of a run."""
        grid = "" if self.is_hf else f", grid {self.grid_level}/{self.response_grid_level or self.grid_level}"
        return (f"{self.xc.upper()}/{self.basis}{' +DF' if self.density_fit else ''}{grid}, "
                f"{self.excited.upper()} {self.n_singlets}S+{self.n_triplets}T"
                f"{', ΔSCF IP/EA' if self.charged_states else ''}, charge width {self.charge_smearing_A:g} Å"
                f"{', polarizable environment' if self.is_polarizable else ''}"
                f"{', MO-basis response' if self.response_kernel == 'mo' else ''}"
                f"{f' on a {self.orbital_window_Eh:g} Eh orbital window' if self.orbital_window_Eh else ''}")


def require_method(method: Any, who: str) -> "Method":
    """``method`` after checking it is a :class:`Method`: the one check every
    calculation entry point makes (a Method is the only source of QM settings).

    Raises
    ------
    InputError
        Anything else (an ``"xc/basis"`` string included), named with its type.

    Examples
    --------
    >>> require_method("b3lyp/6-31g", "state_charges")  # doctest: +IGNORE_EXCEPTION_DETAIL
    Traceback (most recent call last):
    InputError: state_charges needs a clusterlab.Method ...; got str ('b3lyp/6-31g').
    """
    if not isinstance(method, Method):
        text = repr(method)
        text = text if len(text) <= 80 else text[:77] + "..."
        raise InputError(f"{who} needs a clusterlab.Method (the only source of its QM settings); got "
                         f"{type(method).__name__} ({text}). Use e.g. Method.preset('fast-refined') or "
                         "Method(xc='b3lyp', basis='6-31g').")
    return method


#: What works instead of a periodic embedding with induced dipoles (the one wording of the refusal).
PERIODIC_POLARIZABLE_ALTERNATIVE = (
    "the Ewald sum makes the fixed charges periodic, but the induced dipoles are solved in one finite cluster "
    "and are not periodic. Compute the polarization in a finite two-layer cluster (Film.carve(..., "
    "polarizable_radius=), radius_scan(..., polarizable_radii=)) and the periodic limit with the same method "
    "and fixed charges (method.replace(environment='charges'))")


def check_periodic_environment(method: "Method", where: str) -> None:
    """Refuse a periodic (Ewald) embedding for a method with induced dipoles.

    Parameters
    ----------
    method : Method
    where : str
        The periodic option or call being refused, named in the message
        (e.g. ``"radius_scan(periodic_limit=True)"``).

    Raises
    ------
    InputError
        When ``method.environment == "polarizable"``: the message names both
        options and what to use instead.

    Examples
    --------
    >>> check_periodic_environment(Method(environment="polarizable"), "periodic_excitations")
    ... # doctest: +IGNORE_EXCEPTION_DETAIL
    Traceback (most recent call last):
    InputError: periodic_excitations (a periodic Ewald embedding) cannot be combined with ...
    """
    if method.is_polarizable:
        raise InputError(f"{where} (a periodic Ewald embedding) cannot be combined with "
                         f"environment='polarizable': {PERIODIC_POLARIZABLE_ALTERNATIVE}.")
