"""What a doped host:guest film asks of its site energies.

Four analyses over site tables that carry a ``species`` column (one row per
molecule and frame: a :class:`~clusterlab.study.sample.SiteSample`, its
``table``, :func:`~clusterlab.study.sample.site_table`, or the transport
export's :func:`~clusterlab.export.sites.site_table`, which covers every
molecule):

1. :func:`species_energies`: per-species distributions of S1, T1, ΔEST, IP
   and EA, and the host-guest trap depths of holes and electrons.
2. :func:`triplet_confinement`: whether a guest's T1 lies below the T1 of
   every host neighbour.
3. :func:`dest_torsion`: ΔEST and the hole-electron distance against a
   donor-acceptor torsion, and the part of the ΔEST spread the torsion explains.
4. :func:`state_order`: sites whose lowest singlet or triplet changes
   character (charge transfer or local) between vacuum and the embedding.

Sign conventions (as the engine reports, see :class:`~clusterlab.qm.results.ChargedResult`
and the README's "Units and sign conventions"): ``IP_eV = E(cation) - E(neutral)``
and ``EA_eV = E(neutral) - E(anion)``, both positive for an ordinary organic
semiconductor. A hole sits at energy +IP and an electron at -EA, each
preferring the lower, so

* hole trap depth = IP_host - IP_guest (positive: the guest traps holes),
* electron trap depth = EA_guest - EA_host (positive: the guest traps electrons).

Model notes: every number inherits the embedding model of the site energies
(fixed point charges unless the method is polarizable); trap depths are
vertical (no relaxation of the ion), and the confinement test compares
vertical T1 energies of neighbours, not transfer rates.
"""

from __future__ import annotations

import dataclasses
import json
import os
from dataclasses import dataclass, field
from typing import Any, ClassVar, Mapping, Sequence

import numpy as np
import pandas as pd

from ..errors import InputError
from ..film import Film
from ..geometry import dihedral_deg, half_box_width_A
from ..qm.results import ExcitationResult
from ..stats import conformational_environmental, fourier_basis, grouped_disorder_stats, mean_offset, periodic_fit
from ..store import ResultStore
from .filmmodel import FilmModelResult
from .jsonio import json_of_kind, table_from_dict, table_to_dict
from .sample import SiteSample, site_table

__all__ = [
    "SPECIES_QUANTITIES", "CT_DISTANCE_THRESHOLD_A", "SpeciesEnergies", "species_energies",
    "ConfinementResult", "triplet_confinement", "torsion_table", "TorsionResult", "dest_torsion",
    "state_table", "StateOrderResult", "state_order", "n_species", "MissingNeighboursError",
    "HostGuestOverview", "host_guest_overview", "torsion_atom_indices",
]

#: site-energy columns :func:`species_energies` describes (those present are used)
SPECIES_QUANTITIES = ("S1_eV", "T1_eV", "dEST_eV", "IP_eV", "EA_eV")

#: Hole-electron centroid distance (Å) above which a state counts as charge
#: transfer. Common practice, not a published constant of this measure: local
#: excitations of organic chromophores give well under 1 Å (see
#: :mod:`clusterlab.qm.ct`), donor-acceptor charge transfer several Å; 2 Å is
#: the cut commonly drawn for related centroid-distance indices. Pass your own
#: ``threshold_A`` where the molecule's two ends are closer.
CT_DISTANCE_THRESHOLD_A = 2.0


# ---------------------------------------------------------------------------
# shared helpers
# ---------------------------------------------------------------------------
def n_species(film: Film) -> int:
    """Number of distinct species of a film (:attr:`Film.species`)."""
    return int(len(film.species))


def _sites(sites: Any, *, radius_A: float | None, film: Film | None, what: str) -> pd.DataFrame:
    """One row per (frame, molecule) with a ``species`` column, at one radius."""
    if isinstance(sites, SiteSample):
        df = sites.at(radius_A) if len(sites.table) else sites.table
    elif isinstance(sites, pd.DataFrame):
        df = SiteSample(table=sites).at(radius_A) if "radius_A" in sites.columns and len(sites) else sites
    elif isinstance(sites, FilmModelResult):
        raise InputError(f"{what}: a film model result holds environment shifts only; give absolute site "
                         "energies, e.g. clusterlab.export.sites.site_table(film, model=result, vacuum_eV=...).")
    else:
        raise InputError(f"{what} needs a SiteSample or a site table (pandas DataFrame); "
                         f"got {type(sites).__name__}.")
    missing = [c for c in ("frame", "molecule") if c not in df.columns]
    if missing:
        raise InputError(f"{what}: the site table has no {missing[0]!r} column; columns: {list(df.columns)}.")
    df = df.copy()
    if "species" not in df.columns:
        if film is None:
            raise InputError(f"{what}: the site table has no 'species' column; give film= to take it from "
                             "film.molecules.")
        df["species"] = film.molecule_species[df["molecule"].to_numpy(dtype=int)]
    if df.duplicated(["frame", "molecule"]).any():
        bad = df[df.duplicated(["frame", "molecule"], keep=False)].iloc[0]
        raise InputError(f"{what}: (frame={bad['frame']}, molecule={bad['molecule']}) appears more than once; "
                         "give one row per frame and molecule (one radius).")
    df["frame"] = df["frame"].astype(int)
    df["molecule"] = df["molecule"].astype(int)
    df["species"] = df["species"].astype(str)
    return df.reset_index(drop=True)


def _host_guest(counts: pd.Series, host: str | None, guest: str | None, what: str) -> tuple[str, str]:
    """Host (default: the most abundant species) and guest (default: the other one of two)."""
    names = [str(s) for s in counts.index]
    for role, v in (("host", host), ("guest", guest)):
        if v is not None and str(v) not in names:
            raise InputError(f"{what}: {role}={v!r} is not a species here; species: {names}.")
    if host is None:
        host = str(counts.sort_values(ascending=False, kind="stable").index[0])
    if guest is None:
        others = [s for s in names if s != str(host)]
        if len(others) != 1:
            raise InputError(f"{what}: cannot tell the guest among {others or 'no other species'}; "
                             "give guest= (and host=).")
        guest = others[0]
    if str(host) == str(guest):
        raise InputError(f"{what}: host and guest are both {host!r}; give two different species.")
    return str(host), str(guest)


def _abundance(df: pd.DataFrame, film: Film | None) -> pd.Series:
    if film is not None:
        return film.molecules["species"].astype(str).value_counts()
    return df.drop_duplicates("molecule")["species"].value_counts()


