"""Site-energy sampling over molecules, frames and radii, and its statistics.

:func:`sample_sites` computes embedded site energies of many molecules and
frames (at one or several radii) through the common runner and store;
:class:`SiteSample` turns the tidy table into disorder statistics: width with
confidence intervals, growth with the radius, static vs dynamic and
conformational vs environmental parts, spatial correlation.

Model notes: widths are those of an electrostatic point-charge embedding of
the sampled configurations; environment polarisation, the dynamics of the
environment between frames and the finite sample are not in the model
(the last is quantified by the bootstrap intervals).
"""

from __future__ import annotations

import os
import threading
from dataclasses import dataclass, field
from typing import Any, Callable, Sequence

import numpy as np
import pandas as pd

from ..errors import InputError, ProvenanceError
from ..film import Film
from ..qm.method import Method, require_method
from ..ranges import is_id_text, parse_frames, parse_ids, parse_radii
from ..runner import RunReport
from ..stats import (conformational_environmental, disorder_stats, grouped_disorder_stats, spatial_correlation,
                     static_dynamic)
from ..store import ResultStore
from .scan import open_store
from .tasks import check_film_method, cluster_task, narrate_tasks, run_cluster_tasks

#: the molecule-centroid columns of a site table (Å)
CENTROID_COLUMNS = ("centroid_x_A", "centroid_y_A", "centroid_z_A")


def choose_molecules(film: Film, molecules: Any = "all", *, n: int | None = None,
                     seed: int | None = None, species: str | Sequence[str] | None = None) -> np.ndarray:
    """Molecule ids for a sample.

    Parameters
    ----------
    molecules : "all", ids in the text grammar of :mod:`clusterlab.ranges`
        (``"0-9, 20"``, ends included), a species selection (``"species:GST"``),
        an MDAnalysis selection string (e.g. ``"resname GST"``), or a sequence of ids.
    n : int, optional
        Draw ``n`` of them at random without replacement (reproducible by ``seed``).
    species : str or sequence of str, optional
        Keep only molecules of these species (before drawing ``n``): a
        "guest only" sample of a doped film is ``species="GST"``.

    Raises
    ------
    InputError
        A bad id text or id, an int instead of a list, a species no molecule
        carries (the message lists the species), or ``n`` larger than the selection.
    """
    if isinstance(molecules, str):
        if is_id_text(molecules):
            ids = parse_ids(molecules, film.n_molecules)
        else:
            ids = film.select(molecules)
    elif isinstance(molecules, (int, np.integer)):
        raise InputError(f"molecules={molecules!r}: give 'all', a selection string or a list of ids; "
                         "use n= for a random sample of that size.")
    else:
        ids = parse_ids(molecules, film.n_molecules)
    if species is not None:
        ids = film.select(np.asarray(ids).tolist(), species=species)
    if n is not None:
        if not isinstance(n, (int, np.integer)) or n < 1:
            raise InputError(f"n={n!r} must be a positive integer.")
        if n > len(ids):
            raise InputError(f"n={n} exceeds the {len(ids)} molecules selected.")
        ids = np.sort(np.random.default_rng(seed).choice(ids, size=int(n), replace=False))
    return np.asarray(ids, dtype=np.int64)


def choose_frames(film: Film, frames: Any = None) -> list[int]:
    """Frame indices: None (all), text in the grammar of :mod:`clusterlab.ranges`
    (``"0-19:5"``, ends included; ``"-1"`` the last frame), an int, a slice or a list.

    Raises
    ------
    InputError
        A bad frame text or a frame out of range.
    """
    return parse_frames(frames, film.n_frames)


