"""Radius convergence: how the environment shift grows with the cluster.

:func:`radius_scan` runs the embedded calculation of one molecule at each cut
radius (plus vacuum, and optionally the periodic Ewald limit) through the
common runner and store, and judges the converged radius with
:func:`clusterlab.stats.converged_radius`.

Model notes: each radius is a point-charge (electrostatic) embedding of a
fixed ground-state charge distribution; with a fixed-charge method the
environment does not polarise in response to the QM region. With
``Method(environment="polarizable")`` the clusters have two layers
(polarizable molecules within the inner radius, fixed charges beyond): the
scan can grow the outer radius at a given inner radius and/or the inner
radius at the largest outer radius, and the verdict covers both (each names
its radius). The periodic limit is refused for a polarizable method (the
induced dipoles are not periodic). There is no
exchange repulsion or dispersion, so the shifts are model estimates.
"""

from __future__ import annotations

import math
import os
import tempfile
import threading
from dataclasses import dataclass, field
from typing import Any, Callable, Sequence

import numpy as np
import pandas as pd

from ..errors import InputError
from ..film import Film
from ..geometry import box_vectors
from ..qm.method import Method, check_periodic_environment, require_method
from ..ranges import SPECIES_GRAMMAR, parse_species
from ..runner import RunReport
from ..stats import ConvergenceVerdict, converged_radius
from ..store import ResultStore
from .tasks import check_film_method, cluster_task, narrate_tasks, run_cluster_tasks

#: the columns a scan tracks for convergence, when present
TRACKED = ("S1_shift_eV", "T1_shift_eV", "dEST_eV", "S1_followed_shift_eV", "IP_shift_eV", "EA_shift_eV")

#: the polarization contributions a polarizable scan also tracks
TRACKED_POLARIZATION = ("S1_polarization_eV", "T1_polarization_eV", "IP_polarization_eV", "EA_polarization_eV")

#: how the verdicts of a polarizable scan name the radius they judge
OUTER_LABEL = "outer radius"
INNER_LABEL = "inner (polarizable) radius"

SCAN_COLUMNS = ("radius_A", "n_env_molecules", "n_charges", "net_env_charge", "S1_eV", "S1_shift_eV",
                "S1_osc", "S1_followed_shift_eV", "S1_follow_overlap", "T1_eV", "T1_shift_eV", "dEST_eV",
                "IP_eV", "IP_shift_eV", "EA_eV", "EA_shift_eV", "converged", "wall_s")


def open_store(store: ResultStore | str | os.PathLike[str] | None) -> ResultStore:
    """A :class:`ResultStore` from a store, a path, or None (a temporary file)."""
    if isinstance(store, ResultStore):
        return store
    if store is None:
        return ResultStore(os.path.join(tempfile.mkdtemp(prefix="clusterlab-"), "results.sqlite"))
    return ResultStore(store)


def pick_species_molecule(film: Film, species: str, *, frame: int = 0, seed: int | None = None) -> int:
    """The molecule of ``species`` a radius scan is run on.

    Without ``seed``: the molecule of that species whose centroid (frame
    ``frame``, primary cell) lies nearest the centre of the box (of the
    centroids' bounding box for a film without a box); equal distances go
    to the lowest id. With ``seed``: one molecule of the species drawn at
    random by ``numpy.random.default_rng(seed)``.

    Raises
    ------
    InputError
        A species no molecule carries (the message lists the species), or
        several species.
    """
    names = film.check_species(species)
    if len(names) != 1:
        raise InputError(f"a radius scan runs on one molecule: give one species, not {names}.")
    ids = film.select(species=names)
    if seed is not None:
        return int(np.random.default_rng(seed).choice(ids))
    geo = film.frame_geometry(frame, periodic=film.has_box)
    cent = geo.centroids_A
    if geo.box is not None:
        centre = 0.5 * box_vectors(geo.box).sum(axis=0)
    else:
        centre = 0.5 * (cent.min(axis=0) + cent.max(axis=0))
    d = np.linalg.norm(cent[ids] - centre, axis=1)
    return int(ids[np.argmin(np.round(d, 9))])