class _TableResult:
    """JSON round trip of a result made of tables and plain values."""

    _KIND: ClassVar[str] = ""
    _TABLES: ClassVar[tuple[str, ...]] = ()

    def to_json(self) -> str:
        """JSON text; ``from_json`` rebuilds the result exactly."""
        d: dict[str, Any] = {"kind": self._KIND, "version": 1}
        for f in (x.name for x in dataclasses.fields(self)):  # type: ignore[arg-type]
            v = getattr(self, f)
            d[f] = table_to_dict(v.reset_index(drop=True)) if f in self._TABLES else v
        return json.dumps(d)

    @classmethod
    def from_json(cls, text: str) -> Any:
        """Inverse of :meth:`to_json`.

        Raises
        ------
        InputError
            Text that is not JSON of this result.
        """
        d = json_of_kind(text, cls._KIND, f"a {cls.__name__}")
        kw = {f: (table_from_dict(d[f]) if f in cls._TABLES else d[f])
              for f in (x.name for x in dataclasses.fields(cls)) if f in d}  # type: ignore[arg-type]
        return cls(**kw)


# ---------------------------------------------------------------------------
# 1. per-species distributions and trap depths
# ---------------------------------------------------------------------------
@dataclass
class SpeciesEnergies(_TableResult):
    """Per-species site-energy statistics and host-guest trap depths.

    Attributes
    ----------
    stats : pandas.DataFrame
        One row per (species, quantity): ``species, quantity, n, mean_eV,
        mean_lo_eV, mean_hi_eV, sigma_eV, sigma_lo_eV, sigma_hi_eV,
        sigma_ci_method`` (:func:`~clusterlab.stats.disorder_stats`: BCa
        interval of the mean; σ with the one reported interval, chi-square
        below :data:`~clusterlab.stats.SIGMA_BOOTSTRAP_MIN_N` values, BCa from
        there; NaN when a species has fewer than 3 values).
    traps : pandas.DataFrame
        One row per carrier (``hole``, ``electron``) whose quantity the table
        has: ``carrier, definition, depth_eV, depth_lo_eV, depth_hi_eV,
        spread_eV, spread_lo_eV, spread_hi_eV, spread_ci_method, n_host,
        n_guest`` (:func:`~clusterlab.stats.mean_offset`: percentile bootstrap
        interval of the depth, a difference of means; the spread is the σ of
        the difference of a random host and guest site, its interval by the
        same σ rule as every σ).
        Positive depth: the guest traps that carrier (module docstring).
    host, guest : str
    radius_A : float or None
        Radius of the rows used (None for a table without radii).
    confidence : float
    n_boot, seed : int
    """

    stats: pd.DataFrame
    traps: pd.DataFrame
    host: str
    guest: str
    radius_A: float | None = None
    confidence: float = 0.95
    n_boot: int = 2000
    seed: int = 0

    _KIND: ClassVar[str] = "clusterlab.SpeciesEnergies"
    _TABLES: ClassVar[tuple[str, ...]] = ("stats", "traps")

    def to_frame(self) -> pd.DataFrame:
        """The per-species statistics (a copy of :attr:`stats`)."""
        return self.stats.copy()

    def trap_depth_eV(self, carrier: str) -> float:
        """Mean trap depth of ``"hole"`` or ``"electron"`` (eV).

        Raises
        ------
        InputError
            A carrier the table had no quantity for.
        """
        row = self.traps[self.traps["carrier"] == carrier]
        if not len(row):
            raise InputError(f"no trap depth for carrier {carrier!r}; have {self.traps['carrier'].tolist()}.")
        return float(row["depth_eV"].iloc[0])

    def summary(self) -> dict[str, Any]:
        """Flat dict: host, guest, per trap ``<carrier>_trap_eV`` with its
        interval and spread, per species and quantity the mean and σ."""
        out: dict[str, Any] = {"host": self.host, "guest": self.guest, "radius_A": self.radius_A}
        for r in self.traps.itertuples(index=False):
            out.update({f"{r.carrier}_trap_eV": r.depth_eV, f"{r.carrier}_trap_lo_eV": r.depth_lo_eV,
                        f"{r.carrier}_trap_hi_eV": r.depth_hi_eV, f"{r.carrier}_trap_spread_eV": r.spread_eV})
        for r in self.stats.itertuples(index=False):
            q = str(r.quantity)[: -len("_eV")]
            out[f"{r.species}_{q}_mean_eV"] = r.mean_eV
            out[f"{r.species}_{q}_sigma_eV"] = r.sigma_eV
        return out