def site_table(store: ResultStore | str | os.PathLike[str], *, film: Film | None = None,
               kinds: Sequence[str] = ("excitations",), film_id: str | None = None,
               method_key: str | None = None) -> pd.DataFrame:
    """The finished site-energy records of one film and one method in a result store, as a tidy table.

    One row per stored cluster calculation of the given ``kinds`` (by default
    the finite-radius calculations of samples and scans; not the periodic
    limit, vacuum references or other record kinds). The records of one film
    and one method are read, never a mix: the film is ``film`` (its content
    id), else ``film_id``, else the only film of the store; the method is
    ``method_key``, else the only method of that film's records. With a
    ``film``, ``resname``, ``species`` and the molecule centroids (Å, from
    :meth:`Film.frame_geometry`) are added when the records lack them
    (without a film, records that lack ``species`` take their ``resname``).
    Hand-written records without a film id count as records of any film.

    Parameters
    ----------
    store : ResultStore or path
        A path is opened read-only and closed again.
    film : Film, optional
    kinds : sequence of str, default ("excitations",)
    film_id, method_key : str, optional
        Which film and method to read; a unique leading part of the id or key
        is enough. Needed when the store holds several.

    Returns
    -------
    pandas.DataFrame
        :meth:`ResultStore.to_frame` columns, ``molecule`` and ``frame`` as
        int, ``species`` (str) when the records or the film tell it.

    Raises
    ------
    clusterlab.errors.StudyFileError
        If the file is not a result store.
    ProvenanceError
        If the store holds several films or methods and none was chosen (the
        message lists them), or none of the one asked for (the message names
        the store's ids and the one asked for).
    InputError
        If no finished site-energy record (a column ending in ``_eV``) is left.
    """
    if isinstance(store, ResultStore):
        df, name = _site_records(store, kinds), str(store.path)
    else:
        name = os.fspath(store)
        with ResultStore(store, readonly=True) as st:
            df = _site_records(st, kinds)
    df = _one_film_one_method(df, name, film=film, film_id=film_id, method_key=method_key)
    energy_cols = [c for c in df.columns if str(c).endswith("_eV") and df[c].notna().any()]
    if not len(df) or not energy_cols:
        which = "" if film is None else f" of the film {film.topology_path!r}"
        raise InputError(f"result store {name!r} holds no finished site-energy records{which} "
                         f"(kinds {list(kinds)}; columns: {list(df.columns)}).")
    df = df.copy()
    df["molecule"] = df["molecule"].astype(int)
    df["frame"] = df["frame"].astype(int)
    if film is not None:
        if "resname" not in df.columns:
            df["resname"] = film.molecules["resname"].to_numpy()[df["molecule"].to_numpy()]
        if "species" not in df.columns or df["species"].isna().any():
            known = film.molecule_species[df["molecule"].to_numpy()]
            df["species"] = df["species"].fillna(pd.Series(known, index=df.index)) if "species" in df else known
        if not all(c in df.columns for c in CENTROID_COLUMNS):
            cent = np.full((len(df), 3), np.nan)
            for f, idx in df.groupby("frame").indices.items():
                geo = film.frame_geometry(int(f), periodic=film.has_box)
                cent[idx] = geo.centroids_A[df["molecule"].to_numpy()[idx]]
            for k, c in enumerate(CENTROID_COLUMNS):
                df[c] = cent[:, k]
    if "species" not in df.columns and "resname" in df.columns:  # records from before species: the resname
        df["species"] = df["resname"]
    return df.reset_index(drop=True)


def _site_records(store: ResultStore, kinds: Sequence[str]) -> pd.DataFrame:
    if not kinds:
        raise InputError("kinds must name at least one record kind, e.g. ('excitations',).")
    return pd.concat([store.to_frame(kind=k, status="done") for k in kinds], ignore_index=True)


def _pick_one(values: pd.Series, asked: str | None, what: str, flag: str, name: str,
              labels: dict[str, str]) -> str | None:
    """The one id among ``values`` (non-null): ``asked`` (a unique leading part
    is enough), or the only one; a ProvenanceError that lists the choices otherwise."""
    counts = values.dropna().astype(str).value_counts().sort_index()

    def choices() -> str:
        return "; ".join(f"{v}{labels.get(v, '')} ({n} records)" for v, n in counts.items())

    if asked is not None:
        if not isinstance(asked, str) or not asked:
            raise InputError(f"{flag}={asked!r} must be a non-empty string (a {what} or its leading part).")
        hits = [v for v in counts.index if v.startswith(asked)]
        if len(hits) == 1:
            return hits[0]
        if not hits:
            raise ProvenanceError(f"result store {name!r} holds no records of the {what} {asked!r}; "
                                  f"it holds: {choices() or 'none'}.")
        raise ProvenanceError(f"{flag}={asked!r} matches several {what}s of result store {name!r}: "
                              f"{choices()}; give more of it.")
    if len(counts) > 1:
        raise ProvenanceError(f"result store {name!r} holds records of {len(counts)} {what}s: {choices()}. "
                              f"Choose one with {flag}= (the leading part is enough); a number is never "
                              f"computed over several {what}s.")
    return counts.index[0] if len(counts) else None


