"""A whole study from a validated study description (see
:mod:`clusterlab.studyfile`): scan, sample, film-wide model, export, report.

The command line (``clusterlab run`` / ``clusterlab demo``) and notebooks
call :func:`run_study`; it only strings library calls together.
"""

from __future__ import annotations

import json
import os
import resource
import time
import warnings
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np
import pandas as pd

from .errors import InputError
from .film import Film, load_film
from .report import (ReportWriter, doped_section, log_section, model_correlation_section, model_parity_section,
                     model_section, polarization_table, sample_section, scan_section)
from .store import ResultStore
from .studyfile import CONVERGED, method_from_study, xc_basis


@dataclass
class StudyOutcome:
    """What a study produced (objects stay in memory; paths are on disk)."""

    film: Film
    report_dir: str
    summary_path: str = ""
    store_path: str = ""
    scan: Any = None
    #: the same scan with a polarizable inner layer (``[scan] polarizable_radius``)
    polarizable_scan: Any = None
    sample: Any = None
    model: Any = None
    #: the film model against the sample's QM on the sampled sites (:func:`sample_parity`)
    parity: Any = None
    export: dict[str, str] = field(default_factory=dict)
    timings_s: dict[str, float] = field(default_factory=dict)
    #: per stage: wall, CPU of this process and of finished worker processes (s), and the cluster
    #: calculations run now against those the store already held (see :class:`StageCosts`)
    costs: dict[str, dict[str, float]] = field(default_factory=dict)

    @property
    def all_failed(self) -> bool:
        """True when the site-energy sample had tasks and every one of them failed
        (nothing computed now, nothing already in the store): the CLI then exits non-zero."""
        rep = getattr(self.sample, "report", None)
        if rep is None or not rep.n_tasks:
            return False
        return rep.failed == rep.n_tasks or (rep.failed > 0 and rep.done == 0 and rep.skipped == 0
                                             and not len(self.sample.table))


#: the file of the report folder that holds :attr:`StudyOutcome.costs`
COSTS_FILE = "stage_costs.json"


def _cpu_s() -> tuple[float, float]:
    """CPU time (user + system, s) of this process and of its waited-for children."""
    own = time.process_time()
    ch = resource.getrusage(resource.RUSAGE_CHILDREN)
    return own, ch.ru_utime + ch.ru_stime


class StageCosts:
    """What each stage of a study cost: wall time, CPU time, calculations run and reused.

    CPU time is that of this process (the film model's state-charge fits and Thole
    sums run here, on as many threads as PySCF takes) plus that of worker processes
    once they have exited (the pools of a scan, a sample and the finite fields are
    shut down at their ends), so on a shared machine
    ``cpu_s`` says what the study needed even when the wall time says how busy the
    machine was. ``computed`` and ``reused`` count the stage's cluster calculations:
    run now, or found finished in the store (by task key: an earlier stage or an
    earlier run of the same study).
    """

    def __init__(self) -> None:
        self.rows: dict[str, dict[str, float]] = {}
        self._start = (time.perf_counter(), *_cpu_s())

    @contextmanager
    def stage(self, name: str):
        """Measure the block as stage ``name``; the block may add counts to the yielded dict."""
        w0, c0, k0 = time.perf_counter(), *_cpu_s()
        row: dict[str, float] = {}
        try:
            yield row
        finally:
            c1, k1 = _cpu_s()
            self.rows[name] = {"wall_s": time.perf_counter() - w0, "cpu_s": (c1 - c0) + (k1 - k0),
                               "cpu_workers_s": k1 - k0, **row}

    def total(self) -> dict[str, float]:
        """The whole study so far (film loading and report writing included)."""
        c1, k1 = _cpu_s()
        w0, c0, k0 = self._start
        return {"wall_s": time.perf_counter() - w0, "cpu_s": (c1 - c0) + (k1 - k0), "cpu_workers_s": k1 - k0}

    def lines(self) -> list[str]:
        """One line per stage and the total: wall, CPU and the calculations run / reused."""
        out = []
        for name, r in self.rows.items():
            calc = f"; {int(r['computed'])} calculations run, {int(r['reused'])} from the store" if "computed" in r else ""
            out.append(f"{name:<8} {_clock(r['wall_s']):>9} wall, {_clock(r['cpu_s']):>9} CPU{calc}")
        return out


