"""Result dataclasses of the quantum engine, with tidy tables and an exact
JSON round-trip.

Energies are in eV unless the name says otherwise (``_Eh``: Hartree).
``nan`` marks a number that was not computed or did not converge; it is
never replaced by a normal-looking value. JSON keeps ``NaN``/``Infinity``
as Python's :mod:`json` writes them, so ``from_json(r.to_json())`` is exact.
"""

from __future__ import annotations

import dataclasses
import json
import math
from dataclasses import dataclass, field
from typing import Any

import pandas as pd

NAN = float("nan")


@dataclass
class ExcitedState:
    """One excited state of an embedded calculation.

    Attributes
    ----------
    label : str
        "S1", "S2", ..., "T1", ... (ascending energy within its spin kind).
    kind : {"singlet", "triplet"}
    energy_eV : float
        Excitation energy in the environment.
    vacuum_eV, shift_eV : float
        Same-index state in vacuum and ``energy_eV - vacuum_eV`` (nan
        without a vacuum calculation).
    osc_strength : float
    transition_dipole_D : list of 3 float, Debye
    pairs : str
        Dominant orbital pairs, e.g. ``"H->L 0.97"``.
    ct_distance_A : float
        Hole-electron centroid distance (Head-Gordon et al. 1995 densities).
    ct_lambda : float
        Peach et al. (2008) orbital-overlap diagnostic.
    vacuum_ct_distance_A : float
        ``ct_distance_A`` of the same-index state in vacuum (nan without a
        vacuum calculation, and in results written before it was kept).
    converged : bool
    followed_vacuum_state : str
        Vacuum state matched to this one by transition-density overlap.
    follow_overlap : float
    followed_shift_eV : float
        ``energy_eV`` minus the energy of the matched vacuum state.
    fixed_charges_eV, polarization_eV : float
        With a polarizable environment: the same-index state of the same
        cluster with fixed charges, and ``energy_eV - fixed_charges_eV``
        (the polarization contribution); nan otherwise.
    """

    label: str
    kind: str
    energy_eV: float
    vacuum_eV: float = NAN
    shift_eV: float = NAN
    osc_strength: float = 0.0
    transition_dipole_D: list[float] = field(default_factory=lambda: [0.0, 0.0, 0.0])
    pairs: str = ""
    ct_distance_A: float = NAN
    ct_lambda: float = NAN
    converged: bool = True
    followed_vacuum_state: str = ""
    follow_overlap: float = NAN
    followed_shift_eV: float = NAN
    fixed_charges_eV: float = NAN
    polarization_eV: float = NAN
    vacuum_ct_distance_A: float = NAN


#: Extra columns of the tables of a polarizable result.
POLARIZATION_COLUMNS = ("fixed_charges_eV", "polarization_eV")


def _prov_columns(meta: dict[str, Any]) -> dict[str, Any]:
    prov = meta.get("provenance", {})
    return {"frame": prov.get("frame", 0), "molecule": prov.get("molecule", -1),
            "radius_A": meta.get("radius_A", prov.get("radius_A", 0.0)),
            "n_charges": prov.get("n_charges", 0)}