def _one_film_one_method(df: pd.DataFrame, name: str, *, film: Film | None, film_id: str | None,
                         method_key: str | None) -> pd.DataFrame:
    """Rows of one film and one method (see :func:`site_table`)."""
    if not len(df):
        return df
    if "film.film_id" in df.columns:
        ids = df["film.film_id"]
        tops = {}
        if "film.topology" in df.columns:
            tops = {str(k): f" ({os.path.basename(str(v))})" for k, v in zip(ids, df["film.topology"])
                    if isinstance(k, str)}
        if film is not None:
            if film_id is not None and not film.film_id.startswith(str(film_id)):
                raise ProvenanceError(f"film_id={film_id!r} is not the id {film.film_id} of the film "
                                      f"{film.topology_path!r} given.")
            held = sorted(set(ids.dropna().astype(str)))
            if held and film.film_id not in held:
                raise ProvenanceError(
                    f"result store {name!r} holds results of the film(s) "
                    f"{', '.join(h + tops.get(h, '') for h in held)}, not of the film {film.film_id} "
                    f"({film.topology_path!r}) given: another film, or the same film with moved atoms "
                    "or other charges.")
            fid = film.film_id
        else:
            fid = _pick_one(ids, film_id, "film", "film_id", name, tops)
        if fid is not None:
            df = df[ids.isna() | (ids.astype(str) == fid)]
    elif film_id is not None:
        raise ProvenanceError(f"result store {name!r} records no film ids; film_id={film_id!r} cannot be checked.")
    if "method_key" in df.columns and len(df):
        labels = {}
        if {"method.xc", "method.basis"} <= set(df.columns):
            labels = {str(k): f" ({x}/{b})" for k, x, b in zip(df["method_key"], df["method.xc"], df["method.basis"])
                      if isinstance(k, str)}
        mk = _pick_one(df["method_key"], method_key, "method", "method_key", name, labels)
        if mk is not None:
            df = df[df["method_key"].isna() | (df["method_key"].astype(str) == mk)]
    elif method_key is not None:
        raise ProvenanceError(f"result store {name!r} records no method keys; method_key={method_key!r} "
                              "cannot be checked.")
    return df