def species_energies(sites: Any, *, film: Film | None = None, host: str | None = None,
                     guest: str | None = None, quantities: Sequence[str] = SPECIES_QUANTITIES,
                     radius_A: float | None = None, n_boot: int = 2000, seed: int = 0,
                     confidence: float = 0.95) -> SpeciesEnergies:
    """Per-species site-energy distributions and the host-guest trap depths.

    Parameters
    ----------
    sites : SiteSample or pandas.DataFrame
        Site table with ``frame, molecule, species`` (``species`` may come
        from ``film``) and the energy columns (eV). With several radii the
        rows of ``radius_A`` (default: the largest) are used, converged only.
    film : Film, optional
        Gives the species when the table lacks them and the abundances that
        choose the host.
    host, guest : str, optional
        Default: the most abundant species of the film (or table) is the host,
        the other of two the guest.
    quantities : sequence of str
        Columns to describe; those missing from the table are skipped.
    radius_A : float, optional
    n_boot, seed, confidence
        Bootstrap settings of every interval.

    Returns
    -------
    SpeciesEnergies

    Raises
    ------
    InputError
        A table without the needed columns, a species that is not there, or
        a guest that cannot be told.

    Examples
    --------
    >>> t = pd.DataFrame({"frame": 0, "molecule": range(6), "species": ["H"] * 4 + ["G"] * 2,
    ...                   "IP_eV": [6.0] * 4 + [5.6] * 2})
    >>> round(species_energies(t).trap_depth_eV("hole"), 12)
    0.4
    """
    df = _sites(sites, radius_A=radius_A, film=film, what="species_energies")
    host, guest = _host_guest(_abundance(df, film), host, guest, "species_energies")
    r_used = float(df["radius_A"].iloc[0]) if "radius_A" in df.columns and len(df) else None
    qs = [q for q in quantities if q in df.columns]
    rows = []
    # σ with the one reported interval of disorder_stats (chi-square below SIGMA_BOOTSTRAP_MIN_N sites)
    keys = {"mean": "mean_eV", "mean_lo": "mean_lo_eV", "mean_hi": "mean_hi_eV", "sigma": "sigma_eV",
            "sigma_ci_lo": "sigma_lo_eV", "sigma_ci_hi": "sigma_hi_eV"}
    for q in qs:
        per = grouped_disorder_stats(pd.to_numeric(df[q], errors="coerce").to_numpy(dtype=float),
                                     df["species"].to_numpy(), name="species", n_boot=n_boot, seed=seed,
                                     confidence=confidence)
        for _, g in per.iterrows():
            method = g["sigma_ci_method"]
            rows.append({"species": g["species"], "quantity": q, "n": int(g["n"]),
                         **{v: float(g[k]) for k, v in keys.items()},
                         "sigma_ci_method": method if isinstance(method, str) else ""})
    rows.sort(key=lambda r: (r["species"], qs.index(r["quantity"])))
    stats = pd.DataFrame(rows, columns=["species", "quantity", "n", "mean_eV", "mean_lo_eV", "mean_hi_eV",
                                        "sigma_eV", "sigma_lo_eV", "sigma_hi_eV", "sigma_ci_method"])
    traps = []
    for carrier, q, first, second, text in (("hole", "IP_eV", host, guest, "IP_host - IP_guest"),
                                            ("electron", "EA_eV", guest, host, "EA_guest - EA_host")):
        if q not in df.columns:
            continue
        a = pd.to_numeric(df.loc[df["species"] == first, q], errors="coerce").to_numpy(dtype=float)
        b = pd.to_numeric(df.loc[df["species"] == second, q], errors="coerce").to_numpy(dtype=float)
        if np.isfinite(a).sum() < 2 or np.isfinite(b).sum() < 2:
            continue
        o = mean_offset(a, b, n_boot=n_boot, seed=seed, confidence=confidence)
        n_first, n_second = int(o["n_first"]), int(o["n_second"])
        traps.append({"carrier": carrier, "definition": text, "depth_eV": float(o["offset"]),
                      "depth_lo_eV": float(o["offset_lo"]), "depth_hi_eV": float(o["offset_hi"]),
                      "spread_eV": float(o["spread"]), "spread_lo_eV": float(o["spread_ci_lo"]),
                      "spread_hi_eV": float(o["spread_ci_hi"]), "spread_ci_method": o["spread_ci_method"],
                      "n_host": n_first if first == host else n_second,
                      "n_guest": n_second if first == host else n_first})
    trap_df = pd.DataFrame(traps, columns=["carrier", "definition", "depth_eV", "depth_lo_eV", "depth_hi_eV",
                                           "spread_eV", "spread_lo_eV", "spread_hi_eV", "spread_ci_method",
                                           "n_host", "n_guest"])
    return SpeciesEnergies(stats=stats, traps=trap_df, host=host, guest=guest, radius_A=r_used,
                           confidence=float(confidence), n_boot=int(n_boot), seed=int(seed))


# ---------------------------------------------------------------------------
# 2. triplet confinement
# ---------------------------------------------------------------------------
#: what :func:`triplet_confinement` does for host neighbours without a T1
CONFINEMENT_FALLBACKS = ("error", "host-distribution")


class MissingNeighboursError(InputError):
    """Raised by :func:`triplet_confinement` (``fallback="error"``) when host
    neighbours of guest sites have no T1 in the site table."""


@dataclass
class ConfinementResult(_TableResult):
    """Triplet confinement of guest sites by their host neighbours.

    Attributes
    ----------
    sites : pandas.DataFrame
        One row per guest site (frame, molecule): ``frame, molecule,
        T1_guest_eV, n_host_neighbours, n_missing`` (host neighbours without
        a T1 in the table), ``T1_host_min_eV`` (lowest T1 of the host
        neighbours that have one), ``margin_eV = T1_host_min_eV -
        T1_guest_eV`` (positive: below every known neighbour),
        ``confined`` (1.0 or 0.0; with the ``host-distribution`` fallback the
        probability, see :func:`triplet_confinement`; NaN for a guest without
        host neighbours within the cutoff).
    cutoff_A : float
    host, guest : str
    fallback : str
    fraction : float
        Mean of ``confined`` over the guests that have host neighbours.
    n_isolated : int
        Guests without a host neighbour within the cutoff (left out of the fraction).
    """

    sites: pd.DataFrame
    cutoff_A: float
    host: str
    guest: str
    fallback: str
    fraction: float
    n_isolated: int = 0

    _KIND: ClassVar[str] = "clusterlab.ConfinementResult"
    _TABLES: ClassVar[tuple[str, ...]] = ("sites",)

    def to_frame(self) -> pd.DataFrame:
        """The per-guest table (a copy of :attr:`sites`)."""
        return self.sites.copy()

    def summary(self) -> dict[str, Any]:
        """Flat dict: the fraction, counts, and the mean, σ and minimum of the margin (eV)."""
        m = self.sites["margin_eV"].to_numpy(dtype=float)
        m = m[np.isfinite(m)]
        return {"host": self.host, "guest": self.guest, "cutoff_A": self.cutoff_A, "fallback": self.fallback,
                "confined_fraction": self.fraction, "n_guest_sites": int(len(self.sites)),
                "n_isolated": self.n_isolated,
                "n_with_missing": int((self.sites["n_missing"] > 0).sum()),
                "margin_mean_eV": float(m.mean()) if m.size else float("nan"),
                "margin_sigma_eV": float(m.std(ddof=1)) if m.size > 1 else float("nan"),
                "margin_min_eV": float(m.min()) if m.size else float("nan")}


