"""Charge-transfer integrals of film pairs through the runner and the result store.

:func:`transfer_task` describes the projective-dimer calculation of one
neighbour pair as a :class:`~clusterlab.runner.Task`; :func:`run_transfer_task`
is the worker function (it rebuilds the film from its spec, takes the two
molecules whole with ``j`` at the minimum-image position next to ``i``,
optionally surrounds the pair with the film's point charges, and calls
:func:`~clusterlab.qm.transfer.transfer_integrals`);
:func:`compute_transfer_integrals` runs many pairs with any runner, storing
each result as it arrives, so a re-run skips the pairs already stored.
"""

from __future__ import annotations

import json
import os
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt
import pandas as pd

from ..errors import InputError
from ..geometry import minimum_image
from ..qm.method import Method, require_method
from ..versions import __version__

if TYPE_CHECKING:  # pragma: no cover
    from ..film import Film
    from ..runner import Runner, Task
    from ..store import ResultStore

FloatArray = npt.NDArray[np.float64]

__all__ = ["TRANSFER_TASK_FN", "TRANSFER_KIND", "transfer_task", "run_transfer_task", "pair_geometry",
           "compute_transfer_integrals"]

#: import path of the worker function, for the runner
TRANSFER_TASK_FN = "clusterlab.export.transfer_tasks:run_transfer_task"
#: task kind in the store
TRANSFER_KIND = "transfer"

#: columns of :func:`compute_transfer_integrals`
TRANSFER_COLUMNS = ("frame", "i", "j", "J_hole_eV", "J_electron_eV", "converged", "distance_A",
                    "S_hole", "S_electron", "n_env_charges", "xc", "basis", "embed_radius_A", "error")


def transfer_task(
    film: "Film",
    frame: int,
    i: int,
    j: int,
    method: Method,
    *,
    embed_radius_A: float | None = None,
) -> "Task":
    """Describe the transfer-integral calculation of one pair as a Task.

    Parameters
    ----------
    film : Film
    frame : int
    i, j : int
        Molecule ids (any order; the task stores ``i < j``).
    method : clusterlab.Method
        Functional, basis and SCF settings of the three SCFs.
    embed_radius_A : float, Å, optional
        Surround the pair with the film's point charges of every whole
        molecule image with an atom within this distance of an atom of the
        pair (the pair itself excluded). ``None``: the pair in vacuum.

    Returns
    -------
    Task
        Kind ``"transfer"``; the key hashes the film content, frame, pair,
        method key, embedding radius and clusterlab version.

    Raises
    ------
    InputError
        For ``i == j``, a bad embedding radius, or bad molecule / frame ids.
    """
    from ..film import remember_film
    from ..runner import Task
    from ..store import task_key

    a, b = film.check_molecule(int(i)), film.check_molecule(int(j))
    if a == b:
        raise InputError(f"a transfer integral needs two different molecules; got i = j = {a}.")
    a, b = min(a, b), max(a, b)
    f = film.check_frame(frame)
    if embed_radius_A is not None:
        r = float(embed_radius_A)
        if not (np.isfinite(r) and r > 0):
            raise InputError(f"embed_radius_A must be a positive number of Å or None; got {embed_radius_A!r}.")
        if not film.has_box:
            raise InputError("embed_radius_A needs a film with a periodic box (point charges are carved periodically).")
        embed: float | None = r
    else:
        embed = None
    require_method(method, "transfer_task")
    remember_film(film)
    payload = {"film": film.spec(), "frame": f, "i": a, "j": b, "method": method.to_dict(),
               "embed_radius_A": embed, "kind": TRANSFER_KIND}
    key = task_key(film_id=film.film_id, frame=f, i=a, j=b, method_key=method.key(),
                   embed_radius_A=embed, kind=TRANSFER_KIND, version=__version__)
    return Task(key=key, kind=TRANSFER_KIND, payload=payload)