def scan_molecule(film: Film, molecule: Any, *, frame: int = 0) -> int:
    """``molecule`` of :func:`radius_scan` as an id: an id as it is, a species
    text ``"species:GST"`` as :func:`pick_species_molecule` picks it.

    Raises
    ------
    InputError
        Text that is not a species selection, or an unknown species;
        :class:`~clusterlab.errors.CarvingError` for a bad id.
    """
    if isinstance(molecule, str):
        names = parse_species(molecule)
        if names is None:
            raise InputError(f"molecule={molecule!r}: give a molecule id or one species as 'species:NAME'. "
                             f"{SPECIES_GRAMMAR}")
        if len(names) != 1:
            raise InputError(f"molecule={molecule!r}: a radius scan runs on one molecule; name one species.")
        return pick_species_molecule(film, names[0], frame=frame)
    return film.check_molecule(molecule)


def _check_radii(radii: Sequence[float]) -> list[float]:
    try:
        r = [float(x) for x in radii]
    except (TypeError, ValueError) as exc:
        raise InputError(f"radii must be numbers of Å; got {radii!r}.") from exc
    if not r:
        raise InputError("radii is empty; give at least one cut radius in Å.")
    bad = [x for x in r if not (np.isfinite(x) and x > 0)]
    if bad:
        raise InputError(f"radii must be positive and finite; got {bad}. (The vacuum and periodic limits are added "
                         "by the scan itself.)")
    if len(set(r)) != len(r):
        raise InputError(f"radii contain duplicates: {r}.")
    return sorted(r)


@dataclass
class ScanResult:
    """A radius scan of one molecule.

    Attributes
    ----------
    table : pandas.DataFrame
        One row per radius (ascending), a first row ``radius_A = 0`` for the
        vacuum and, with the periodic limit, a last row ``radius_A = inf``.
        Columns :data:`SCAN_COLUMNS` (shifts in eV relative to vacuum).
    verdict : ConvergenceVerdict
    tracked : list of str
        The quantities the verdict covers.
    periodic : dict or None
        The periodic-limit values of the tracked quantities.
    report : RunReport
    species : str or None
        Species of the scanned molecule.
    polarizable_table : pandas.DataFrame or None
        The inner-radius series of a polarizable scan (outer radius fixed at
        the largest of ``radii``): one row per inner radius, ascending, a
        first row at inner radius 0 (fixed charges, polarization 0).
    polarizable_verdict : ConvergenceVerdict or None
        Convergence of the polarization contributions with the inner radius.
    log : list of str
        The run's narration (see ``on_step`` of :func:`radius_scan`).
    """

    table: pd.DataFrame
    verdict: ConvergenceVerdict
    tracked: list[str]
    molecule: int
    frame: int
    method: Method
    tol_eV: float
    periodic: dict[str, float] | None = None
    report: RunReport | None = None
    notes: list[str] = field(default_factory=list)
    polarizable_table: pd.DataFrame | None = None
    polarizable_verdict: ConvergenceVerdict | None = None
    species: str | None = None
    log: list[str] = field(default_factory=list)

    def to_frame(self) -> pd.DataFrame:
        return self.table.copy()

    @property
    def converged(self) -> bool:
        """Both verdicts (outer radius and, when scanned, inner radius) converged."""
        ok = self.verdict.converged
        if self.polarizable_verdict is not None:
            ok = ok and self.polarizable_verdict.converged
        return bool(ok)

    @property
    def message(self) -> str:
        """The verdict in words, both radii when both were scanned."""
        if self.polarizable_verdict is None:
            return self.verdict.message
        r_out = float(self.polarizable_table["radius_A"].max())  # the inner series' one outer radius
        return f"{self.verdict.message}; {self.polarizable_verdict.message} (at outer radius {r_out:g} Å)"

    def plot(self, **kw: Any):
        """Shift vs radius with the tolerance band (see :func:`plot_convergence`)."""
        from .plots import plot_convergence

        # default: the quantities the verdict judged, so the plot and the verdict count the same ones
        return plot_convergence(self.table[np.isfinite(self.table.radius_A) & (self.table.radius_A > 0)],
                                states=kw.pop("states", None) or self.tracked, tol_eV=self.tol_eV,
                                periodic=self.periodic, **kw)

    def __repr__(self) -> str:
        sp = f" ({self.species})" if self.species else ""
        return f"<ScanResult molecule={self.molecule}{sp} frame={self.frame}: {self.message}>"