@dataclass
class ChargedResult:
    """Cation and anion energies by ΔSCF in the embedding.

    IP = E(cation) - E(neutral), EA = E(neutral) - E(anion), both vertical
    (same geometry) and in eV; ``*_vacuum_eV`` are the same for the QM region
    alone and ``*_shift_eV`` the environment shifts. Each energy travels
    with its own converged flag; an unconverged SCF gives nan. With a
    polarizable environment (``environment="polarizable"``), ``*_fixed_eV``
    are the same cluster with fixed charges and ``*_polarization_eV`` the
    polarization contribution: ``IP_polarization_eV = IP - IP_fixed`` is
    -P+ and ``EA_polarization_eV = EA - EA_fixed`` is +P- in the solid-state
    convention (IP_solid = IP_gas - P+, EA_solid = EA_gas + P-).
    """

    neutral_Eh: float
    cation_Eh: float
    anion_Eh: float
    IP_eV: float
    EA_eV: float
    vacuum_neutral_Eh: float = NAN
    vacuum_cation_Eh: float = NAN
    vacuum_anion_Eh: float = NAN
    IP_vacuum_eV: float = NAN
    EA_vacuum_eV: float = NAN
    IP_shift_eV: float = NAN
    EA_shift_eV: float = NAN
    koopmans_IP_eV: float = NAN
    converged_flags: dict[str, bool] = field(default_factory=dict)
    meta: dict[str, Any] = field(default_factory=dict)
    environment: str = "charges"
    IP_fixed_eV: float = NAN
    EA_fixed_eV: float = NAN
    IP_polarization_eV: float = NAN
    EA_polarization_eV: float = NAN

    @property
    def converged(self) -> bool:
        return bool(self.converged_flags) and all(self.converged_flags.values())

    def summary(self) -> dict[str, float | bool]:
        out: dict[str, float | bool] = {
            "IP_eV": self.IP_eV, "IP_vacuum_eV": self.IP_vacuum_eV, "IP_shift_eV": self.IP_shift_eV,
            "EA_eV": self.EA_eV, "EA_vacuum_eV": self.EA_vacuum_eV, "EA_shift_eV": self.EA_shift_eV}
        if self.environment == "polarizable":
            out.update({"IP_fixed_eV": self.IP_fixed_eV, "IP_polarization_eV": self.IP_polarization_eV,
                        "EA_fixed_eV": self.EA_fixed_eV, "EA_polarization_eV": self.EA_polarization_eV})
        out["converged"] = self.converged
        return out

    def to_frame(self) -> pd.DataFrame:
        """Two rows (state "IP" and "EA") with the study-table columns."""
        base = _prov_columns(self.meta)
        rows = []
        for name in ("IP", "EA"):
            keys = ("neutral", "cation") if name == "IP" else ("neutral", "anion")
            row = {**base, "state": name, "energy_eV": getattr(self, f"{name}_eV"),
                   "vacuum_eV": getattr(self, f"{name}_vacuum_eV"),
                   "shift_eV": getattr(self, f"{name}_shift_eV"), "osc_strength": 0.0,
                   "converged": all(self.converged_flags.get(k, False) for k in keys)}
            if self.environment == "polarizable":
                row.update(fixed_charges_eV=getattr(self, f"{name}_fixed_eV"),
                           polarization_eV=getattr(self, f"{name}_polarization_eV"))
            rows.append(row)
        return pd.DataFrame(rows)

    def to_dict(self) -> dict[str, Any]:
        return dataclasses.asdict(self)

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), sort_keys=True)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> "ChargedResult":
        return cls(**data)

    @classmethod
    def from_json(cls, text: str) -> "ChargedResult":
        return cls.from_dict(json.loads(text))