def _clock(seconds: float) -> str:
    m, s = divmod(float(seconds), 60.0)
    return f"{int(m)} min {s:4.1f} s" if m else f"{s:.1f} s"


def _counts(report) -> dict[str, float]:
    """Calculations of a stage from its :class:`~clusterlab.runner.RunReport`."""
    if report is None:
        return {}
    return {"computed": float(report.executed), "reused": float(report.skipped)}


#: the states the film model is checked on against the sample's QM
PARITY_STATES = ("S1", "T1")


def sample_parity(film: Film, model: Any, sample: Any) -> pd.DataFrame:
    """The film-wide model against the sample's embedded QM, site by site, with no new QM.

    The sample's cluster calculations serve as the model's parity points: the model
    (its fitted charges and, where it has one, its field response) is evaluated again
    at the sample's largest radius and cut rule on the sampled (frame, molecule) sites
    only, which costs seconds, and paired with the QM shifts of those sites.

    Parameters
    ----------
    film : Film
    model : FilmModelResult
        From :func:`~clusterlab.study.filmmodel.run_film_model` (its ``charges`` and
        ``options["field_response"]`` are used).
    sample : SiteSample

    Returns
    -------
    pandas.DataFrame
        One row per site: ``frame``, ``molecule`` and, for each state S of
        :data:`PARITY_STATES` both sides have, ``S_shift_qm_eV`` and
        ``S_shift_model_eV``; ``attrs["radius_A"]``, ``attrs["rule"]``. Empty when the
        sample has no converged site.
    """
    from .study.filmmodel import FilmModel

    t = sample.at()
    if not len(t):
        return pd.DataFrame()
    radius = float(t.radius_A.max())
    rule = str(t["rule"].iloc[0]) if "rule" in t.columns else "atom"
    states = [s for s in PARITY_STATES if f"{s}_shift_eV" in t.columns and t[f"{s}_shift_eV"].notna().any()]
    response = [s for s in (model.options.get("field_response") or ()) if s in states]
    fm = FilmModel(film, model.charges, radius_A=radius, rule=rule, states=states, field_response=response)
    ours = fm.run(sorted({int(f) for f in t.frame}), sorted({int(m) for m in t.molecule}), progress=False).table
    qm = t[["frame", "molecule", *[f"{s}_shift_eV" for s in states]]].astype({"frame": int, "molecule": int})
    pairs = qm.merge(ours[["frame", "molecule", *[f"{s}_shift_eV" for s in states]]], on=["frame", "molecule"],
                     suffixes=("_qm", "_model"))
    pairs = pairs.rename(columns={f"{s}_shift_eV_{w}": f"{s}_shift_{w}_eV" for s in states for w in ("qm", "model")})
    pairs.attrs.update(radius_A=radius, rule=rule, model=fm.label)
    return pairs


def parity_summary(pairs: pd.DataFrame) -> pd.DataFrame:
    """Per state of :func:`sample_parity`'s pairs: ``n``, ``rms_eV`` and ``mean_eV`` of
    model − QM, Pearson ``r`` (NaN for fewer than 3 sites or a constant side) and the QM spread
    ``qm_sigma_eV`` (ddof=1) the RMS is to be read against."""
    rows = []
    for s in PARITY_STATES:
        if f"{s}_shift_qm_eV" not in pairs.columns:
            continue
        x = pairs[f"{s}_shift_qm_eV"].to_numpy(dtype=float)
        y = pairs[f"{s}_shift_model_eV"].to_numpy(dtype=float)
        ok = np.isfinite(x) & np.isfinite(y)
        x, y = x[ok], y[ok]
        if x.size < 2:
            continue
        d = y - x
        r = float(np.corrcoef(x, y)[0, 1]) if x.size >= 3 and np.std(x) > 0 and np.std(y) > 0 else float("nan")
        rows.append({"quantity": f"{s}_shift_eV", "n": int(x.size), "rms_eV": float(np.sqrt(np.mean(d ** 2))),
                     "mean_eV": float(d.mean()), "r": r, "qm_sigma_eV": float(np.std(x, ddof=1))})
    return pd.DataFrame(rows)


def _runner_kwargs(study: dict[str, Any]) -> dict[str, Any]:
    r = study["runner"]
    kw: dict[str, Any] = {"runner": r["kind"]}
    if r["workers"] is not None:
        kw["n_workers"] = r["workers"]
    if r["threads_per_worker"] is not None:
        kw["threads_per_worker"] = r["threads_per_worker"]
    if r["scheduler"]:
        kw["scheduler_address"] = r["scheduler"]
    return kw