def pair_geometry(film: "Film", frame: int, i: int, j: int) -> tuple[list[str], FloatArray, list[str], FloatArray]:
    """Both molecules whole, ``j`` translated to its minimum-image position next to ``i``.

    Returns
    -------
    symbols_i : list of str
    pos_i : ndarray, shape (n_i, 3), Å
    symbols_j : list of str
    pos_j : ndarray, shape (n_j, 3), Å
        ``centroid(pos_j) - centroid(pos_i)`` is the minimum-image vector.
    """
    geo = film.frame_geometry(frame, periodic=film.has_box)
    ai, aj = film.molecule_atoms(i), film.molecule_atoms(j)
    ci, cj = geo.centroids_A[i], geo.centroids_A[j]
    d = minimum_image((cj - ci)[None, :], geo.box)[0] if geo.box is not None else cj - ci
    pi = np.asarray(geo.positions_A[ai], dtype=np.float64)
    pj = np.asarray(geo.positions_A[aj], dtype=np.float64) + (ci + d - cj)
    return list(film.symbols[ai]), pi, list(film.symbols[aj]), pj


def _pair_environment(film: "Film", frame: int, i: int, j: int, pos_i: FloatArray, pos_j: FloatArray,
                      radius_A: float) -> tuple[FloatArray, FloatArray]:
    """Point charges of whole molecule images within ``radius_A`` of any pair atom (pair excluded)."""
    both = np.vstack([pos_i, pos_j])
    reach = float(np.max(np.linalg.norm(pos_j[:, None, :] - pos_i[None, :, :], axis=-1).min(axis=1)))
    cl = film.carve(i, radius_A + reach, frame=frame, rule="atom")
    ep = np.asarray(cl.env_positions, dtype=np.float64).reshape(-1, 3)
    eq = np.asarray(cl.env_charges, dtype=np.float64).ravel()
    em = np.asarray(cl.env_molecules, dtype=np.int64).ravel()
    ei = np.asarray(cl.env_images, dtype=np.int64).reshape(-1, 3)
    if ep.shape[0] == 0:
        return ep, eq
    groups = np.unique(np.column_stack([em, ei]), axis=0, return_inverse=True)[1].ravel()
    keep = np.zeros(ep.shape[0], dtype=bool)
    cj = pos_j.mean(axis=0)
    for g in np.unique(groups):
        sel = groups == g
        m = int(em[sel][0])
        if m == j and np.linalg.norm(ep[sel].mean(axis=0) - cj) < 1e-4:
            continue  # this image is molecule j of the pair itself
        dmin = np.min(np.linalg.norm(ep[sel][:, None, :] - both[None, :, :], axis=-1))
        keep[sel] = dmin <= radius_A
    return ep[keep], eq[keep]


def run_transfer_task(payload: dict[str, Any]) -> tuple[str, dict[str, Any]]:
    """Worker function: the transfer integrals of one pair; ``(result_json, summary)``.

    Runs in any process that can read the film files (or holds the film in
    its cache, for in-memory films run serially).
    """
    from ..film import film_from_spec
    from ..qm.transfer import transfer_integrals

    film = film_from_spec(payload["film"])
    f, i, j = int(payload["frame"]), int(payload["i"]), int(payload["j"])
    si, pi, sj, pj = pair_geometry(film, f, i, j)
    embed = payload.get("embed_radius_A")
    env_p = env_q = None
    if embed is not None:
        env_p, env_q = _pair_environment(film, f, i, j, pi, pj, float(embed))
    method = Method.from_dict(payload["method"])
    res = transfer_integrals(si, pi, sj, pj, method, env_positions=env_p, env_charges=env_q)
    summary = {
        "frame": f, "i": i, "j": j, "J_hole_eV": res.j_hole_eV, "J_electron_eV": res.j_electron_eV,
        "S_hole": res.hole.S, "S_electron": res.electron.S, "converged": bool(res.converged),
        "distance_A": float(np.linalg.norm(pj.mean(axis=0) - pi.mean(axis=0))),
        "n_env_charges": int(res.n_env_charges), "xc": method.xc, "basis": method.basis,
        "embed_radius_A": embed, "pid": os.getpid(),
    }
    return json.dumps(res.to_dict(), sort_keys=True), summary


