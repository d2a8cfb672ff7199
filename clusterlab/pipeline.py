"""A whole study from a validated study description (see
:mod:`clusterlab.studyfile`): scan, sample, film-wide model, export, report.

The command line (``clusterlab run`` / ``clusterlab demo``) and notebooks
call :func:`run_study`; it only strings library calls together.
"""

from __future__ import annotations

import json
import os
import time
import warnings
from dataclasses import dataclass, field
from typing import Any, Callable

from .film import Film, load_film
from .report import (ReportWriter, doped_section, log_section, model_correlation_section, model_section,
                     polarization_table, sample_section, scan_section)
from .store import ResultStore
from .studyfile import method_from_study, xc_basis


@dataclass
class StudyOutcome:
    """What a study produced (objects stay in memory; paths are on disk)."""

    film: Film
    report_dir: str
    summary_path: str = ""
    store_path: str = ""
    scan: Any = None
    sample: Any = None
    model: Any = None
    export: dict[str, str] = field(default_factory=dict)
    timings_s: dict[str, float] = field(default_factory=dict)

    @property
    def all_failed(self) -> bool:
        """True when the site-energy sample had tasks and every one of them failed
        (nothing computed now, nothing already in the store): the CLI then exits non-zero."""
        rep = getattr(self.sample, "report", None)
        if rep is None or not rep.n_tasks:
            return False
        return rep.failed == rep.n_tasks or (rep.failed > 0 and rep.done == 0 and rep.skipped == 0
                                             and not len(self.sample.table))


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
              title: str = "clusterlab study") -> StudyOutcome:
    """Run every section present in ``study`` and write the report folder."""
    t_all = time.perf_counter()
    present = set(study.get("_present", []))
    f = study["film"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        film = load_film(f["topology"], f["trajectory"], charges=f["charges"] or None)
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
        t0 = time.perf_counter()
        molecule = s["molecule"] if s["molecule"] is not None else f"species:{s['species']}"
        if s["molecule"] is not None and s["species"]:
            film.select([s["molecule"]], species=s["species"])  # the molecule must be of that species
        echo(f"radius scan of molecule {molecule} at radii {s['radii']} Å ...")
        outcome.scan = radius_scan(film, molecule, s["radii"], method, frame=s["frame"], rule=s["rule"],
                                   qm_shell=s["qm_shell"], periodic_limit=s["periodic_limit"], tol_eV=s["tol_eV"],
                                   store=store, runner="serial", progress=progress, on_step=narrate)
        outcome.timings_s["scan"] = time.perf_counter() - t0
        echo("  " + outcome.scan.verdict.message)
        scan_section(rep, outcome.scan)

    if "sample" in present:
        from .study.sample import sample_sites

        s = study["sample"]
        t0 = time.perf_counter()
        only = f", species {s['species']!r}" if s["species"] else ""
        echo(f"site-energy sample (molecules {s['molecules']!r}{only}, n={s['n']}, frames {s['frames']}, "
             f"radius {s['radius']} Å) ...")
        outcome.sample = sample_sites(film, s["molecules"], s["frames"], s["radius"], method, store=store,
                                      n=s["n"], seed=s["seed"], species=s["species"], rule=s["rule"],
                                      progress=progress, on_step=narrate, **rkw)
        outcome.timings_s["sample"] = time.perf_counter() - t0
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

        t0 = time.perf_counter()
        m = study["model"]
        echo(f"film-wide electrostatic model (radius {m['radius']} Å, polarization {m['polarization']}, "
             f"{m['n_conformers']} conformer reference(s), S1 response {m['response']}) ...")
        fit_method = method
        if m["charges_method"]:  # the study method at the fit's xc/basis (charges and finite fields)
            xc, basis = xc_basis(m["charges_method"])
            fit_method = method.replace(xc=xc, basis=basis)
        outcome.model = run_film_model(film, fit_method, radius_A=m["radius"], frames=m["frames"],
                                       polarization=m["polarization"], polarize_molecules=m["polarize_molecules"],
                                       reference_molecule=m["reference_molecule"], n_conformers=m["n_conformers"],
                                       response=m["response"], polarizable_radius_A=m["polarizable_radius"],
                                       polarization_scale=m["polarization_scale"], progress=progress, store=store,
                                       species=m["species"])
        outcome.timings_s["model"] = time.perf_counter() - t0
        model_section(rep, outcome.model)
        if m["polarization"]:
            for r in polarization_table(outcome.model).itertuples(index=False):
                echo(f"  {r.quantity}: mean {r.mean_eV:+.3f} eV, σ {r.sigma_eV * 1e3:.0f} meV (n={r.n})")
        model_correlation_section(rep, outcome.model, film)

    if "export" in present:
        from .export import export_study

        e = study["export"]
        folder = e["folder"] if os.path.isabs(e["folder"]) else os.path.join(rep.folder, e["folder"])
        t0 = time.perf_counter()
        outcome.export = export_study(film, folder, sample=outcome.sample, model=outcome.model,
                                      cutoff_A=e["cutoff_A"], criterion=e["criterion"], method=method)
        outcome.timings_s["export"] = time.perf_counter() - t0
        rep.section("Export for transport models",
                    f"Site and pair tables (Parquet + CSV) with a JSON sidecar in `{os.path.relpath(folder, rep.folder)}/`; "
                    "format described in the README.")
        echo(f"export written to {folder}")

    outcome.timings_s["total"] = time.perf_counter() - t_all
    rep.section("Timings", ", ".join(f"{k} {v:.1f} s" for k, v in outcome.timings_s.items()))
    log_section(rep, {"radius scan": outcome.scan.log if outcome.scan is not None else [],
                      "site sample": outcome.sample.log if outcome.sample is not None else []})
    outcome.summary_path = rep.write()
    with open(os.path.join(rep.folder, "study.json"), "w", encoding="utf-8") as fh:
        json.dump({k: v for k, v in study.items()}, fh, indent=2, default=str)
    echo(f"report: {outcome.summary_path}")
    return outcome