def scan_tasks(film: Film, molecule: int, radii: Sequence[float], method: Method, *, frame: int = 0,
               rule: str = "atom", qm_shell: float = 0.0, periodic_limit: bool = False,
               polarizable_radius: float | None = None,
               polarizable_radii: Sequence[float] | None = None) -> list:
    """The tasks of a scan, smallest radius first (so warm starts chain): the
    outer radii (each with inner radius ``min(polarizable_radius, R)``), then
    the inner radii at the largest outer radius (a task both series share is
    listed once)."""
    def inner(r: float) -> float | None:
        return None if polarizable_radius is None else min(float(polarizable_radius), r)

    tasks = [cluster_task(film, molecule, r, method, frame=frame, rule=rule, qm_shell_A=qm_shell,
                          polarizable_radius_A=inner(r)) for r in radii]
    if polarizable_radii:
        seen = {t.key for t in tasks}
        for rp in polarizable_radii:
            t = cluster_task(film, molecule, max(radii), method, frame=frame, rule=rule, qm_shell_A=qm_shell,
                             polarizable_radius_A=rp)
            if t.key not in seen:
                tasks.append(t)
                seen.add(t.key)
    if periodic_limit:
        tasks.append(cluster_task(film, molecule, math.inf, method, frame=frame, rule=rule,
                                  qm_shell_A=qm_shell, kind="periodic"))
    return tasks