def triplet_confinement(film: Film, sites: Any, *, cutoff_A: float, host: str | None = None,
                        guest: str | None = None, value: str = "T1_eV", fallback: str = "error",
                        radius_A: float | None = None) -> ConfinementResult:
    """Fraction of guest sites whose T1 lies below the T1 of every host
    neighbour, and by how much.

    Neighbours are host molecules whose centroid lies within ``cutoff_A`` of
    the guest's centroid in the same frame (minimum image in the frame's box,
    :meth:`Film.minimum_image`; centroids from :meth:`Film.frame_geometry`).
    "Below" is strict: T1_guest < T1 of each host neighbour.

    Parameters
    ----------
    film : Film
    sites : SiteSample or pandas.DataFrame
        Per molecule-frame T1 values (``frame, molecule, value``). A film-wide
        table (the transport export's site table) covers every neighbour; a
        sample must hold the neighbours of its guests, else see ``fallback``.
    cutoff_A : float
        Centroid distance (Å), at most half the smallest box width.
    host, guest : str, optional
        Species (default as :func:`species_energies`).
    value : str, default "T1_eV"
    fallback : {"error", "host-distribution"}
        For host neighbours without a value: ``"error"`` raises an
        InputError that counts them; ``"host-distribution"`` treats each such
        neighbour's T1 as an independent draw from the host T1 values of the
        table, so ``confined`` becomes the probability
        1[T1_guest < every known neighbour] × p^k, with p the fraction of host
        values above T1_guest and k the number of missing neighbours (the
        margin then covers the known neighbours only).
    radius_A : float, optional
        Radius of the rows used when the table has several.

    Returns
    -------
    ConfinementResult

    Raises
    ------
    InputError
        A bad cutoff or fallback, or a table without ``value``.
    MissingNeighboursError
        (fallback "error", an InputError) guests with host neighbours missing
        from the table.

    Notes
    -----
    Model: vertical T1 energies of neighbours compared one by one; no transfer
    rates, no neighbours of neighbours.
    """
    if fallback not in CONFINEMENT_FALLBACKS:
        raise InputError(f"fallback={fallback!r} is invalid; use one of {list(CONFINEMENT_FALLBACKS)}.")
    try:
        cut = float(cutoff_A)
    except (TypeError, ValueError) as exc:
        raise InputError(f"cutoff_A={cutoff_A!r} must be a distance in Å.") from exc
    if not (np.isfinite(cut) and cut > 0):
        raise InputError(f"cutoff_A={cutoff_A!r} must be a positive distance in Å.")
    df = _sites(sites, radius_A=radius_A, film=film, what="triplet_confinement")
    if value not in df.columns:
        raise InputError(f"triplet_confinement: the site table has no {value!r} column; columns: {list(df.columns)}.")
    host, guest = _host_guest(_abundance(df, film), host, guest, "triplet_confinement")
    species = film.molecule_species.astype(str)
    host_ids = np.flatnonzero(species == host)
    vals = pd.to_numeric(df[value], errors="coerce").to_numpy(dtype=float)
    host_pool = np.sort(vals[(df["species"] == host).to_numpy() & np.isfinite(vals)])
    rows = []
    missing_total = 0
    for f, idx in df.groupby("frame").indices.items():
        frame = int(f)
        box = film.box(frame) if film.has_box else None
        if box is not None and cut > half_box_width_A(box):
            raise InputError(f"cutoff_A={cut:g} Å exceeds half the smallest width of frame {frame}'s box "
                             f"({half_box_width_A(box):.3f} Å); the minimum image would miss neighbours.")
        cent = film.frame_geometry(frame, periodic=film.has_box).centroids_A
        sub = df.iloc[idx]
        known = dict(zip(sub["molecule"].to_numpy(dtype=int), vals[idx]))
        for m, t_guest in zip(sub["molecule"].to_numpy(dtype=int), vals[idx]):
            if species[m] != guest or not np.isfinite(t_guest):
                continue
            d = np.linalg.norm(film.minimum_image(cent[host_ids] - cent[m], frame), axis=1)
            nb = host_ids[(d <= cut) & (host_ids != m)]
            t_nb = np.array([known.get(int(j), np.nan) for j in nb], dtype=float)
            have = np.isfinite(t_nb)
            n_miss = int((~have).sum())
            missing_total += n_miss
            t_min = float(t_nb[have].min()) if have.any() else float("nan")
            if nb.size == 0:
                conf = float("nan")
            else:
                below_known = bool(np.all(t_guest < t_nb[have]))
                p_above = 1.0
                if n_miss:
                    p_above = (host_pool.size - np.searchsorted(host_pool, t_guest, side="right")) / host_pool.size \
                        if host_pool.size else float("nan")
                conf = float(below_known) * float(p_above) ** n_miss
            rows.append({"frame": frame, "molecule": int(m), "T1_guest_eV": float(t_guest),
                         "n_host_neighbours": int(nb.size), "n_missing": n_miss, "T1_host_min_eV": t_min,
                         "margin_eV": t_min - float(t_guest), "confined": conf})
    out = pd.DataFrame(rows, columns=["frame", "molecule", "T1_guest_eV", "n_host_neighbours", "n_missing",
                                      "T1_host_min_eV", "margin_eV", "confined"])
    if not len(out):
        raise InputError(f"triplet_confinement: the table holds no guest ({guest!r}) site with a finite {value!r}.")
    if missing_total and fallback == "error":
        n_sites = int((out["n_missing"] > 0).sum())
        raise MissingNeighboursError(f"triplet_confinement: {missing_total} host neighbour(s) of {n_sites} guest site(s) "
                         f"have no {value!r} in the table (within {cut:g} Å); give a table that covers them "
                         "(e.g. the film-wide site table of the transport export) or "
                         "fallback='host-distribution'.")
    conf = out["confined"].to_numpy(dtype=float)
    frac = float(np.nanmean(conf)) if np.isfinite(conf).any() else float("nan")
    return ConfinementResult(sites=out, cutoff_A=cut, host=host, guest=guest, fallback=fallback,
                             fraction=frac, n_isolated=int((~np.isfinite(conf)).sum()))


# ---------------------------------------------------------------------------
# 3. ΔEST and charge-transfer character against the donor-acceptor torsion
# ---------------------------------------------------------------------------
def torsion_atom_indices(film: Film, names: Mapping[str, Sequence[str]]) -> dict[str, np.ndarray]:
    """Indices within the molecule of torsion atoms given by their atom names.

    Parameters
    ----------
    film : Film
    names : mapping species -> 4 str
        Atom names (the topology's ``names``) of the chain a-b-c-d of each
        species, e.g. ``{"GST": ("C12", "C13", "N3", "C20")}``.

    Returns
    -------
    dict of str to numpy.ndarray, shape (4,), int64
        0-based positions of the atoms within a molecule of that species
        (what :func:`torsion_table` takes).

    Raises
    ------
    InputError
        A species the film lacks, not four different names, a name no atom of
        the species carries (the message names it and lists the names there
        are), a name used twice within the molecule, or molecules of one
        species whose atoms carry these names at different positions.
    """
    if not isinstance(names, Mapping) or not names:
        raise InputError("torsion atom names must map a species to four atom names, e.g. "
                         "{'GST': ('C12', 'C13', 'N3', 'C20')}.")
    atom_names = np.asarray(film.universe.atoms.names).astype(str) if hasattr(film.universe.atoms, "names") \
        else None
    out: dict[str, np.ndarray] = {}
    for sp, chain in names.items():
        mols = np.flatnonzero(film.molecule_species == str(sp))
        if not len(mols):
            raise InputError(f"torsion atoms: {sp!r} is not a species of the film; species: "
                             f"{sorted(film.species.index)}.")
        chain = [str(c).strip() for c in chain]
        if len(chain) != 4 or len(set(chain)) != 4 or not all(chain):
            raise InputError(f"torsion atoms of {sp!r}: {chain!r}; give four different atom names of the "
                             "molecule, e.g. 'C12 C13 N3 C20'.")
        if atom_names is None:
            raise InputError(f"torsion atoms of {sp!r}: the film's topology has no atom names; give the "
                             "torsion as four atom indices within the molecule instead.")
        first = atom_names[film.molecule_atoms(int(mols[0]))]
        idx = []
        for c in chain:
            hits = np.flatnonzero(first == c)
            if not len(hits):
                shown = ", ".join(first[:40]) + (", ..." if len(first) > 40 else "")
                raise InputError(f"torsion atoms of {sp!r}: no atom named {c!r} in molecule {int(mols[0])} "
                                 f"of species {sp!r}; its atom names are {shown}.")
            if len(hits) > 1:
                raise InputError(f"torsion atoms of {sp!r}: the name {c!r} is carried by {len(hits)} atoms of "
                                 f"molecule {int(mols[0])} (positions {hits.tolist()}); use atom indices instead.")
            idx.append(int(hits[0]))
        arr = np.asarray(idx, dtype=np.int64)
        for m in mols[1:]:
            atoms = film.molecule_atoms(int(m))
            if len(atoms) <= arr.max() or not np.array_equal(atom_names[atoms[arr]], np.asarray(chain)):
                raise InputError(f"torsion atoms of {sp!r}: molecule {int(m)} does not carry {chain} at the "
                                 f"positions {arr.tolist()} of molecule {int(mols[0])} (atom order differs); "
                                 "give atom indices per molecule type instead.")
        out[str(sp)] = arr
    return out