@dataclass
class SiteSample:
    """A site-energy sample: tidy table plus statistics on it.

    ``table`` has one row per (frame, molecule, radius): ids, resname,
    species, centroid (Å), the site energies and shifts (eV) of every computed state,
    ``converged``. ``film_id`` and ``method`` name the one film and the one
    method every row belongs to (None when not known, e.g. hand-written records).
    """

    table: pd.DataFrame
    box: dict[int, np.ndarray | None] = field(default_factory=dict)
    report: RunReport | None = None
    failures: list[str] = field(default_factory=list)
    film_id: str | None = None
    method: Method | None = None
    #: the run's narration, one line per site (empty for a sample read from a store)
    log: list[str] = field(default_factory=list)

    @classmethod
    def from_store(cls, store: ResultStore | str | os.PathLike[str], *, film: Film | None = None,
                   kinds: Sequence[str] = ("excitations",), film_id: str | None = None,
                   method_key: str | None = None) -> SiteSample:
        """The sample of one film and one method held in a result store (see
        :func:`site_table`, which says how they are chosen); with a ``film``,
        the box of each frame for the correlation."""
        if isinstance(store, ResultStore):
            return cls._from_open_store(store, film, kinds, film_id, method_key)
        with ResultStore(store, readonly=True) as st:
            return cls._from_open_store(st, film, kinds, film_id, method_key)

    @classmethod
    def _from_open_store(cls, st: ResultStore, film: Film | None, kinds: Sequence[str], film_id: str | None,
                         method_key: str | None) -> SiteSample:
        table = site_table(st, film=film, kinds=kinds, film_id=film_id, method_key=method_key)
        box = {} if film is None else {int(f): film.box(int(f)) for f in np.unique(table.frame)}
        fid = film.film_id if film is not None else None
        if fid is None and "film.film_id" in table.columns:
            held = table["film.film_id"].dropna().unique()
            fid = str(held[0]) if len(held) == 1 else None
        method = None
        keys = table["method_key"].dropna().unique() if "method_key" in table.columns else []
        if len(keys) == 1:
            rec = st.get(str(table.loc[table["method_key"] == keys[0], "key"].iloc[0]))
            payload = (rec.spec.get("payload") or {}) if rec is not None else {}
            if isinstance(payload.get("method"), dict):
                method = Method.from_dict(payload["method"])
        return cls(table=table, box=box, film_id=fid, method=method)

    def _converged(self) -> pd.DataFrame:
        """Rows flagged converged (every row of a table without the flag)."""
        if "converged" not in self.table.columns:
            return self.table
        return self.table[self.table.converged.astype(bool)]

    def at(self, radius_A: float | None = None) -> pd.DataFrame:
        """Rows at one radius (default: the largest), converged only."""
        t = self._converged()
        if radius_A is None:
            radius_A = float(t.radius_A.max())
        return t[np.isclose(t.radius_A.astype(float), radius_A)]

    def stats(self, quantity: str = "S1_eV", *, radius_A: float | None = None, by: str | None = None,
              **kw: Any) -> pd.Series | pd.DataFrame:
        """:func:`disorder_stats` of one column at one radius.

        ``by="species"`` (or any other column of the table) gives one row per
        value of that column instead (:func:`~clusterlab.stats.grouped_disorder_stats`):
        the disorder of host and guest apart. ``**kw`` go to :func:`disorder_stats`.

        Raises
        ------
        InputError
            A quantity or ``by`` column the table does not have.
        """
        df = self.at(radius_A)
        if quantity not in df.columns:
            raise InputError(f"{quantity!r} is not a column of the sample; columns: {sorted(df.columns)}.")
        if by is None:
            return disorder_stats(df[quantity].to_numpy(dtype=float), **kw)
        if by not in df.columns:
            raise InputError(f"by={by!r} is not a column of the sample; use e.g. 'species' (columns: "
                             f"{sorted(df.columns)}).")
        return grouped_disorder_stats(df[quantity].to_numpy(dtype=float), df[by].astype(str).to_numpy(),
                                      name=by, **kw)

    def growth(self, quantity: str = "S1_shift_eV", **kw: Any) -> pd.DataFrame:
        """Mean and σ of ``quantity`` at each radius with confidence intervals:
        how the statistics converge as the cluster grows (``sigma_lo``,
        ``sigma_hi``: the reported σ interval, named in ``sigma_ci_method``)."""
        rows = []
        t = self._converged()
        for r, g in t.groupby("radius_A"):
            vals = g[quantity].to_numpy(dtype=float)
            if np.isfinite(vals).sum() < 3:
                continue
            s = disorder_stats(vals, **kw)
            # σ with the one reported interval (the rule of stats.SIGMA_BOOTSTRAP_MIN_N)
            rows.append({"radius_A": float(r), **{k: s[k] for k in ("n", "mean", "mean_lo", "mean_hi", "sigma")},
                         "sigma_lo": s["sigma_ci_lo"], "sigma_hi": s["sigma_ci_hi"],
                         "sigma_ci_method": s["sigma_ci_method"]})
        return pd.DataFrame(rows)

    def static_dynamic(self, quantity: str = "S1_eV", *, radius_A: float | None = None) -> pd.Series:
        return static_dynamic(self.at(radius_A), value=quantity)

    def conformational_environmental(self, state: str = "S1", *, radius_A: float | None = None) -> pd.Series:
        return conformational_environmental(self.at(radius_A), vacuum=f"{state}_vacuum_eV",
                                            shift=f"{state}_shift_eV")

    def correlation(self, quantity: str = "S1_eV", *, radius_A: float | None = None, **kw: Any) -> pd.DataFrame:
        """Spatial correlation of site energies vs centroid distance (periodic,
        pairs within the same frame; keywords of :func:`spatial_correlation`,
        e.g. ``n_boot`` for intervals)."""
        df = self.at(radius_A)
        boxes = {int(f): self.box.get(int(f)) for f in np.unique(df.frame.to_numpy())}
        return site_correlation(df, quantity, boxes=boxes, **kw)