def compute_transfer_integrals(
    film: "Film",
    pairs_df: pd.DataFrame,
    frame: int,
    method: Method,
    *,
    store: "ResultStore | str | os.PathLike[str]",
    runner: "str | Runner" = "serial",
    embed_radius_A: float | None = None,
    max_pairs: int | None = None,
    progress: bool = False,
    **runner_kw: Any,
) -> pd.DataFrame:
    """Transfer integrals of the pairs of one frame, through the runner and the store.

    Parameters
    ----------
    film : Film
    pairs_df : DataFrame
        Pairs with columns ``i, j`` (e.g. :func:`~clusterlab.export.pairs.pair_table`);
        rows of other frames are dropped when it has a ``frame`` column.
    frame : int
    store : ResultStore or path
        Each result is stored as it arrives; pairs already done are skipped.
    runner : {"serial", "processes", "dask"} or Runner
    method : clusterlab.Method
    embed_radius_A : float, optional
        Point-charge embedding radius (see :func:`transfer_task`).
    max_pairs : int, optional
        Only the ``max_pairs`` closest pairs (by ``distance_A`` when the table
        has it, else in table order).
    progress : bool
    **runner_kw
        Passed to :func:`clusterlab.runner.run_tasks` (``n_workers``, ...).

    Returns
    -------
    pandas.DataFrame
        One row per pair (``i < j``), columns :data:`TRANSFER_COLUMNS`;
        failed pairs have NaN couplings, ``converged=False`` and the error
        text. ``attrs["report"]`` is the run's
        :class:`~clusterlab.runner.RunReport`.

    Raises
    ------
    InputError
        For a pair table without ``i, j`` or a bad ``max_pairs``.
    """
    from ..runner import run_tasks
    from ..study.scan import open_store

    if not isinstance(pairs_df, pd.DataFrame) or not {"i", "j"} <= set(pairs_df.columns):
        raise InputError("pairs_df must be a DataFrame with columns 'i' and 'j'.")
    f = film.check_frame(frame)
    p = pairs_df
    if "frame" in p.columns:
        p = p[p["frame"].astype(int) == f]
    if "distance_A" in p.columns:
        p = p.sort_values("distance_A", kind="stable")
    if max_pairs is not None:
        if not (isinstance(max_pairs, (int, np.integer)) and max_pairs >= 0):
            raise InputError(f"max_pairs must be a non-negative integer or None; got {max_pairs!r}.")
        p = p.head(int(max_pairs))
    tasks = [transfer_task(film, f, int(a), int(b), method, embed_radius_A=embed_radius_A)
             for a, b in zip(p["i"], p["j"])]
    if tasks:  # an unknown basis or functional is named before any pair is queued
        from ..study.tasks import check_film_method

        check_film_method(film, method)
    st = open_store(store)
    report = run_tasks(tasks, TRANSFER_TASK_FN, store=st, runner=runner, progress=progress,
                       desc="transfer integrals", **runner_kw)
    rows = []
    seen = set()
    for t in tasks:
        if t.key in seen:
            continue
        seen.add(t.key)
        rec = st.get(t.key)
        base = {"frame": f, "i": t.payload["i"], "j": t.payload["j"], "xc": method.xc,
                "basis": method.basis, "embed_radius_A": embed_radius_A}
        if rec is not None and rec.done:
            s = rec.summary
            rows.append({**base, **{k: s.get(k) for k in TRANSFER_COLUMNS if k in s}, "error": None})
        else:
            rows.append({**base, "J_hole_eV": np.nan, "J_electron_eV": np.nan, "converged": False,
                         "error": None if rec is None else rec.error})
    out = pd.DataFrame(rows, columns=list(TRANSFER_COLUMNS))
    for c in ("J_hole_eV", "J_electron_eV", "distance_A", "S_hole", "S_electron"):
        out[c] = pd.to_numeric(out[c], errors="coerce").astype(float)
    out["converged"] = out["converged"].fillna(False).astype(bool)
    out.attrs["report"] = report
    return out