def _named_to_indices(film: Film, species: Any, chain: Any) -> Any:
    """``chain`` as indices when it is a sequence of atom names, else unchanged."""
    if not isinstance(chain, str) and len(chain) and all(isinstance(i, (str, np.str_)) for i in chain):
        return torsion_atom_indices(film, {species: chain})[str(species)]
    return chain


def _check_atoms(film: Film, atoms: Mapping[str, Sequence[int]], species: set[str]) -> dict[str, np.ndarray]:
    if not isinstance(atoms, Mapping) or not atoms:
        raise InputError("atoms must map a species to four atom indices within its molecule, "
                         "e.g. {'GST': (3, 4, 9, 10)}, or to four atom names, e.g. {'GST': ('C3', 'N1', 'C9', 'C10')}.")
    sizes = film.molecules.groupby("species")["n_atoms"].min().to_dict()
    out = {}
    for sp, idx in atoms.items():
        if str(sp) not in sizes:
            raise InputError(f"atoms: {sp!r} is not a species of the film; species: {sorted(sizes)}.")
        if isinstance(idx, str):
            raise InputError(f"atoms[{sp!r}]={idx!r}: give four atom names or indices as a sequence, "
                             "e.g. ('C3', 'N1', 'C9', 'C10').")
        idx = _named_to_indices(film, sp, idx)
        arr = np.asarray(idx)
        if arr.shape != (4,) or arr.dtype.kind not in "iu" or len(set(arr.tolist())) != 4:
            raise InputError(f"atoms[{sp!r}]={idx!r}: give four different integer atom indices within the molecule.")
        if arr.min() < 0 or arr.max() >= sizes[str(sp)]:
            raise InputError(f"atoms[{sp!r}]={idx!r}: indices must lie in 0..{sizes[str(sp)] - 1} "
                             f"(the molecule has {sizes[str(sp)]} atoms).")
        out[str(sp)] = arr.astype(np.int64)
    if not set(out) & species:
        raise InputError(f"atoms names species {sorted(out)}, none of which is in the site table ({sorted(species)}).")
    return out


def torsion_table(film: Film, sites: Any, atoms: Mapping[str, Sequence[int]], *,
                  radius_A: float | None = None) -> pd.DataFrame:
    """The dihedral of four given atoms of every sampled copy (molecule, frame).

    Parameters
    ----------
    film : Film
    sites : SiteSample or pandas.DataFrame
        Which copies (``frame, molecule``; ``species`` may come from the film).
    atoms : mapping species -> 4 ints or 4 str
        Atom indices *within the molecule* (0-based, the order of the
        molecule's atoms in the topology) of the chain a-b-c-d whose dihedral
        is wanted, or the four atom names (:func:`torsion_atom_indices`);
        species not named are left out.
    radius_A : float, optional

    Returns
    -------
    pandas.DataFrame
        The site rows of the named species with ``torsion_deg`` (IUPAC sign,
        (-180, 180], :func:`clusterlab.geometry.dihedral_deg`, whole molecules).

    Raises
    ------
    InputError
        Bad atom indices or no site of the named species.
    """
    df = _sites(sites, radius_A=radius_A, film=film, what="torsion_table")
    idx = _check_atoms(film, atoms, set(df["species"]))
    df = df[df["species"].isin(list(idx))].reset_index(drop=True)
    tors = np.full(len(df), np.nan)
    for f, rows in df.groupby("frame").indices.items():
        pos = film.frame_geometry(int(f), periodic=film.has_box).positions_A
        mols = df["molecule"].to_numpy(dtype=int)[rows]
        chain = np.array([film.molecule_atoms(int(m))[idx[str(sp)]]
                          for m, sp in zip(mols, df["species"].to_numpy()[rows])], dtype=np.int64)
        tors[rows] = dihedral_deg(pos[chain[:, 0]], pos[chain[:, 1]], pos[chain[:, 2]], pos[chain[:, 3]])
    df["torsion_deg"] = tors
    return df


