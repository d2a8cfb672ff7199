"""The work unit of every study: one embedded cluster calculation.

:func:`cluster_task` describes a calculation as a small JSON spec
(:class:`~clusterlab.runner.Task`); :func:`run_cluster_task` is the worker
function that rebuilds the film from its files, carves the cluster and runs
the quantum engine. Workers keep, per process, the last result of each QM
region so that consecutive radii of one molecule reuse its vacuum
calculation and start from its density (warm starts), whichever runner
executes them.
"""

from __future__ import annotations

import math
import os
import threading
from collections import OrderedDict
from typing import Any

import numpy as np

from ..versions import __version__
from ..errors import InputError
from ..film import Film, check_polarizable_radius, film_from_spec, remember_film
from ..qm.method import Method, check_periodic_environment, require_method
from ..progress import StepLog
from ..runner import RunReport, Task, run_tasks
from ..store import ResultStore, task_key

#: import path of the worker function, for the runner
TASK_FN = "clusterlab.study.tasks:run_cluster_task"

KINDS = ("excitations", "periodic")

_WARM: "OrderedDict[tuple, Any]" = OrderedDict()
_WARM_SIZE = 8
_WARM_LOCK = threading.Lock()
#: Last result per molecule kind (see _copy_key): its vacuum orbitals, rotated, start the next copy.
_COPIES: "OrderedDict[tuple, Any]" = OrderedDict()


def cluster_task(
    film: Film,
    molecule: int,
    radius_A: float,
    method: Method,
    *,
    frame: int = 0,
    rule: str = "atom",
    qm_shell_A: float = 0.0,
    kind: str = "excitations",
    polarizable_radius_A: float | None = None,
) -> Task:
    """Describe one cluster calculation as a :class:`~clusterlab.runner.Task`.

    The key hashes the film content, frame, molecule, radius, rule, QM shell,
    method and clusterlab version (and the polarizable radius, when there is
    one), so a re-run finds results it already has. ``kind="periodic"`` is
    the Ewald-embedded limit (radius ∞).

    ``polarizable_radius_A`` is the inner radius of a two-layer environment
    (only with ``method.environment == "polarizable"``); None there means
    ``min(radius_A, DEFAULT_POLARIZABLE_RADIUS_A)``.
    """
    if kind not in KINDS:
        raise InputError(f"kind={kind!r} is not valid; use one of {KINDS}.")
    molecule = film.check_molecule(molecule)
    frame = film.check_frame(frame)
    radius = math.inf if kind == "periodic" else float(radius_A)
    pol_r = polarizable_radius(radius, polarizable_radius_A, method, kind)
    remember_film(film)
    resname = str(film.molecule_resnames[molecule])
    payload = {
        "film": film.spec(), "frame": frame, "molecule": molecule,
        "radius_A": "inf" if math.isinf(radius) else radius, "rule": rule,
        "qm_shell_A": float(qm_shell_A), "method": method.to_dict(), "kind": kind, "resname": resname,
        "species": str(film.molecule_species[molecule]),
    }
    extra = {}
    if pol_r is not None:
        payload["polarizable_radius_A"] = extra["polarizable_radius_A"] = pol_r
    if float(qm_shell_A) > 0 and kind == "excitations":
        _warn_qm_shell(film, molecule, radius, frame, rule, float(qm_shell_A), method)
    key = task_key(film_id=film.film_id, frame=frame, molecule=molecule,
                   radius_A=payload["radius_A"], rule=rule, qm_shell_A=float(qm_shell_A),
                   method_key=method.key(), kind=kind, version=__version__, **extra)
    return Task(key=key, kind=kind, payload=payload)


def _warn_qm_shell(film: Film, molecule: int, radius_A: float, frame: int, rule: str, qm_shell_A: float,
                   method: Method) -> None:
    """Before any task runs: carve the cluster a QM shell makes and warn when its QM region is large
    (:func:`clusterlab.qm.engine.warn_qm_region_size`: atom count and a rough cost). A cluster that
    cannot be carved here is left to the worker, which raises the real error."""
    from ..errors import ClusterlabError
    from ..qm.engine import warn_qm_region_size

    try:
        cluster = film.carve(molecule, radius_A, frame=frame, rule=rule, qm_shell=qm_shell_A)
    except ClusterlabError:
        return
    warn_qm_region_size(cluster, method, stacklevel=3)


def check_film_method(film: Film, method: Method) -> None:
    """Check, before any task is queued, that PySCF knows ``method``'s
    functional and has its basis for every element of ``film``.

    Raises
    ------
    InputError
        Naming the functional, or the basis and the elements it lacks
        (:func:`clusterlab.qm.calc.check_method`).
    """
    from ..qm.calc import check_method

    require_method(method, "a study")
    check_method(method, sorted({str(s) for s in film.symbols}))