#: store.meta key of the host:guest settings a study ran with (read back by ``clusterlab report``)
DOPED_META_KEY = "doped_settings"


def _doped_settings(study: dict[str, Any], film: Film, store: ResultStore) -> dict[str, Any]:
    """The [doped] settings, the torsion atom names checked against the film before any
    calculation runs, and kept in the store's meta for later reports."""
    if "doped" not in set(study.get("_present", [])):
        return {}
    from .study.doped import torsion_atom_indices

    d = {k: v for k, v in study["doped"].items() if v is not None}
    if d.get("torsion"):
        torsion_atom_indices(film, d["torsion"])  # InputError naming a missing atom or species
    store.meta[DOPED_META_KEY] = d
    return d


def run_study(study: dict[str, Any], *, progress: bool = True, echo: Callable[[str], Any] = print,
              title: str = "clusterlab study", film: Film | None = None) -> StudyOutcome:
    """Run every section present in ``study`` and write the report folder.

    The costs of each stage (:class:`StageCosts`) are printed at the end, kept in
    ``StudyOutcome.costs`` and ``timings_s`` (wall) and written to the report folder
    (:data:`COSTS_FILE` and its Timings section). ``film``: the study's film already
    loaded (it must be the film of ``study["film"]``), so it is not read twice.

    Raises
    ------
    InputError
        A ``film`` whose files are not those of the study.
    """
    clock = StageCosts()
    present = set(study.get("_present", []))
    f = study["film"]
    if film is None:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            film = load_film(f["topology"], f["trajectory"], charges=f["charges"] or None)
    elif os.path.abspath(film.topology_path) != os.path.abspath(f["topology"]) or f["charges"]:
        raise InputError(f"film {film.topology_path!r} is not the study's film {f['topology']!r} (with its "
                         "charges as the study gives them); pass film=None to load it from the study.")
    method = method_from_study(study)
    out_dir = study["output"]["report"]
    rep = ReportWriter(out_dir, title)
    store_path = study["output"]["store"]
    store = ResultStore(store_path)
    outcome = StudyOutcome(film=film, report_dir=rep.folder, store_path=os.path.abspath(store_path))
    rep.section("Film", "```\n" + film.describe() + "\n```")
    rep.text(f"Method: {method.describe()} (key {method.key()[:12]}).")
    echo(film.describe())
    echo(f"method: {method.describe()}")
    rkw = _runner_kwargs(study)
    doped = _doped_settings(study, film, store)

    def narrate(line: str) -> None:
        """Each step of a scan or sample on the console (with the bars; --quiet keeps only the summary)."""
        if progress:
            echo("    " + line)

    if "scan" in present and (study["scan"]["molecule"] is not None or study["scan"]["species"]):
        from .study.scan import radius_scan

        s = study["scan"]
        molecule = s["molecule"] if s["molecule"] is not None else f"species:{s['species']}"
        if s["molecule"] is not None and s["species"]:
            film.select([s["molecule"]], species=s["species"])  # the molecule must be of that species
        echo(f"radius scan of molecule {molecule} at radii {s['radii']} Å ...")
        with clock.stage("scan") as row:
            outcome.scan = radius_scan(film, molecule, s["radii"], method, frame=s["frame"], rule=s["rule"],
                                       qm_shell=s["qm_shell"], periodic_limit=s["periodic_limit"],
                                       tol_eV=s["tol_eV"], store=store, progress=progress,
                                       on_step=narrate, **rkw)
            row.update(_counts(outcome.scan.report))
        echo("  " + outcome.scan.verdict.message)
        scan_section(rep, outcome.scan)
        if s["polarizable_radius"] is not None:
            # the engine refuses a periodic limit with induced dipoles: this scan has none
            pol_method = method.replace(environment="polarizable")
            echo(f"radius scan of molecule {outcome.scan.molecule} with a polarizable inner layer "
                 f"({s['polarizable_radius']:g} Å) at radii {s['radii']} Å ...")
            with clock.stage("scan_polarizable") as row:
                outcome.polarizable_scan = radius_scan(
                    film, outcome.scan.molecule, s["radii"], pol_method, frame=s["frame"], rule=s["rule"],
                    qm_shell=s["qm_shell"], polarizable_radius=s["polarizable_radius"], tol_eV=s["tol_eV"],
                    store=store, progress=progress, on_step=narrate, **rkw)
                row.update(_counts(outcome.polarizable_scan.report))
            echo("  " + outcome.polarizable_scan.verdict.message)
            _polarizable_scan_section(rep, outcome.polarizable_scan, s["polarizable_radius"])

    if "sample" in present:
        from .study.sample import sample_sites

        s = dict(study["sample"])
        if s["radius"] == CONVERGED:
            s["radius"] = scan_radius(outcome.scan)
            echo(f"  sample radius {s['radius']:g} Å: "
                 + ("the scan's converged radius" if outcome.scan.verdict.converged
                    else "the scan's largest radius (the scan did not converge)"))
        only = f", species {s['species']!r}" if s["species"] else ""
        echo(f"site-energy sample (molecules {s['molecules']!r}{only}, n={s['n']}, frames {s['frames']}, "
             f"radius {s['radius']} Å) ...")
        with clock.stage("sample") as row:
            outcome.sample = sample_sites(film, s["molecules"], s["frames"], s["radius"], method, store=store,
                                          n=s["n"], seed=s["seed"], species=s["species"], rule=s["rule"],
                                          progress=progress, on_step=narrate, **rkw)
            row.update(_counts(outcome.sample.report))
        echo(f"  {outcome.sample.report}")
        if outcome.sample.failures:
            rep.text("Failed sites: " + "; ".join(outcome.sample.failures[:10]))
        if len(outcome.sample.table):
            # C(r) comes from the film-wide model when it runs (every molecule-frame, not a QM sample)
            stats = sample_section(rep, outcome.sample, list(s["quantities"]), correlation="model" not in present)
            doped_section(rep, film, outcome.sample, states=store,  # nothing for a one-species film
                          torsion_atoms=doped.get("torsion"), cutoff_A=doped.get("neighbour_cutoff_A"))
            for r in stats.itertuples(index=False):
                echo(f"  {r.quantity}: mean {r.mean_eV:.3f} eV, σ {r.sigma_eV * 1e3:.0f} meV "
                     f"[{r.sigma_lo_eV * 1e3:.0f}, {r.sigma_hi_eV * 1e3:.0f}] (95 % {r.sigma_ci_method}), n={r.n}")

    if "model" in present:
        from .study.filmmodel import run_film_model

        m = study["model"]
        echo(f"film-wide electrostatic model (radius {m['radius']} Å, polarization {m['polarization']}, "
             f"{m['n_conformers']} conformer reference(s), S1 response {m['response']}) ...")
        fit_method = method
        if m["charges_method"]:  # the study method at the fit's xc/basis (charges and finite fields)
            xc, basis = xc_basis(m["charges_method"])
            fit_method = method.replace(xc=xc, basis=basis)
        with clock.stage("model"):
            outcome.model = run_film_model(film, fit_method, radius_A=m["radius"], frames=m["frames"],
                                           polarization=m["polarization"],
                                           polarize_molecules=m["polarize_molecules"],
                                           reference_molecule=m["reference_molecule"],
                                           n_conformers=m["n_conformers"], response=m["response"],
                                           polarizable_radius_A=m["polarizable_radius"],
                                           polarization_scale=m["polarization_scale"], progress=progress,
                                           store=store, species=m["species"],
                                           # references' finite fields side by side on a local runner
                                           workers=1 if study["runner"]["kind"] == "serial"
                                           else study["runner"]["workers"])
        model_section(rep, outcome.model)
        if outcome.sample is not None and len(outcome.sample.table):
            # the sample's QM sites are the model's parity points: no new QM, the model re-evaluated there
            outcome.parity = sample_parity(film, outcome.model, outcome.sample)
            parity = parity_summary(outcome.parity)
            model_parity_section(rep, outcome.parity, parity, qm_method=method, fit_method=fit_method)
            for r in parity.itertuples(index=False):
                echo(f"  model vs the sample's QM, {r.quantity}: RMS {r.rms_eV * 1e3:.0f} meV, mean "
                     f"{r.mean_eV * 1e3:+.0f} meV, r = {r.r:.2f} (QM σ {r.qm_sigma_eV * 1e3:.0f} meV, n={r.n})")
        if m["polarization"]:
            for r in polarization_table(outcome.model).itertuples(index=False):
                echo(f"  {r.quantity}: mean {r.mean_eV:+.3f} eV, σ {r.sigma_eV * 1e3:.0f} meV (n={r.n})")
        model_correlation_section(rep, outcome.model, film)

    if "export" in present:
        from .export import export_study

        e = study["export"]
        folder = e["folder"] if os.path.isabs(e["folder"]) else os.path.join(rep.folder, e["folder"])
        with clock.stage("export"):
            outcome.export = export_study(film, folder, sample=outcome.sample, model=outcome.model,
                                          cutoff_A=e["cutoff_A"], criterion=e["criterion"], method=method)
        rep.section("Export for transport models",
                    f"Site and pair tables (Parquet + CSV) with a JSON sidecar in `{os.path.relpath(folder, rep.folder)}/`; "
                    "format described in the README.")
        echo(f"export written to {folder}")

    _costs_section(rep, clock)
    log_section(rep, {"radius scan": outcome.scan.log if outcome.scan is not None else [],
                      "site sample": outcome.sample.log if outcome.sample is not None else []})
    outcome.summary_path = rep.write()
    with open(os.path.join(rep.folder, "study.json"), "w", encoding="utf-8") as fh:
        json.dump({k: v for k, v in study.items()}, fh, indent=2, default=str)
    outcome.costs = {**clock.rows, "total": clock.total()}
    outcome.timings_s = {k: r["wall_s"] for k, r in outcome.costs.items()}
    with open(os.path.join(rep.folder, COSTS_FILE), "w", encoding="utf-8") as fh:
        json.dump({"stages": outcome.costs, "cpu_count": os.cpu_count(),
                   "load_average_1min": os.getloadavg()[0]}, fh, indent=2)
    echo(f"report: {outcome.summary_path}")
    echo("what each stage cost (CPU: this process and its finished workers):")
    for line in clock.lines() + [_total_line(outcome.costs["total"])]:
        echo("  " + line)
    return outcome