@dataclass
class ExcitationResult:
    """Excited states of one embedded cluster, with vacuum reference,
    state following, optional charged states and metadata.

    Attributes
    ----------
    states : list of ExcitedState
        Singlets then triplets, ascending in each kind.
    scf_energy_Eh, vacuum_scf_energy_Eh : float
        Ground-state total energies (nan if not converged / not computed).
    scf_converged, vacuum_scf_converged : bool
    scf_route, vacuum_scf_route : str
        Which SCF attempt converged: "diis", "fresh-guess" (DIIS again from
        PySCF's atomic guess after the given guess failed), "level-shift",
        "newton" or "failed".
    ground_dipole_D, vacuum_dipole_D : list of 3 float
        Ground-state dipole moment (Debye; QM nuclei and electrons, origin at
        the QM centre of nuclear charge).
    net_env_charge_e : float
        Sum of the environment charges; ``neutral_embedding`` is False when
        its magnitude exceeds 1e-4 e (``NEUTRAL_TOL_E``) (a warning is also issued).
    followed_index : int
        Index into the singlets of the state best matching vacuum S1 (-1 if
        no following was done).
    charged : ChargedResult or None
    radius_A : float
        Cut radius of the cluster (``inf`` for periodic embedding).
    periodic : bool
    warnings : list of str
    meta : dict
        ``method`` (dict), ``method_key``, ``versions``, ``provenance``,
        ``timings_s`` (per step), ``model`` details (``polarizable``: the
        induced-dipole model and solver settings).
    environment : {"charges", "polarizable"}
        The environment model of the method.
    polarizable_radius_A : float
        Inner (polarizable) radius of the cluster (0: none).
    n_polarizable : int
        Environment atoms that carried an induced dipole.

    Notes
    -----
    ``dm`` (ground-state density matrix, AO basis) and ``warm_start`` (a
    :class:`~clusterlab.qm.calc.WarmStart`: orbitals and amplitudes for warm
    starts and the vacuum calculation) are kept in memory only; they are not written to JSON.
    """

    states: list[ExcitedState]
    scf_energy_Eh: float
    scf_converged: bool
    scf_route: str = "diis"
    vacuum_scf_energy_Eh: float = NAN
    vacuum_scf_converged: bool = True
    vacuum_scf_route: str = ""
    ground_dipole_D: list[float] = field(default_factory=lambda: [NAN, NAN, NAN])
    vacuum_dipole_D: list[float] = field(default_factory=lambda: [NAN, NAN, NAN])
    net_env_charge_e: float = 0.0
    neutral_embedding: bool = True
    followed_index: int = -1
    charged: ChargedResult | None = None
    radius_A: float = 0.0
    periodic: bool = False
    warnings: list[str] = field(default_factory=list)
    meta: dict[str, Any] = field(default_factory=dict)
    environment: str = "charges"
    polarizable_radius_A: float = 0.0
    n_polarizable: int = 0
    dm: Any = field(default=None, repr=False, compare=False)
    #: :class:`~clusterlab.qm.calc.WarmStart` built by the engine (in memory only)
    warm_start: Any = field(default=None, repr=False, compare=False)

    # --------------------------------------------------------- accessors
    def _kind(self, kind: str) -> list[ExcitedState]:
        return [s for s in self.states if s.kind == kind]

    @property
    def singlets(self) -> list[ExcitedState]:
        return self._kind("singlet")

    @property
    def triplets(self) -> list[ExcitedState]:
        return self._kind("triplet")

    @property
    def s1(self) -> ExcitedState | None:
        """Lowest singlet in the environment (adiabatic S1)."""
        s = self.singlets
        return s[0] if s else None

    @property
    def t1(self) -> ExcitedState | None:
        t = self.triplets
        return t[0] if t else None

    @property
    def followed_s1(self) -> ExcitedState | None:
        """The embedded singlet whose transition density best overlaps
        vacuum S1."""
        s = self.singlets
        return s[self.followed_index] if 0 <= self.followed_index < len(s) else None

    @property
    def delta_est_eV(self) -> float:
        """E(S1) - E(T1) in the environment (nan if either is missing)."""
        return (self.s1.energy_eV - self.t1.energy_eV) if (self.s1 and self.t1) else NAN

    @property
    def converged(self) -> bool:
        """SCF (embedded and vacuum), every state and the charged states."""
        ok = self.scf_converged and self.vacuum_scf_converged and all(s.converged for s in self.states)
        if self.charged is not None:
            ok = ok and self.charged.converged
        return bool(ok)

    def state(self, label: str) -> ExcitedState:
        for s in self.states:
            if s.label == label:
                return s
        raise KeyError(f"No state {label!r}; states are {[s.label for s in self.states]}.")

    # ----------------------------------------------------------- outputs
    def summary(self) -> dict[str, float | bool]:
        """Flat numbers for a study table (nan where not available)."""
        s1, t1, fs1 = self.s1, self.t1, self.followed_s1
        g = lambda st, a: getattr(st, a) if st is not None else NAN  # noqa: E731
        out: dict[str, float | bool] = {
            "S1_eV": g(s1, "energy_eV"), "S1_vacuum_eV": g(s1, "vacuum_eV"),
            "S1_shift_eV": g(s1, "shift_eV"), "S1_osc": g(s1, "osc_strength"),
            "T1_eV": g(t1, "energy_eV"), "T1_vacuum_eV": g(t1, "vacuum_eV"),
            "T1_shift_eV": g(t1, "shift_eV"),
            "dEST_eV": self.delta_est_eV,
            "dEST_vacuum_eV": (s1.vacuum_eV - t1.vacuum_eV) if (s1 and t1) else NAN,
            "S1_ct_distance_A": g(s1, "ct_distance_A"), "S1_vacuum_ct_distance_A": g(s1, "vacuum_ct_distance_A"),
            "T1_ct_distance_A": g(t1, "ct_distance_A"), "T1_vacuum_ct_distance_A": g(t1, "vacuum_ct_distance_A"),
            "S1_followed_eV": g(fs1, "energy_eV"), "S1_followed_shift_eV": g(fs1, "followed_shift_eV"),
            "S1_follow_overlap": g(fs1, "follow_overlap"),
            "scf_energy_Eh": self.scf_energy_Eh,
            "converged": self.converged,
        }
        if self.environment == "polarizable":
            out.update({"polarizable_radius_A": self.polarizable_radius_A, "n_polarizable": self.n_polarizable,
                        "S1_fixed_eV": g(s1, "fixed_charges_eV"), "S1_polarization_eV": g(s1, "polarization_eV"),
                        "T1_fixed_eV": g(t1, "fixed_charges_eV"), "T1_polarization_eV": g(t1, "polarization_eV")})
        if self.charged is not None:
            ch = self.charged.summary()
            ch.pop("converged")
            out.update(ch)
        return out

    def to_frame(self) -> pd.DataFrame:
        """One row per state (plus "IP"/"EA" rows when charged states were
        computed), with provenance columns ``frame, molecule, radius_A,
        n_charges``."""
        base = _prov_columns(self.meta)
        base["radius_A"] = self.radius_A
        if self.environment == "polarizable":
            base["polarizable_radius_A"] = self.polarizable_radius_A
        rows = []
        for s in self.states:
            d = dataclasses.asdict(s)
            mu = d.pop("transition_dipole_D")
            d["state"] = d.pop("label")
            rows.append({**base, **d, "mu_x_D": mu[0], "mu_y_D": mu[1], "mu_z_D": mu[2]})
        cols = ["frame", "molecule", "radius_A", "n_charges", "state", "kind", "energy_eV", "vacuum_eV",
                "shift_eV", "osc_strength", "converged", "followed_vacuum_state", "follow_overlap",
                "followed_shift_eV", "ct_distance_A", "vacuum_ct_distance_A", "ct_lambda", "pairs", "mu_x_D", "mu_y_D", "mu_z_D"]
        if self.environment == "polarizable":
            cols += list(POLARIZATION_COLUMNS)
            cols.insert(cols.index("radius_A") + 1, "polarizable_radius_A")
        frame = pd.DataFrame(rows, columns=cols)
        if self.charged is not None:
            ch = self.charged.to_frame()
            ch["radius_A"] = self.radius_A
            if self.environment == "polarizable":
                ch["polarizable_radius_A"] = self.polarizable_radius_A
            ch["kind"] = "charged"
            frame = pd.concat([frame, ch.reindex(columns=cols)], ignore_index=True) if len(frame) else ch.reindex(columns=cols)
        return frame

    def to_dict(self) -> dict[str, Any]:
        d = {f.name: getattr(self, f.name) for f in dataclasses.fields(self) if f.name not in ("dm", "warm_start")}
        d["states"] = [dataclasses.asdict(s) for s in self.states]
        d["charged"] = None if self.charged is None else self.charged.to_dict()
        return d

    def to_json(self) -> str:
        """JSON text (the density matrix and work arrays are left out)."""
        return json.dumps(self.to_dict(), sort_keys=True)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> "ExcitationResult":
        data = dict(data)
        data["states"] = [ExcitedState(**s) for s in data.get("states", [])]
        if data.get("charged") is not None:
            data["charged"] = ChargedResult.from_dict(data["charged"])
        return cls(**data)

    @classmethod
    def from_json(cls, text: str) -> "ExcitationResult":
        return cls.from_dict(json.loads(text))

    def __repr__(self) -> str:
        s1 = self.s1
        txt = f"S1 {s1.energy_eV:.3f} eV (shift {s1.shift_eV:+.3f})" if s1 else "no singlets"
        r = "inf" if math.isinf(self.radius_A) else f"{self.radius_A:g}"
        return (f"<ExcitationResult radius={r} Å {txt}, {len(self.states)} states, "
                f"converged={self.converged}>")