#: Inner (polarizable) radius, Å, of a polarizable method when none is given.
#: Measured on demo molecule 0 (bench/bench_polarizable.py, B3LYP/6-31G, outer
#: radius 10 Å; bench/results/bench_polarizable.txt): from 6 to 8 Å the
#: polarization contributions to S1, T1 and IP changed by 4, 0 and 5 meV
#: (-0.089, -0.006, -0.718 eV at 8 Å, 672 dipoles), the polarizable part cost
#: 1.7x more than at 6 Å. EA had not converged (+0.53 -> +0.65 eV: the 6-31G
#: anion is unbound and its diffuse electron follows the dipoles); scan the
#: inner radius (radius_scan(..., polarizable_radii=)) before trusting EA.
DEFAULT_POLARIZABLE_RADIUS_A = 8.0


def polarizable_radius(radius_A: float, polarizable_radius_A: float | None, method: Method,
                       kind: str = "excitations") -> float | None:
    """The inner radius a task carves with (checked once, here), or None for
    a fixed-charge method.

    Raises
    ------
    InputError
        An inner radius with a fixed-charge method, a polarizable method
        with the periodic limit (``kind="periodic"``: the induced dipoles are
        not periodic);
        :class:`~clusterlab.errors.CarvingError` (an InputError) for one
        that is not a number or not between 0 and ``radius_A``.
    """
    if not method.is_polarizable:
        if polarizable_radius_A is not None:
            raise InputError(f"polarizable_radius_A={polarizable_radius_A!r} needs "
                             "Method(environment='polarizable'); this method has fixed charges.")
        return None
    if kind == "periodic":
        check_periodic_environment(method, "cluster_task(kind='periodic')")
    if polarizable_radius_A is None:
        return float(min(radius_A, DEFAULT_POLARIZABLE_RADIUS_A))
    return check_polarizable_radius(polarizable_radius_A, radius_A)


def task_label(task: Task, *, site: bool = True) -> str:
    """A task in words: ``"frame 0, molecule 7, radius 8 Å"`` (``site=False``: ``"radius 8 Å"``;
    the periodic limit and an inner polarizable radius are named)."""
    p = task.payload
    where = f"frame {p['frame']}, molecule {p['molecule']}, " if site else ""
    if task.kind == "periodic":
        return f"{where}periodic limit"
    inner = p.get("polarizable_radius_A")
    return f"{where}radius {float(p['radius_A']):g} Å" + (f" (inner {float(inner):g} Å)" if inner else "")


def _result_words(summary: dict[str, Any]) -> str:
    """What a finished cluster was: molecules, charges, the S1 shift (meV), its time."""
    parts = []
    if summary.get("n_env_molecules") is not None:
        parts.append(f"{int(summary['n_env_molecules'])} molecules, {int(summary.get('n_charges') or 0)} charges")
    shift = summary.get("S1_shift_eV")
    if shift is not None and np.isfinite(shift):
        parts.append(f"S1 shift {1e3 * float(shift):+.1f} meV")
    if summary.get("wall_s") is not None and np.isfinite(summary["wall_s"]):
        parts.append(f"{float(summary['wall_s']):.0f} s")
    return ", ".join(parts) or "done"


class TaskNarration:
    """The narration of a task list (:func:`narrate_tasks`): a
    :class:`~clusterlab.progress.StepLog` and the tasks still pending."""

    def __init__(self, log: StepLog, todo: list[Task], *, site: bool) -> None:
        self.log = log
        self._labels = {t.key: task_label(t, site=site) for t in todo}
        self._pending = [t.key for t in todo]

    def finished(self, task: Task, summary: dict[str, Any]) -> str:
        """The line of a finished task, naming the next one."""
        if task.key in self._pending:
            self._pending.remove(task.key)
        nxt = f"; next: {self._labels[self._pending[0]]}" if self._pending else ""
        return self.log.finished(f"{self._labels.get(task.key, task_label(task))}: {_result_words(summary)}{nxt}")


def narrate_tasks(tasks: list[Task], store: ResultStore, on_step: Any = None, *, site: bool = True,
                  what: str = "clusters") -> TaskNarration:
    """The narration of the tasks not yet in the store, its first line written: how many to
    compute and the first one (which also computes the vacuum reference)."""
    todo = [t for t in tasks if not ((rec := store.get(t.key)) is not None and rec.done)]
    log = StepLog(len(todo), on_step)
    cached = len(tasks) - len(todo)
    head = f"{len(todo)} {what} to compute" + (f" ({cached} already in the store)" if cached else "")
    if todo:
        head += f"; first: vacuum reference and {task_label(todo[0], site=site)}"
    log.say(head)
    return TaskNarration(log, todo, site=site)