def radius_scan(
    film: Film,
    molecule: int | str,
    radii: Sequence[float],
    method: Method,
    *,
    frame: int = 0,
    rule: str = "atom",
    qm_shell: float = 0.0,
    periodic_limit: bool = False,
    polarizable_radius: float | None = None,
    polarizable_radii: Sequence[float] | None = None,
    tol_eV: float = 0.010,
    store: ResultStore | str | None = None,
    runner: str = "serial",
    progress: bool = True,
    on_result: Callable[[dict], Any] | None = None,
    cancel: threading.Event | None = None,
    on_step: Callable[[str], Any] | None = None,
    **runner_kw: Any,
) -> ScanResult:
    """Embedded excitations of one molecule at growing cut radii.

    Parameters
    ----------
    film : Film
    molecule : int or str
        A molecule id, or one species as ``"species:GST"``: then the
        molecule of that species nearest the box centre in ``frame``
        (:func:`pick_species_molecule`; pass its ``seed=`` choice as an id
        for a random one).
    radii : sequence of float, Å
    method : Method
    frame : int
    rule : {"atom", "centroid"}
    qm_shell : float, Å
    periodic_limit : bool
        Also compute the Ewald-embedded limit (orthorhombic boxes); the
        verdict is then judged against it. Fixed-charge methods only: with
        ``Method(environment="polarizable")`` it is refused (InputError)
        before anything runs, since the induced dipoles are not periodic; scan
        the polarizable method without it and run the periodic limit in a
        second scan with ``method.replace(environment="charges")``.
    polarizable_radius : float, Å, optional
        With a polarizable method: the inner radius of the outer-radius
        series (at each radius ``min(polarizable_radius, R)``; default
        :data:`~clusterlab.study.tasks.DEFAULT_POLARIZABLE_RADIUS_A`).
    polarizable_radii : sequence of float, Å, optional
        With a polarizable method: also scan the inner radius at the largest
        outer radius (``ScanResult.polarizable_table`` and
        ``polarizable_verdict``, judged on the polarization contributions).
    tol_eV : float
        Convergence tolerance (default 10 meV).
    store : ResultStore, path or None
        Results go here and are reused on a re-run (None: a temporary file).
    runner : str
        ``"serial"`` (default; consecutive radii reuse the vacuum calculation
        and start from the previous density) or any runner of
        :func:`clusterlab.runner.run_tasks`.
    on_result : callable(dict), optional
        Called with each finished radius's row (for live plots).
    cancel : threading.Event, optional
    on_step : callable(str), optional
        Gets the narration as it happens: the radii to compute and the first
        (with the vacuum reference), then one line per finished radius
        ("radius 8 Å: 33 molecules, 528 charges, S1 shift -87.3 meV, 12 s
        (2 of 3; elapsed 30 s, about 15 s left); next: radius 11 Å"); the
        lines are also in ``ScanResult.log``.

    Returns
    -------
    ScanResult
        With a polarizable method both verdicts name the radius they judge
        (``"outer radius"``, ``"inner (polarizable) radius"``) and
        ``ScanResult.message`` joins them.

    Raises
    ------
    InputError
        Bad radii, a method PySCF cannot run on the film, ``polarizable_radii``
        with a fixed-charge method, ``periodic_limit=True`` with a polarizable
        method, or a scan that produced no result.
    """
    require_method(method, "radius_scan")
    if periodic_limit:
        check_periodic_environment(method, "radius_scan(periodic_limit=True)")
    molecule = scan_molecule(film, molecule, frame=frame)
    radii = _check_radii(radii)
    check_film_method(film, method)
    if polarizable_radii is not None:
        if not method.is_polarizable:
            raise InputError("polarizable_radii needs Method(environment='polarizable'); this method has fixed "
                             "charges.")
        polarizable_radii = _check_radii(polarizable_radii)
    st = open_store(store)
    tasks = scan_tasks(film, molecule, radii, method, frame=frame, rule=rule, qm_shell=qm_shell,
                       periodic_limit=periodic_limit, polarizable_radius=polarizable_radius,
                       polarizable_radii=polarizable_radii)
    n_outer = len(radii)

    narration = narrate_tasks(tasks, st, on_step, site=False, what="radii")
    report, rows, failures = run_cluster_tasks(tasks, st, desc=f"radius scan m{molecule}", on_result=on_result,
                                               narration=narration, runner=runner, progress=progress,
                                               cancel=cancel, **runner_kw)
    if not rows:
        raise InputError("The scan produced no results" + (f": {failures}" if failures else
                         " (cancelled before the first radius finished)."))
    inner_table, inner_verdict = None, None
    if polarizable_radii:
        inner_table, inner_verdict = _inner_series(st, tasks, radii, polarizable_radii, tol_eV)
        outer = tasks[:n_outer] + (tasks[-1:] if periodic_limit else [])
        rows = [dict(rec.summary) for rec in (st.get(t.key) for t in outer) if rec is not None and rec.done]
        if not rows:
            raise InputError("No outer-radius result finished: " + "; ".join(failures))
    df = pd.DataFrame(rows)
    vac = _vacuum_row(rows[0])
    table = pd.concat([pd.DataFrame([vac]), df], ignore_index=True)
    table["radius_A"] = table["radius_A"].astype(float)
    table = table.sort_values("radius_A", kind="stable").reset_index(drop=True)
    cols = [c for c in SCAN_COLUMNS if c in table.columns] + [c for c in table.columns if c not in SCAN_COLUMNS]
    table = table[cols]
    # judged on the embedded rows only: the vacuum row's 0.0 shift says nothing about a quantity the
    # method did not compute (T1 with n_triplets=0 has NaN at every radius)
    embedded = table[table.radius_A > 0]
    tracked = [c for c in TRACKED if c in table.columns and embedded[c].notna().any()]
    tracked += [c for c in TRACKED_POLARIZATION if c in table.columns and embedded[c].notna().sum() >= 2]
    finite = table[np.isfinite(table.radius_A) & (table.radius_A > 0)]
    periodic = None
    per_rows = table[np.isinf(table.radius_A)]
    if len(per_rows):
        periodic = {c: float(per_rows.iloc[0][c]) for c in tracked}
    if len(finite) == 0:
        raise InputError("No finite-radius result to judge convergence on: " + "; ".join(failures))
    ref = None if periodic is None else pd.Series(periodic)
    verdict = converged_radius(finite.radius_A.to_numpy(), finite[tracked], tol=tol_eV, reference=ref,
                               radius_label=OUTER_LABEL if method.is_polarizable else None)
    notes = list(failures)
    if polarizable_radii and inner_verdict is None:
        notes.append("the inner-radius series has fewer than two finite polarization contributions; no verdict "
                     "on the inner radius")
    if not finite.converged.all():
        notes.append("some radii did not converge (converged=False rows); the verdict uses their NaN values")
    return ScanResult(table=table, verdict=verdict, tracked=tracked, molecule=int(molecule), frame=int(frame),
                      method=method, tol_eV=tol_eV, periodic=periodic, report=report, notes=notes,
                      polarizable_table=inner_table, polarizable_verdict=inner_verdict,
                      species=str(film.molecule_species[int(molecule)]), log=narration.log.lines)