def scan_radius(scan: Any) -> float:
    """The radius a study's sample takes from its scan (``[sample] radius = "converged"``):
    the scan's converged radius, else its largest finite radius (Å)."""
    if scan.verdict.converged and scan.verdict.radius_A is not None:
        return float(scan.verdict.radius_A)
    r = scan.table["radius_A"].to_numpy(dtype=float)
    return float(r[np.isfinite(r)].max())


def _polarizable_scan_section(rep: ReportWriter, scan: Any, inner_A: float) -> None:
    """The scan with a polarizable inner layer: its table and verdict (the fixed-charge scan has the plot)."""
    rep.section(f"Radius scan with a polarizable inner layer ({inner_A:g} Å)",
                f"Method: {scan.method.describe()}. **Verdict:** {scan.message}. Induced dipoles are not "
                "periodic, so this scan has no periodic limit; the fixed-charge scan above has it.")
    cols = [c for c in ("radius_A", "n_polarizable", "S1_shift_eV", "T1_shift_eV", "IP_shift_eV", "EA_shift_eV",
                        "S1_polarization_eV", "T1_polarization_eV", "IP_polarization_eV", "EA_polarization_eV",
                        "converged") if c in scan.table.columns]
    rep.display(scan.table, cols)


def _total_line(total: dict[str, float]) -> str:
    return f"{'total':<8} {_clock(total['wall_s']):>9} wall, {_clock(total['cpu_s']):>9} CPU"


def _costs_section(rep: ReportWriter, clock: StageCosts) -> None:
    """The Timings section: each stage's wall and CPU time and its calculations."""
    rows = [{"stage": k, "wall_s": r["wall_s"], "cpu_s": r["cpu_s"],
             "calculations_run": r.get("computed", float("nan")), "from_store": r.get("reused", float("nan"))}
            for k, r in {**clock.rows, "total (so far)": clock.total()}.items()]
    rep.section("Timings", f"Wall and CPU time per stage (CPU: this process and its finished worker "
                f"processes; {os.cpu_count()} cores, 1-minute load average {os.getloadavg()[0]:.1f} at the end). "
                "Cluster calculations run now and found in the store (by task key).")
    rep.table(pd.DataFrame(rows), ["stage", "wall_s", "cpu_s", "calculations_run", "from_store"])