def run_cluster_tasks(tasks: list[Task], store: ResultStore, *, desc: str, on_result: Any = None,
                      narration: TaskNarration | None = None,
                      **run_kw: Any) -> tuple[RunReport, list[dict[str, Any]], list[str]]:
    """Run cluster tasks through :func:`~clusterlab.runner.run_tasks` and read
    their records back from the store, in task order.

    ``on_result(row)`` gets each new summary as it is stored; ``narration``
    (from :func:`narrate_tasks`) gets a line per finished task, with the next
    one named. Returns ``(report, rows, failures)``: the summaries of
    finished tasks (new or already stored) and one line per failed task
    naming frame, molecule and radius with the error.
    """
    def cb(task: Task, summary: dict[str, Any]) -> None:
        if narration is not None:
            narration.finished(task, summary)
        if on_result is not None:
            on_result(dict(summary))

    report = run_tasks(tasks, TASK_FN, store=store, desc=desc, on_result=cb, **run_kw)
    rows, failures = [], []
    for t in tasks:
        rec = store.get(t.key)
        if rec is None:
            continue
        if rec.done:
            rows.append(dict(rec.summary))
        else:
            failures.append(f"frame {t.payload['frame']} molecule {t.payload['molecule']} "
                            f"radius {t.payload['radius_A']}: {rec.error}")
    return report, rows, failures


def _copy_key(payload: dict[str, Any], cluster) -> tuple:
    """Copies of one molecule kind share their vacuum orbitals as SCF guesses:
    the same atoms in the same order and the same basis."""
    return (payload["film"]["film_id"], tuple(cluster.qm_symbols), Method.from_dict(payload["method"]).basis)


def _warm_key(payload: dict[str, Any]) -> tuple:
    return (payload["film"]["film_id"], payload["frame"], payload["molecule"],
            payload["qm_shell_A"], payload["rule"], Method.from_dict(payload["method"]).key())


def run_cluster_task(payload: dict[str, Any]) -> tuple[str, dict[str, Any]]:
    """Worker function: carve and compute one cluster; returns
    ``(result_json, summary)``. Runs in any process that can read the film
    files."""
    from ..qm.engine import excitations
    from ..qm.periodic import periodic_excitations

    film = film_from_spec(payload["film"])
    method = Method.from_dict(payload["method"])
    frame, mol = int(payload["frame"]), int(payload["molecule"])
    kind = payload.get("kind", "excitations")
    wkey = _warm_key(payload)
    with _WARM_LOCK:
        prev = _WARM.get(wkey)
    def same_region(cluster) -> bool:
        """The previous result of this molecule has this QM region and a converged vacuum to reuse."""
        ws = prev.warm_start if prev is not None else None
        return ws is not None and ws.fits(cluster) and prev.scf_converged and ws.vacuum is not None

    if kind == "periodic":
        cluster = film.cell_cluster(mol, frame=frame)
        # the scan's last step: its finite radii already computed this QM region's vacuum
        res = periodic_excitations(cluster, method, vacuum=prev if same_region(cluster) else True, guess=prev)
    else:
        cluster = film.carve(mol, float(payload["radius_A"]), frame=frame, rule=payload["rule"],
                             qm_shell=float(payload["qm_shell_A"]),
                             polarizable_radius=payload.get("polarizable_radius_A"))
        ckey = _copy_key(payload, cluster)
        if same_region(cluster):
            res = excitations(cluster, method, vacuum=prev, guess=prev)
        else:  # a new QM region: its vacuum SCF starts from the last copy of the same molecule
            with _WARM_LOCK:
                other = _COPIES.get(ckey)
            res = excitations(cluster, method, vacuum=True, copy_guess=other)
        if res.warm_start is not None and res.warm_start.vacuum is not None and res.warm_start.vacuum.converged:
            with _WARM_LOCK:
                _COPIES[ckey] = res
                _COPIES.move_to_end(ckey)
                while len(_COPIES) > _WARM_SIZE:
                    _COPIES.popitem(last=False)
        with _WARM_LOCK:
            _WARM[wkey] = res
            _WARM.move_to_end(wkey)
            while len(_WARM) > _WARM_SIZE:
                _WARM.popitem(last=False)
    geo = film.frame_geometry(frame)
    c = geo.centroids_A[mol]
    summary: dict[str, Any] = {
        "frame": frame, "molecule": mol, "resname": payload.get("resname", ""),
        "species": payload.get("species", payload.get("resname", "")),
        "radius_A": cluster.radius_A, "rule": payload["rule"], "qm_shell_A": float(payload["qm_shell_A"]),
        "n_env_molecules": cluster.n_env_molecules, "n_charges": cluster.n_charges,
        "net_env_charge": cluster.net_env_charge, "n_qm_molecules": len(cluster.qm_molecules),
        "centroid_x_A": float(c[0]), "centroid_y_A": float(c[1]), "centroid_z_A": float(c[2]),
        "method_key": method.key(), "kind": kind, "wall_s": float(res.meta.get("timings_s", {}).get("total", np.nan)),
        "pid": os.getpid(),
    }
    if method.is_polarizable:
        summary["environment"] = method.environment
    summary.update(res.summary())
    return res.to_json(), summary