def _inner_series(st: ResultStore, tasks: list, radii: list[float], polarizable_radii: list[float],
                  tol_eV: float) -> tuple[pd.DataFrame | None, ConvergenceVerdict | None]:
    """Table and verdict of the inner radii at the largest outer radius."""
    r_out = max(radii)
    rows = []
    for t in tasks:
        rec = st.get(t.key)
        if t.kind != "periodic" and float(t.payload["radius_A"]) == r_out and rec is not None and rec.done:
            rows.append(dict(rec.summary))
    rows = [r for r in rows if r.get("polarizable_radius_A") in polarizable_radii]
    if not rows:
        return None, None
    first = rows[0]
    zero = {k: first.get(k) for k in ("frame", "molecule", "radius_A", "rule", "method_key")}
    zero.update({"polarizable_radius_A": 0.0, "n_polarizable": 0, "kind": "fixed charges", "converged": True})
    for q in ("S1", "T1", "IP", "EA"):
        if np.isfinite(first.get(f"{q}_fixed_eV", np.nan)):
            zero[f"{q}_eV"] = first[f"{q}_fixed_eV"]
            zero[f"{q}_polarization_eV"] = 0.0
    table = pd.concat([pd.DataFrame([zero]), pd.DataFrame(rows)], ignore_index=True)
    table = table.sort_values("polarizable_radius_A", kind="stable").reset_index(drop=True)
    pos = table[table.polarizable_radius_A > 0]
    tracked = [c for c in TRACKED_POLARIZATION if c in table.columns and pos[c].notna().sum() >= 2]
    if not tracked or len(pos) == 0:
        return table, None
    verdict = converged_radius(pos.polarizable_radius_A.to_numpy(), pos[tracked], tol=tol_eV,
                               radius_label=INNER_LABEL)
    return table, verdict


def _vacuum_row(row: dict) -> dict:
    """The vacuum row from any embedded result of the same QM region."""
    out = {k: row.get(k) for k in ("frame", "molecule", "resname", "species", "rule", "qm_shell_A", "method_key",
                                    "centroid_x_A", "centroid_y_A", "centroid_z_A")}
    out.update({"radius_A": 0.0, "n_env_molecules": 0, "n_charges": 0, "net_env_charge": 0.0,
                "kind": "vacuum", "converged": True})
    for q in ("S1", "T1", "IP", "EA"):
        vac = row.get(f"{q}_vacuum_eV")
        if vac is not None and np.isfinite(vac):  # a state the method did not compute has no vacuum row value
            out[f"{q}_eV"] = vac
            out[f"{q}_vacuum_eV"] = vac
            out[f"{q}_shift_eV"] = 0.0
    if "dEST_vacuum_eV" in row:
        out["dEST_eV"] = row["dEST_vacuum_eV"]
    if "S1_followed_shift_eV" in row:
        out["S1_followed_shift_eV"] = 0.0
    return out