@dataclass
class TorsionResult(_TableResult):
    """ΔEST and the hole-electron distance against a torsion.

    Attributes
    ----------
    table : pandas.DataFrame
        One row per copy: ``frame, molecule, species, torsion_deg, dEST_eV``
        and, where the sites have them, ``S1_ct_distance_A``,
        ``T1_ct_distance_A``, ``dEST_vacuum_eV``.
    fits : pandas.DataFrame
        One row per species: ``species, n, n_harmonics, var_dEST_eV2``
        (ddof=1), ``torsion_r2``, ``torsion_fraction`` (adjusted R² of the
        Fourier fit of ΔEST on the torsion: the part of the ΔEST variance a
        smooth torsion dependence explains), ``sigma_torsion_eV`` (its σ,
        sqrt(fraction × var)), ``residual_sigma_eV``, ``coefficients`` (JSON
        text: c0, a1, b1, ...), and from the vacuum ΔEST where present
        ``conformational_fraction`` (var of vacuum ΔEST / var ΔEST:
        all of the geometry, not only the torsion) and ``environmental_fraction``.
    atoms : dict of str to list of int
    n_harmonics : int
    """

    table: pd.DataFrame
    fits: pd.DataFrame
    atoms: dict[str, list[int]] = field(default_factory=dict)
    n_harmonics: int = 2

    _KIND: ClassVar[str] = "clusterlab.TorsionResult"
    _TABLES: ClassVar[tuple[str, ...]] = ("table", "fits")

    def to_frame(self) -> pd.DataFrame:
        """The per-copy table (a copy of :attr:`table`)."""
        return self.table.copy()

    def summary(self) -> dict[str, Any]:
        """Flat dict: per species the torsion-explained fraction of the ΔEST
        variance and the mean and σ of the torsion."""
        out: dict[str, Any] = {"n_harmonics": self.n_harmonics}
        for r in self.fits.itertuples(index=False):
            t = self.table.loc[self.table["species"] == r.species, "torsion_deg"].to_numpy(dtype=float)
            out.update({f"{r.species}_n": int(r.n), f"{r.species}_torsion_fraction": r.torsion_fraction,
                        f"{r.species}_dEST_sigma_eV": float(np.sqrt(r.var_dEST_eV2)),
                        f"{r.species}_torsion_mean_deg": float(np.mean(t)),
                        f"{r.species}_torsion_sigma_deg": float(np.std(t, ddof=1)) if t.size > 1 else float("nan")})
        return out

    def curve(self, species: str, n_points: int = 181) -> tuple[np.ndarray, np.ndarray]:
        """The fitted ΔEST(θ) of one species on a grid of -180..180 degrees."""
        row = self.fits[self.fits["species"] == species]
        if not len(row):
            raise InputError(f"no fit for species {species!r}; have {self.fits['species'].tolist()}.")
        coef = json.loads(row["coefficients"].iloc[0])
        th = np.linspace(-180.0, 180.0, int(n_points))
        return th, fourier_basis(th, (len(coef) - 1) // 2) @ np.asarray(coef, dtype=np.float64)


def dest_torsion(film: Film, sites: Any, atoms: Mapping[str, Sequence[int]], *, n_harmonics: int = 2,
                 radius_A: float | None = None) -> TorsionResult:
    """ΔEST (S1 - T1) and the hole-electron distance of each copy against its
    donor-acceptor torsion, and the conformational part of the ΔEST spread.

    The torsion part is the adjusted R² of a least-squares Fourier series of
    ΔEST in the torsion (:func:`clusterlab.stats.periodic_fit`, ``n_harmonics``
    harmonics; a torsion is periodic and ΔEST smooth in it). Where the sites
    have ``dEST_vacuum_eV``, :func:`clusterlab.stats.conformational_environmental`
    adds the whole conformational part (vacuum ΔEST at each copy's geometry)
    against the environmental one.

    Parameters
    ----------
    film : Film
    sites : SiteSample or pandas.DataFrame
        With ``dEST_eV`` (or ``S1_eV`` and ``T1_eV``); ``S1_ct_distance_A`` and
        ``T1_ct_distance_A`` (the engine's per-state hole-electron distance)
        are carried along when present.
    atoms : mapping species -> 4 ints
        See :func:`torsion_table`.
    n_harmonics : int, default 2
    radius_A : float, optional

    Returns
    -------
    TorsionResult

    Raises
    ------
    InputError
        Bad atoms, no ΔEST, or too few copies of a species for the fit.
    """
    df = torsion_table(film, sites, atoms, radius_A=radius_A)
    if "dEST_eV" not in df.columns:
        if not {"S1_eV", "T1_eV"} <= set(df.columns):
            raise InputError("dest_torsion: the site table has neither 'dEST_eV' nor 'S1_eV' and 'T1_eV'.")
        df["dEST_eV"] = df["S1_eV"].astype(float) - df["T1_eV"].astype(float)
    keep = [c for c in ("frame", "molecule", "species", "torsion_deg", "dEST_eV", "S1_ct_distance_A",
                        "T1_ct_distance_A", "dEST_vacuum_eV") if c in df.columns]
    table = df[keep].copy()
    fits = []
    for sp, sub in table.groupby("species", sort=True):
        fit = periodic_fit(sub["torsion_deg"].to_numpy(dtype=float), sub["dEST_eV"].to_numpy(dtype=float),
                           n_harmonics=n_harmonics)
        row: dict[str, Any] = {"species": str(sp), "n": int(fit["n"]), "n_harmonics": int(n_harmonics),
                               "var_dEST_eV2": float(fit["variance"]), "torsion_r2": float(fit["r2"]),
                               "torsion_fraction": float(fit["r2_adjusted"]),
                               "sigma_torsion_eV": float(np.sqrt(fit["explained_variance"])),
                               "residual_sigma_eV": float(fit["residual_sigma"]),
                               "coefficients": json.dumps(fit["coefficients"]),
                               "conformational_fraction": float("nan"), "environmental_fraction": float("nan")}
        if "dEST_vacuum_eV" in sub.columns and sub["dEST_vacuum_eV"].notna().sum() >= 3:
            split = sub.assign(dEST_shift_eV=sub["dEST_eV"].astype(float) - sub["dEST_vacuum_eV"].astype(float))
            ce = conformational_environmental(split, vacuum="dEST_vacuum_eV", shift="dEST_shift_eV")
            row["conformational_fraction"] = float(ce["frac_conf"])
            row["environmental_fraction"] = float(ce["frac_env"])
        fits.append(row)
    return TorsionResult(table=table.reset_index(drop=True), fits=pd.DataFrame(fits),
                         atoms={str(k): [int(i) for i in _named_to_indices(film, k, v)] for k, v in atoms.items()},
                         n_harmonics=int(n_harmonics))


# ---------------------------------------------------------------------------
# 4. state order: charge transfer or local, in vacuum and embedded
# ---------------------------------------------------------------------------
def state_table(source: Any, *, film: Film | None = None, film_id: str | None = None,
                method_key: str | None = None, radius_A: float | None = None) -> pd.DataFrame:
    """Per-state rows (every computed singlet and triplet) of stored or
    in-memory embedded calculations.

    Parameters
    ----------
    source : ResultStore, path, or sequence of ExcitationResult
        A store is read as :func:`~clusterlab.study.sample.site_table` reads it
        (one film, one method; ``film_id`` / ``method_key`` choose), and each
        record's result is expanded with :meth:`ExcitationResult.to_frame`.
    film : Film, optional
        Adds ``species``.
    radius_A : float, optional
        Keep only this radius (default: the largest).

    Returns
    -------
    pandas.DataFrame
        :meth:`ExcitationResult.to_frame` rows of the excited states (not the
        IP/EA rows), with ``species`` when known.

    Raises
    ------
    InputError
        No excitation result in the source.
    """
    frames = []
    if isinstance(source, (ResultStore, str, os.PathLike)):
        st = source if isinstance(source, ResultStore) else ResultStore(source, readonly=True)
        try:
            sites = site_table(st, film=film, film_id=film_id, method_key=method_key)
            for key in sites["key"]:
                rec = st.get(str(key))
                if rec is not None and rec.result_json:
                    frames.append(ExcitationResult.from_json(rec.result_json).to_frame())
        finally:
            if st is not source:
                st.close()
    else:
        for r in source:
            if not isinstance(r, ExcitationResult):
                raise InputError(f"state_table needs ExcitationResult objects or a result store; got "
                                 f"{type(r).__name__}.")
            frames.append(r.to_frame())
    if not frames:
        raise InputError("state_table: the source holds no excitation result.")
    df = pd.concat(frames, ignore_index=True)
    df = df[df["kind"].isin(["singlet", "triplet"])]
    if len(df):
        r = float(df["radius_A"].astype(float).max()) if radius_A is None else float(radius_A)
        df = df[np.isclose(df["radius_A"].astype(float), r)]
    if film is not None and len(df):
        df = df.assign(species=film.molecule_species[df["molecule"].to_numpy(dtype=int)])
    return df.reset_index(drop=True)


@dataclass
class StateOrderResult(_TableResult):
    """Character (``CT`` or ``local``) of each site's lowest states in vacuum
    and embedded, and the sites whose lowest singlet or triplet changes it.

    Attributes
    ----------
    sites : pandas.DataFrame
        One row per (frame, molecule): ``frame, molecule`` (``species`` when
        known), for each kind ``singlet_order`` / ``singlet_vacuum_order``
        and ``triplet_order`` / ``triplet_vacuum_order`` (characters of the
        lowest ``n_lowest`` states in energy order, e.g. ``"local,CT"``),
        ``S1_character``, ``S1_vacuum_character``, ``T1_character``,
        ``T1_vacuum_character`` (``"unknown"`` without a distance),
        ``S1_reordered``, ``T1_reordered`` (both characters known and
        different), ``order_changed`` (the characters of the lowest states
        differ anywhere), ``flagged`` (S1 or T1 reordered).
    threshold_A : float
        Hole-electron distance above which a state is ``CT``
        (:data:`CT_DISTANCE_THRESHOLD_A` by default).
    n_lowest : int
    """

    sites: pd.DataFrame
    threshold_A: float = CT_DISTANCE_THRESHOLD_A
    n_lowest: int = 2

    _KIND: ClassVar[str] = "clusterlab.StateOrderResult"
    _TABLES: ClassVar[tuple[str, ...]] = ("sites",)

    def to_frame(self) -> pd.DataFrame:
        """The per-site table (a copy of :attr:`sites`)."""
        return self.sites.copy()

    def flagged(self) -> pd.DataFrame:
        """The sites whose S1 or T1 character differs between vacuum and embedded."""
        return self.sites[self.sites["flagged"].astype(bool)].reset_index(drop=True)

    def summary(self) -> dict[str, Any]:
        """Flat dict: counts of sites, of reordered S1 and T1, of flagged sites,
        and the numbers of CT S1 and T1 in vacuum and embedded."""
        s = self.sites
        out: dict[str, Any] = {"threshold_A": self.threshold_A, "n_lowest": self.n_lowest, "n_sites": int(len(s)),
                               "n_S1_reordered": int(s["S1_reordered"].sum()),
                               "n_T1_reordered": int(s["T1_reordered"].sum()),
                               "n_flagged": int(s["flagged"].sum()),
                               "n_order_changed": int(s["order_changed"].sum())}
        for st in ("S1", "T1"):
            out[f"n_{st}_CT"] = int((s[f"{st}_character"] == "CT").sum())
            out[f"n_{st}_vacuum_CT"] = int((s[f"{st}_vacuum_character"] == "CT").sum())
        return out


def _character(d: np.ndarray, threshold_A: float) -> np.ndarray:
    return np.where(~np.isfinite(d), "unknown", np.where(d > threshold_A, "CT", "local"))


def state_order(states: pd.DataFrame, *, threshold_A: float = CT_DISTANCE_THRESHOLD_A,
                n_lowest: int = 2) -> StateOrderResult:
    """Classify each site's lowest singlets and triplets as charge transfer or
    local, in vacuum and embedded, and flag the sites the environment reorders.

    A state is ``CT`` when its hole-electron centroid distance
    (``ct_distance_A``; :mod:`clusterlab.qm.ct`) exceeds ``threshold_A``,
    else ``local``. The vacuum character of state k is that of the k-th
    vacuum state of the same kind (``vacuum_ct_distance_A``), so a site is
    *reordered* for S1 (T1) when the lowest embedded singlet (triplet) has
    another character than the lowest vacuum one: the environment moved a
    state of the other character below it.

    Parameters
    ----------
    states : pandas.DataFrame
        Per-state rows (:func:`state_table`): ``frame, molecule, state, kind,
        ct_distance_A, vacuum_ct_distance_A`` (the last NaN for results stored
        before the vacuum distance was kept: their vacuum character is
        ``unknown`` and they are never flagged).
    threshold_A : float, default :data:`CT_DISTANCE_THRESHOLD_A`
    n_lowest : int, default 2
        How many of the lowest states of each kind the order strings show.

    Returns
    -------
    StateOrderResult

    Raises
    ------
    InputError
        Missing columns, a bad threshold or ``n_lowest``.
    """
    need = ["frame", "molecule", "state", "kind", "ct_distance_A", "vacuum_ct_distance_A"]
    if not isinstance(states, pd.DataFrame) or any(c not in states.columns for c in need):
        have = list(states.columns) if isinstance(states, pd.DataFrame) else type(states).__name__
        raise InputError(f"state_order needs a per-state table with columns {need} (see state_table); got {have}.")
    thr = float(threshold_A)
    if not (np.isfinite(thr) and thr > 0):
        raise InputError(f"threshold_A={threshold_A!r} must be a positive distance in Å.")
    if isinstance(n_lowest, bool) or not isinstance(n_lowest, (int, np.integer)) or n_lowest < 1:
        raise InputError(f"n_lowest={n_lowest!r} must be a positive integer.")
    df = states[states["kind"].isin(["singlet", "triplet"])].copy()
    df["index"] = df["state"].astype(str).str[1:].astype(int)
    df["char"] = _character(df["ct_distance_A"].to_numpy(dtype=float), thr)
    df["vchar"] = _character(df["vacuum_ct_distance_A"].to_numpy(dtype=float), thr)
    keys = ["frame", "molecule"] + (["species"] if "species" in df.columns else [])
    rows = []
    for key, g in df.sort_values("index").groupby(keys, sort=True):
        row: dict[str, Any] = dict(zip(keys, key if isinstance(key, tuple) else (key,)))
        changed = False
        for kind, label in (("singlet", "S1"), ("triplet", "T1")):
            k = g[g["kind"] == kind].head(int(n_lowest))
            emb, vac = k["char"].tolist(), k["vchar"].tolist()
            row[f"{kind}_order"] = ",".join(emb)
            row[f"{kind}_vacuum_order"] = ",".join(vac)
            c, v = (emb[0], vac[0]) if emb else ("unknown", "unknown")
            row[f"{label}_character"], row[f"{label}_vacuum_character"] = c, v
            row[f"{label}_reordered"] = bool(c != "unknown" and v != "unknown" and c != v)
            changed = changed or any(a != b and "unknown" not in (a, b) for a, b in zip(emb, vac))
        row["order_changed"] = changed
        row["flagged"] = row["S1_reordered"] or row["T1_reordered"]
        rows.append(row)
    return StateOrderResult(sites=pd.DataFrame(rows), threshold_A=thr, n_lowest=int(n_lowest))


# ---------------------------------------------------------------------------
# 5. everything at once, for the report and the disorder panel
# ---------------------------------------------------------------------------
#: default host-neighbour distance of :func:`host_guest_overview` (centroid, Å): about the first
#: neighbour shell of small-molecule films (centroid spacings of 6-9 Å); common practice
OVERVIEW_NEIGHBOUR_CUTOFF_A = 9.0


@dataclass
class HostGuestOverview:
    """The analyses of this module that a film's data allow, with notes on what was left out.

    Attributes
    ----------
    species : SpeciesEnergies
    confinement : ConfinementResult or None
        None without T1 values or guest sites (see ``notes``).
    torsion : TorsionResult or None
        None without torsion atoms.
    state_order : StateOrderResult or None
        None without per-state data.
    notes : list of str
        What was left out and why, and which fallback was used.
    """

    species: SpeciesEnergies
    confinement: ConfinementResult | None = None
    torsion: TorsionResult | None = None
    state_order: StateOrderResult | None = None
    notes: list[str] = field(default_factory=list)

    _PARTS: ClassVar[dict[str, type]] = {"species": SpeciesEnergies, "confinement": ConfinementResult,
                                         "torsion": TorsionResult, "state_order": StateOrderResult}

    def to_frame(self) -> pd.DataFrame:
        """The per-species statistics."""
        return self.species.to_frame()

    def summary(self) -> dict[str, Any]:
        """Flat dict: the summaries of the parts present, keys prefixed by the part."""
        out: dict[str, Any] = {}
        for name in self._PARTS:
            part = getattr(self, name)
            if part is not None:
                out.update({f"{name}.{k}": v for k, v in part.summary().items()})
        return out

    def to_json(self) -> str:
        """JSON text; :meth:`from_json` rebuilds the overview exactly."""
        d: dict[str, Any] = {"kind": "clusterlab.HostGuestOverview", "version": 1, "notes": list(self.notes)}
        for name in self._PARTS:
            part = getattr(self, name)
            d[name] = None if part is None else json.loads(part.to_json())
        return json.dumps(d)

    @classmethod
    def from_json(cls, text: str) -> "HostGuestOverview":
        """Inverse of :meth:`to_json`.

        Raises
        ------
        InputError
            Text that is not a host-guest overview.
        """
        d = json_of_kind(text, "clusterlab.HostGuestOverview", "a host-guest overview")
        kw: dict[str, Any] = {name: (None if d.get(name) is None else typ.from_json(json.dumps(d[name])))
                              for name, typ in cls._PARTS.items()}
        return cls(notes=list(d.get("notes", [])), **kw)


def host_guest_overview(film: Film, sites: Any, *, cutoff_A: float | None = None,
                        torsion_atoms: Mapping[str, Sequence[int]] | None = None, states: Any = None,
                        host: str | None = None, guest: str | None = None, n_boot: int = 2000,
                        seed: int = 0) -> HostGuestOverview | None:
    """Per-species statistics and trap depths, triplet confinement, ΔEST against
    the torsion and the state order, as far as the data go.

    Parameters
    ----------
    film : Film
    sites : SiteSample or pandas.DataFrame
    cutoff_A : float, optional
        Host-neighbour distance of the confinement (default
        :data:`OVERVIEW_NEIGHBOUR_CUTOFF_A`, capped just below half the
        smallest box width). Host neighbours without a T1 in ``sites`` are
        drawn from the sampled host T1 values (``fallback="host-distribution"``
        of :func:`triplet_confinement`), which ``notes`` then says.
    torsion_atoms : mapping species -> 4 ints or 4 atom names, optional
        See :func:`dest_torsion`; without it no torsion analysis.
    states : ResultStore, path or per-state table, optional
        For :func:`state_order` (read with :func:`state_table`).
    host, guest, n_boot, seed
        As :func:`species_energies`.

    Returns
    -------
    HostGuestOverview or None
        None for a film of one species.

    Raises
    ------
    InputError
        What :func:`species_energies` raises (the other parts are left out
        with a note instead).
    """
    if n_species(film) < 2:
        return None
    se = species_energies(sites, film=film, host=host, guest=guest, n_boot=n_boot, seed=seed)
    out = HostGuestOverview(species=se)
    table = _sites(sites, radius_A=None, film=film, what="host_guest_overview")
    if "T1_eV" in table.columns:
        cut = float(OVERVIEW_NEIGHBOUR_CUTOFF_A if cutoff_A is None else cutoff_A)
        if film.has_box:
            half = min(half_box_width_A(film.box(f)) for f in sorted(set(table["frame"])))
            if cut >= half:
                cut = half * (1.0 - 1e-9)
                out.notes.append(f"confinement neighbour distance capped at {cut:.2f} Å (half the box width)")
        kw = dict(cutoff_A=cut, host=se.host, guest=se.guest)
        try:
            try:
                out.confinement = triplet_confinement(film, table, **kw)
            except MissingNeighboursError:
                out.confinement = triplet_confinement(film, table, fallback="host-distribution", **kw)
                out.notes.append("host neighbours missing from the sites: their T1 drawn from the sampled host "
                                 "T1 values (confinement as probabilities)")
        except InputError as exc:
            out.notes.append(f"triplet confinement left out: {exc}")
    else:
        out.notes.append("triplet confinement left out: the sites have no T1_eV")
    if torsion_atoms:
        try:
            out.torsion = dest_torsion(film, table, torsion_atoms)
        except InputError as exc:
            out.notes.append(f"ΔEST against the torsion left out: {exc}")
    if states is not None:
        try:
            st = states if isinstance(states, pd.DataFrame) else state_table(states, film=film)
            out.state_order = state_order(st)
        except InputError as exc:
            out.notes.append(f"state order left out: {exc}")
    return out