def site_correlation(table: pd.DataFrame, quantity: str, *, film: Film | None = None,
                     boxes: dict[int, Any] | None = None, **kw: Any) -> pd.DataFrame:
    """:func:`spatial_correlation` of one column of a site table (one row per
    frame and molecule: a sample's or the film-wide model's), pairs within
    each frame.

    Positions are the table's centroid columns, or the film's molecule
    centroids when the table has none (the film-wide model's table); boxes
    are ``boxes`` or the film's.

    Raises
    ------
    InputError
        If ``quantity`` is not a column, or the table has no centroids and
        no film is given.
    """
    if quantity not in table.columns:
        raise InputError(f"{quantity!r} is not a column of the table; columns: {sorted(table.columns)}.")
    frames = table["frame"].to_numpy(dtype=int)
    if all(c in table.columns for c in CENTROID_COLUMNS):
        pos = table[list(CENTROID_COLUMNS)].to_numpy(dtype=float)
    elif film is not None:
        pos = np.empty((len(table), 3))
        mols = table["molecule"].to_numpy(dtype=int)
        for f in np.unique(frames):
            here = frames == f
            pos[here] = film.frame_geometry(int(f)).centroids_A[mols[here]]
    else:
        raise InputError("the table has no centroid columns "
                         f"{list(CENTROID_COLUMNS)}; pass film= to take the molecule centroids from it.")
    if boxes is None:
        boxes = {int(f): (film.box(int(f)) if film is not None else None) for f in np.unique(frames)}
    return spatial_correlation(pos, table[quantity].to_numpy(dtype=float), box=boxes, frames=frames, **kw)


def sample_sites(
    film: Film,
    molecules: Any,
    frames: Any,
    radius: float | Sequence[float],
    method: Method,
    *,
    store: ResultStore | str | None,
    n: int | None = None,
    seed: int | None = None,
    species: str | Sequence[str] | None = None,
    rule: str = "atom",
    qm_shell: float = 0.0,
    runner: str = "processes",
    progress: bool = True,
    on_result: Callable[[dict], Any] | None = None,
    cancel: threading.Event | None = None,
    on_step: Callable[[str], Any] | None = None,
    **runner_kw: Any,
) -> SiteSample:
    """Embedded site energies of many molecules and frames.

    Parameters
    ----------
    film : Film
    molecules : "all", id text, species text (``"species:GST"``), selection string, or list of
        ids (see :func:`choose_molecules`)
    frames : None (all), frame text (``"0-19:5"``, see :mod:`clusterlab.ranges`), int, slice or list
    radius : float, sequence of float or radius text (``"6-12:3"``), Å
        One radius, or several for the growth of the statistics with the cluster.
    method : Method
    store : ResultStore or path
        Every result is stored as it arrives; a re-run skips what is there.
    n, seed : random sub-sample of the selected molecules
    species : str or sequence of str, optional
        Only molecules of these species (e.g. ``"GST"`` for a guest-only
        sample of a doped film), before the sub-sample is drawn.
    runner : "processes" (default), "serial", "dask" or a Runner
    on_result : callable(dict), optional
        Called with each finished row.
    on_step : callable(str), optional
        Gets the narration as it happens: the number of sites to compute,
        then one line per finished site (molecules, charges, S1 shift, its
        time, elapsed time and the time left, the next site); the lines are
        also in ``SiteSample.log``.

    Returns
    -------
    SiteSample
    """
    require_method(method, "sample_sites")
    ids = choose_molecules(film, molecules, n=n, seed=seed, species=species)
    fr = choose_frames(film, frames)
    radii = parse_radii(radius)
    check_film_method(film, method)
    st = open_store(store)
    # molecule-major order, radii innermost, so one worker's warm starts chain
    tasks = [cluster_task(film, int(m), r, method, frame=f, rule=rule, qm_shell_A=qm_shell)
             for f in fr for m in ids for r in radii]

    narration = narrate_tasks(tasks, st, on_step, site=True, what="sites")
    report, rows, failures = run_cluster_tasks(tasks, st, desc="site energies", on_result=on_result,
                                               narration=narration, runner=runner, progress=progress,
                                               cancel=cancel, **runner_kw)
    table = pd.DataFrame(rows)
    if len(table):
        table = table.sort_values(["radius_A", "frame", "molecule"], kind="stable").reset_index(drop=True)
    boxes = {f: film.box(f) for f in fr}
    return SiteSample(table=table, box=boxes, report=report, failures=failures, film_id=film.film_id,
                      method=method, log=narration.log.lines)
