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

from ..errors import InputError
from ..film import Film
from ..qm.method import Method
from ..ranges import is_id_text, parse_frames, parse_ids, parse_radii
from ..runner import RunReport
from ..stats import conformational_environmental, disorder_stats, spatial_correlation, static_dynamic
from ..store import ResultStore
from .scan import open_store
from .tasks import cluster_task, run_cluster_tasks

#: the molecule-centroid columns of a site table (Å)
CENTROID_COLUMNS = ("centroid_x_A", "centroid_y_A", "centroid_z_A")


def choose_molecules(film: Film, molecules: Any = "all", *, n: int | None = None,
                     seed: int | None = None) -> np.ndarray:
    """Molecule ids for a sample.

    Parameters
    ----------
    molecules : "all", ids in the text grammar of :mod:`clusterlab.ranges`
        (``"0-9, 20"``, ends included), an MDAnalysis selection string (e.g.
        ``"resname GST"``), or a sequence of ids.
    n : int, optional
        Draw ``n`` of them at random without replacement (reproducible by ``seed``).

    Raises
    ------
    InputError
        A bad id text or id, an int instead of a list, or ``n`` larger than the selection.
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
               kinds: Sequence[str] = ("excitations",)) -> pd.DataFrame:
    """The finished site-energy records of a result store as a tidy table.

    One row per stored cluster calculation of the given ``kinds`` (by default
    the finite-radius calculations of samples and scans; not the periodic
    limit, vacuum references or other record kinds). With a ``film``, only
    its records are kept (those carrying another film's content id are left
    out; hand-written records without one are kept), and ``resname`` and the
    molecule centroids (Å, from :meth:`Film.frame_geometry`) are added when
    the records lack them.

    Parameters
    ----------
    store : ResultStore or path
        A path is opened read-only and closed again.
    film : Film, optional
    kinds : sequence of str, default ("excitations",)

    Returns
    -------
    pandas.DataFrame
        :meth:`ResultStore.to_frame` columns, ``molecule`` and ``frame`` as int.

    Raises
    ------
    clusterlab.errors.StudyFileError
        If the file is not a result store.
    InputError
        If no finished site-energy record (a column ending in ``_eV``) is left.
    """
    if isinstance(store, ResultStore):
        df, name = _site_records(store, kinds), str(store.path)
    else:
        name = os.fspath(store)
        with ResultStore(store, readonly=True) as st:
            df = _site_records(st, kinds)
    if film is not None and len(df) and "film.film_id" in df.columns:
        ids = df["film.film_id"]
        df = df[ids.isna() | (ids.astype(str) == film.film_id)]
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
        if not all(c in df.columns for c in CENTROID_COLUMNS):
            cent = np.full((len(df), 3), np.nan)
            for f, idx in df.groupby("frame").indices.items():
                geo = film.frame_geometry(int(f), periodic=film.has_box)
                cent[idx] = geo.centroids_A[df["molecule"].to_numpy()[idx]]
            for k, c in enumerate(CENTROID_COLUMNS):
                df[c] = cent[:, k]
    return df.reset_index(drop=True)


def _site_records(store: ResultStore, kinds: Sequence[str]) -> pd.DataFrame:
    if not kinds:
        raise InputError("kinds must name at least one record kind, e.g. ('excitations',).")
    return pd.concat([store.to_frame(kind=k, status="done") for k in kinds], ignore_index=True)


@dataclass
class SiteSample:
    """A site-energy sample: tidy table plus statistics on it.

    ``table`` has one row per (frame, molecule, radius): ids, resname,
    centroid (Å), the site energies and shifts (eV) of every computed state,
    ``converged``.
    """

    table: pd.DataFrame
    box: dict[int, np.ndarray | None] = field(default_factory=dict)
    report: RunReport | None = None
    failures: list[str] = field(default_factory=list)

    @classmethod
    def from_store(cls, store: ResultStore | str | os.PathLike[str], *, film: Film | None = None,
                   kinds: Sequence[str] = ("excitations",)) -> SiteSample:
        """The sample held in a result store (see :func:`site_table`); with a
        ``film``, its records only and the box of each frame for the correlation."""
        table = site_table(store, film=film, kinds=kinds)
        box = {} if film is None else {int(f): film.box(int(f)) for f in np.unique(table.frame)}
        return cls(table=table, box=box)

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

    def stats(self, quantity: str = "S1_eV", *, radius_A: float | None = None, **kw: Any) -> pd.Series:
        """:func:`disorder_stats` of one column at one radius."""
        df = self.at(radius_A)
        if quantity not in df.columns:
            raise InputError(f"{quantity!r} is not a column of the sample; columns: {sorted(df.columns)}.")
        return disorder_stats(df[quantity].to_numpy(dtype=float), **kw)

    def growth(self, quantity: str = "S1_shift_eV", **kw: Any) -> pd.DataFrame:
        """Mean and σ of ``quantity`` at each radius with confidence intervals:
        how the statistics converge as the cluster grows."""
        rows = []
        t = self._converged()
        for r, g in t.groupby("radius_A"):
            vals = g[quantity].to_numpy(dtype=float)
            if np.isfinite(vals).sum() < 3:
                continue
            s = disorder_stats(vals, **kw)
            rows.append({"radius_A": float(r), **{k: s[k] for k in
                         ("n", "mean", "mean_lo", "mean_hi", "sigma", "sigma_lo", "sigma_hi")}})
        return pd.DataFrame(rows)

    def static_dynamic(self, quantity: str = "S1_eV", *, radius_A: float | None = None) -> pd.Series:
        return static_dynamic(self.at(radius_A), value=quantity)

    def conformational_environmental(self, state: str = "S1", *, radius_A: float | None = None) -> pd.Series:
        return conformational_environmental(self.at(radius_A), vacuum=f"{state}_vacuum_eV",
                                            shift=f"{state}_shift_eV")

    def correlation(self, quantity: str = "S1_eV", *, radius_A: float | None = None, **kw: Any) -> pd.DataFrame:
        """Spatial correlation of site energies vs centroid distance (periodic,
        pairs within the same frame)."""
        df = self.at(radius_A)
        pos = df[list(CENTROID_COLUMNS)].to_numpy(dtype=float)
        frames = df.frame.to_numpy()
        boxes = {int(f): self.box.get(int(f)) for f in np.unique(frames)}
        return spatial_correlation(pos, df[quantity].to_numpy(dtype=float), box=boxes, frames=frames, **kw)


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
    rule: str = "atom",
    qm_shell: float = 0.0,
    runner: str = "processes",
    progress: bool = True,
    on_result: Callable[[dict], Any] | None = None,
    cancel: threading.Event | None = None,
    **runner_kw: Any,
) -> SiteSample:
    """Embedded site energies of many molecules and frames.

    Parameters
    ----------
    film : Film
    molecules : "all", id text, selection string, or list of ids (see :func:`choose_molecules`)
    frames : None (all), frame text (``"0-19:5"``, see :mod:`clusterlab.ranges`), int, slice or list
    radius : float, sequence of float or radius text (``"6-12:3"``), Å
        One radius, or several for the growth of the statistics with the cluster.
    method : Method
    store : ResultStore or path
        Every result is stored as it arrives; a re-run skips what is there.
    n, seed : random sub-sample of the selected molecules
    runner : "processes" (default), "serial", "dask" or a Runner
    on_result : callable(dict), optional
        Called with each finished row.

    Returns
    -------
    SiteSample
    """
    if not isinstance(method, Method):
        raise InputError(f"method must be a clusterlab.Method; got {type(method).__name__}.")
    ids = choose_molecules(film, molecules, n=n, seed=seed)
    fr = choose_frames(film, frames)
    radii = parse_radii(radius)
    st = open_store(store)
    # molecule-major order, radii innermost, so one worker's warm starts chain
    tasks = [cluster_task(film, int(m), r, method, frame=f, rule=rule, qm_shell_A=qm_shell)
             for f in fr for m in ids for r in radii]

    report, rows, failures = run_cluster_tasks(tasks, st, desc="site energies", on_result=on_result,
                                               runner=runner, progress=progress, cancel=cancel, **runner_kw)
    table = pd.DataFrame(rows)
    if len(table):
        table = table.sort_values(["radius_A", "frame", "molecule"], kind="stable").reset_index(drop=True)
    boxes = {f: film.box(f) for f in fr}
    return SiteSample(table=table, box=boxes, report=report, failures=failures)
