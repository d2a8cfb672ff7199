"""Report folder of a study: plots as PNG and a short Markdown summary.

Everything here formats results computed elsewhere; it holds no science.
"""

from __future__ import annotations

import math
import os
from typing import Any

import numpy as np
import pandas as pd

from .errors import InputError
from .labels import MAX_COLUMNS, display_table, left_out_note, quantity_name, shown_in_meV

MODEL_NOTE = (
    "All numbers are model estimates. The QM values use electrostatic point-charge embedding of a "
    "fixed ground-state charge distribution: no polarisation of the environment by the QM region, "
    "no exchange repulsion or dispersion with the environment, no vibronic or thermal broadening "
    "beyond the sampled geometries, and the accuracy of the chosen functional and basis set."
)


def _fmt(x: Any, nd: int = 3) -> str:
    if isinstance(x, (bool, np.bool_)):
        return str(bool(x))
    if isinstance(x, (int, np.integer)):
        return str(int(x))
    try:
        xf = float(x)
    except (TypeError, ValueError):
        return str(x)
    if math.isnan(xf):
        return "n/a"
    if math.isinf(xf):
        return "inf" if xf > 0 else "-inf"
    return f"{xf:.{nd}f}"


def _table_md(shown: pd.DataFrame) -> str:
    """A Markdown table of a :func:`clusterlab.labels.display_table` copy (cells are text)."""
    cols = list(shown.columns)
    head = "| " + " | ".join(cols) + " |\n|" + "---|" * len(cols) + "\n"
    return head + "".join("| " + " | ".join(str(v) for v in r) + " |\n" for r in shown.itertuples(index=False))


class ReportWriter:
    """Collects sections and figures, then writes ``summary.md`` and PNGs."""

    def __init__(self, folder: str, title: str):
        self.folder = os.path.abspath(folder)
        if os.path.exists(self.folder) and not os.path.isdir(self.folder):
            raise InputError(f"report folder {folder!r} is an existing file; give a folder path "
                             "(it is created when missing).")
        os.makedirs(self.folder, exist_ok=True)
        self.lines: list[str] = [f"# {title}", "", MODEL_NOTE, ""]
        self.figures: list[str] = []
        #: what the sections computed, for the headline at the top (:func:`headline_lines`): the
        #: sections put their own results here, so the headline repeats numbers, it makes none
        self.facts: dict[str, Any] = {}

    def section(self, title: str, text: str = "") -> None:
        self.lines += [f"## {title}", ""]
        if text:
            self.lines += [text, ""]

    def text(self, text: str) -> None:
        self.lines += [text, ""]

    def table(self, df: pd.DataFrame, cols: list[str], *, max_columns: int | None = MAX_COLUMNS,
              mean_in_meV: bool | None = None) -> None:
        """A table as people read it (:func:`clusterlab.labels.display_table`: human headers, shifts
        and σ in meV, the vacuum row named, at most ``max_columns`` columns). What is left out is said
        under it: "every SCF converged" for an SCF flag that is True on every judged row, else the
        names of the columns not shown."""
        shown = display_table(df[[c for c in cols if c in df.columns]], max_columns=max_columns,
                              mean_in_meV=mean_in_meV)
        self.lines += [_table_md(shown), ""]
        note = left_out_note(shown)
        if note:
            self.lines += [f"({note}.)", ""]

    display = table

    def figure(self, fig, name: str, caption: str) -> str:
        path = os.path.join(self.folder, name)
        fig.savefig(path, dpi=110, bbox_inches="tight")
        self.figures.append(path)
        self.lines += [f"![{caption}]({name})", "", f"*{caption}*", ""]
        return path

    def write(self) -> str:
        """Write ``summary.md``: the title, the model note, the headline ("What this film says",
        from :attr:`facts`, when any section recorded some), then the sections."""
        path = os.path.join(self.folder, "summary.md")
        head = headline_lines(self.facts) if self.facts else []
        with open(path, "w", encoding="utf-8") as fh:
            fh.write("\n".join(self.lines[:4] + head + self.lines[4:]).rstrip() + "\n")
        return path


#: one-line caution per model, for the headline (what each leaves out; the sections say more)
CAUTIONS = {
    "qm": "Embedded QM: fixed ground-state point charges only (no polarization, exchange or dispersion of the "
          "environment), vertical energies, the functional's and basis set's own errors.",
    "model": "Film-wide model: charges fitted on a few conformer references, so each copy's own distortion "
             "is missing; no polarization of the environment for neutral excitations.",
    "polarization": "Thole polarization (IP/EA): classical induced dipoles; no density response of the ion to "
                    "them, no periodic images of the dipoles.",
}


def _mev(x: Any) -> str:
    """meV with one decimal, as the report's tables show shifts and σ."""
    return f"{1e3 * float(x):.1f} meV"


def _sigma_words(row: Any, what: str) -> str:
    lo, hi = (f"{1e3 * float(row[k]):.1f}" for k in ("sigma_lo_eV", "sigma_hi_eV"))
    return (f"σ of {what} = {_mev(row['sigma_eV'])} [{lo}, {hi}] (95 % {row['sigma_ci_method']} "
            f"interval, n = {int(row['n'])})")


def headline_lines(facts: dict[str, Any]) -> list[str]:
    """The report's top section, "What this film says", from what the sections recorded.

    Convergence: the verdict of the radius scan (:attr:`ScanResult.verdict`) and the S1 shift at its
    reference; disorder: σ of S1 with its one reported interval from the QM sample's statistics
    (three sites or more), else from the film-wide model's table (the environmental part only); the
    dominant part from the sample's conformational/environmental split; the shape the histogram found;
    one caution per model that ran. A missing piece is said in words. No number is computed here.
    """
    out = ["## What this film says", ""]
    items: list[str] = []
    scan = facts.get("scan")
    if scan is None:
        items.append("Convergence with radius: no radius scan in this report.")
    else:
        v = scan.verdict
        ref = v.reference.get("S1_shift_eV") if isinstance(v.reference, dict) else v.reference
        if v.reference_kind == "largest radius":
            radii = pd.to_numeric(scan.table["radius_A"], errors="coerce")
            where = f"at the largest radius, {float(radii[np.isfinite(radii)].max()):g} Å"
        else:
            where = f"{v.reference_kind}"
        shift = (f"S1 shift {where}: {_mev(ref)}" if ref is not None and np.isfinite(float(ref))
                 else "no S1 shift in the scan")
        if v.converged:
            items.append(f"Convergence with radius: converged from {v.radius_A:g} Å within ±{1e3 * v.tol:g} meV "
                         f"(slowest quantity: {quantity_name(str(v.quantity))}). {shift}.")
        elif not v.judged:
            items.append(f"Convergence with radius: not judged yet: {v.message}. {shift}, provisional.")
        else:
            items.append(f"Convergence with radius: not converged: {v.message}. {shift}, not a converged value.")
    sample_stats = facts.get("sample_stats")
    model_stats = facts.get("model_stats")
    n_sites = facts.get("sample_sites")
    if sample_stats is not None and len(sample_stats) and "S1_eV" in set(sample_stats["quantity"]):
        row = sample_stats[sample_stats["quantity"] == "S1_eV"].iloc[0]
        items.append("Static disorder (QM sample): " + _sigma_words(row, "the S1 site energy") + ".")
    else:
        why = ("no site-energy sample in this report" if n_sites is None else
               f"the QM sample has {n_sites} site(s), σ needs 3")
        if model_stats is not None and len(model_stats) and "S1_shift_eV" in set(model_stats["quantity"]):
            mrow = model_stats[model_stats["quantity"] == "S1_shift_eV"].iloc[0]
            items.append("Static disorder (film-wide model, the environmental part only): "
                         + _sigma_words(mrow, "the S1 shift") + f"; {why}.")
        else:
            items.append(f"Static disorder: not available ({why}, and no film-wide model).")
    ce = facts.get("conf_env")
    if ce is not None and np.isfinite(float(ce["sigma_conf"])) and np.isfinite(float(ce["sigma_env"])):
        conf, env = float(ce["sigma_conf"]), float(ce["sigma_env"])
        part = "conformational" if conf > env else "environmental"
        items.append(f"Dominant part of the S1 disorder: {part} (σ_conf = {_mev(conf)}, σ_env = {_mev(env)}, "
                     "from the QM sample's vacuum energies and shifts).")
    else:
        items.append("Dominant part of the S1 disorder: not split (needs 3 or more QM sites with their vacuum "
                     f"energies{'' if n_sites is None else f'; the sample has {n_sites}'}).")
    for what, shape in facts.get("shapes", {}).items():
        if shape["skewed"]:
            items.append(f"Shape: {what} is skewed (g1 = {shape['g1']:.2f}, {shape['rule']}): σ is its width, "
                         "it is not Gaussian.")
    models = ["qm"] if facts.get("qm") else []
    models += [m for m in ("model", "polarization") if facts.get(m)]
    items += [f"Caution: {CAUTIONS[m]}" for m in models]
    return out + [f"- {x}" for x in items] + [""]


def _meV_or_none(column: str) -> str | None:
    """``show_in`` of a histogram: "meV" for the columns the tables show in meV."""
    return "meV" if shown_in_meV(column) else None


def scan_section(rep: ReportWriter, scan) -> None:
    """Radius-scan table, verdict and convergence plot."""
    species = f", species {scan.species}" if getattr(scan, "species", None) else ""
    rep.section(f"Radius scan of molecule {scan.molecule}{species} (frame {scan.frame})",
                f"Method: {scan.method.describe()}. **Verdict:** {scan.verdict.message}.")
    rep.facts["scan"] = scan
    rep.facts["qm"] = True
    rep.display(scan.table, ["radius_A", "n_env_molecules", "n_charges", "S1_eV", "S1_shift_eV", "T1_eV",
                             "T1_shift_eV", "dEST_eV", "IP_shift_eV", "EA_shift_eV", "converged"])
    rep.figure(scan.plot(), "convergence.png", "Environment shift vs cut radius, with the tolerance band")


def _sigma_row(quantity: str, s: pd.Series) -> dict[str, Any]:
    """A statistics row with the one reported σ interval (stats.SIGMA_BOOTSTRAP_MIN_N rule)."""
    return {"quantity": quantity, "n": s["n"], "mean_eV": s["mean"], "sigma_eV": s["sigma"],
            "sigma_lo_eV": s["sigma_ci_lo"], "sigma_hi_eV": s["sigma_ci_hi"], "sigma_ci_method": s["sigma_ci_method"]}


def sample_section(rep: ReportWriter, sample, quantities: list[str], *, n_boot: int = 2000,
                   correlation: bool = True) -> pd.DataFrame:
    """Disorder statistics, histogram, growth, decompositions, and (``correlation``) the spatial
    correlation of the sample; a study with the film-wide model draws it from the model instead
    (:func:`model_correlation_section`)."""
    from .stats import sigma_interval_note
    from .study.plots import plot_growth, plot_histogram, skew_check

    t = sample.at()
    unknown = [q for q in quantities if q not in sample.table.columns]
    if unknown:
        have = sorted(c for c in sample.table.columns if str(c).endswith(("_eV", "_osc")))
        raise InputError(f"quantity {unknown[0]!r} is not a column of the sample; it has {have}.")
    radius = float(t.radius_A.max()) if len(t) else float("nan")
    notes: list[str] = []
    rep.section(f"Site-energy sample ({t.molecule.nunique()} molecules x {t.frame.nunique()} frames, "
                f"radius {radius:g} Å)")
    rows = []
    for q in quantities:
        if q not in t.columns or t[q].notna().sum() < 3:
            continue
        s = sample.stats(q, n_boot=n_boot, seed=0)
        rows.append({**_sigma_row(q, s), "skewness": s["skewness"], "excess_kurtosis": s["excess_kurtosis"],
                     "normality_p": s["normality_p"]})
        notes.append(sigma_interval_note(s))
    stats = pd.DataFrame(rows)
    rep.facts.update({"sample_stats": stats, "sample_sites": len(t), "qm": True})
    if not len(stats):
        rep.text(f"{len(t)} site(s) with values: the statistics (σ, histogram) need at least 3; "
                 "sample more molecules or frames.")
    else:
        rep.text("σ intervals: " + "; ".join(dict.fromkeys(notes)) + ".")
        rep.display(stats, [c for c in stats.columns if c != "sigma_ci_method"])
        if "species" in t.columns and t["species"].nunique() > 1:
            per = pd.concat([sample.stats(q, by="species", n_boot=n_boot, seed=0).assign(quantity=q)
                             for q in stats.quantity], ignore_index=True)
            per = per.rename(columns={"mean": "mean_eV", "sigma": "sigma_eV", "sigma_ci_lo": "sigma_lo_eV",
                                      "sigma_ci_hi": "sigma_hi_eV"})
            rep.text("Per species (σ interval by the same rule):")
            rep.display(per, ["species", "quantity", "n", "mean_eV", "sigma_eV", "sigma_lo_eV", "sigma_hi_eV",
                              "sigma_ci_method"])
            rep.facts["per_species_shown"] = True  # the host:guest section then refers to it
        q0 = stats.quantity.iloc[0]
        values = t[q0].to_numpy(dtype=float)
        shape = skew_check(values)
        rep.facts.setdefault("shapes", {})[f"the QM sample's {quantity_name(q0)}"] = shape
        rep.figure(plot_histogram(values, label=quantity_name(q0), show_in=_meV_or_none(q0)), f"histogram_{q0}.png",
                   f"Distribution of {quantity_name(q0)}" + (" (skewed: no Gaussian drawn)" if shape["skewed"] else
                                              " with the Gaussian of its mean and σ"))
    if t.frame.nunique() > 1 and "S1_eV" in t.columns:
        sd = sample.static_dynamic("S1_eV")
        rep.text(f"Static vs dynamic (S1): σ_static = {_mev(sd['sigma_static'])}, "
                 f"σ_dynamic = {_mev(sd['sigma_dynamic'])}, σ_total = {_mev(sd['sigma_total'])}.")
    if {"S1_vacuum_eV", "S1_shift_eV"} <= set(t.columns) and len(t) >= 3:
        ce = sample.conformational_environmental("S1")
        rep.facts["conf_env"] = ce
        rep.text(f"Conformational vs environmental (S1): σ_conf = {_mev(ce['sigma_conf'])}, "
                 f"σ_env = {_mev(ce['sigma_env'])}, correlation {_fmt(ce['correlation'], 2)}.")
    if sample.table.radius_A.nunique() > 1:
        g = sample.growth("S1_shift_eV", n_boot=n_boot, seed=0)
        if len(g) > 1:
            rep.figure(plot_growth(g, label="S1 shift", show_in="meV"), "growth.png", "Mean S1 shift and σ vs cut radius (95 % CI)")
    if correlation and len(t) >= 3 and "S1_eV" in t.columns:
        try:
            corr = sample.correlation("S1_eV", n_bins=8, n_boot=min(n_boot, 500), seed=0)
            correlation_figure(rep, corr, f"the QM sample ({len(t)} sites)", "S1 site energies")
        except Exception as exc:  # noqa: BLE001 - a plot must not sink the report
            rep.text(f"(spatial correlation not shown: {exc})")
    return stats


def log_section(rep: ReportWriter, logs: dict[str, list[str]]) -> None:
    """The runs' narration (one line per radius or site, with the times), when there is any."""
    logs = {k: v for k, v in logs.items() if v}
    if not logs:
        return
    rep.section("Log")
    for what, lines in logs.items():
        rep.text(f"{what}:\n\n```\n" + "\n".join(lines) + "\n```")


def correlation_figure(rep: ReportWriter, corr: pd.DataFrame, source: str, what: str) -> None:
    """C(r) with its bootstrap intervals and pair counts, or the reason it is not drawn, in words."""
    from .stats import correlation_note
    from .study.plots import plot_correlation

    note = correlation_note(corr)
    if note is not None:
        rep.text(f"Spatial correlation of {what} from {source}: {note}.")
        return
    rep.figure(plot_correlation(corr, title=f"from {source}"), "correlation.png",
               f"Spatial correlation of {what} from {source}: bins with at least {corr.attrs['min_pairs']} pairs, "
               f"{100 * corr.attrs['confidence']:g} % bootstrap intervals over sites, pair counts on the points")


def model_correlation_section(rep: ReportWriter, result: Any, film: Any, *, n_boot: int = 200) -> None:
    """C(r) of the film-wide model's S1 shift over every molecule-frame it computed (many more pairs
    than a QM sample, so the report prefers it when the model ran)."""
    from .study.sample import site_correlation

    t = result.table
    col = next((c for c in ("S1_shift_eV", "S1_eV") if c in t.columns and t[c].notna().sum() >= 3), None)
    if col is None:
        return
    rep.section("Spatial correlation")
    try:
        corr = site_correlation(t, col, film=film, n_bins=12, n_boot=n_boot, seed=0)
        correlation_figure(rep, corr, f"the film-wide model ({t[col].notna().sum()} molecule-frames)",
                           col.replace("_eV", "").replace("_", " "))
    except Exception as exc:  # noqa: BLE001 - a plot must not sink the report
        rep.text(f"(spatial correlation not shown: {exc})")


def model_section(rep: ReportWriter, result: Any, parity: dict[str, Any] | None = None) -> None:
    """Film-wide electrostatic model: distribution of every state's shift.

    ``result`` is a :class:`~clusterlab.study.filmmodel.FilmModelResult`; the
    conformer references and the field response are read from it.
    """
    from .stats import disorder_stats
    from .study.plots import plot_histogram, skew_check

    model_df = result.table
    n_fit = max([len(refs) for refs in result.charges.conformers.values()] or [1])
    n_asked = int(result.options.get("n_conformers", n_fit))
    refs = f"{n_asked} conformer reference(s)" + (f" asked for, {n_fit} fitted" if n_asked != n_fit else "")
    response = list(result.options.get("field_response") or [])
    cols = [c for c in model_df.columns if c.endswith("_eV") and model_df[c].notna().sum() > 3]
    # the cation (anion) shift is the IP (minus the EA) shift when no polarization enters it: one row
    for ion, site, sign in (("cation_shift_eV", "IP_shift_eV", 1.0), ("anion_shift_eV", "EA_shift_eV", -1.0)):
        if ion in cols and site in cols and np.allclose(sign * model_df[ion].to_numpy(dtype=float),
                                                        model_df[site].to_numpy(dtype=float), equal_nan=True):
            cols.remove(ion)
    rep.section(f"Film-wide electrostatic model ({model_df.molecule.nunique()} molecules x "
                f"{model_df.frame.nunique()} frames)",
                "Shift of each state = Σ (q_state − q_ground) × potential of the environment's ground-state "
                f"charges (state charges fitted to the QM electrostatic potential of {refs}; each copy takes "
                "the reference it superposes onto best)"
                + (f"; {' and '.join(response)} instead from the finite-field response −Δμ·F − ½F·Δα·F with F "
                   "the uniform field that best fits the environment potential over the molecule" if response else
                   "; for a bright S1 the second-order (polarizability) part of the shift is missing, which "
                   "can dominate (README: set response = true)")
                + ". Leaves out: each copy's own distortion beyond its conformer family, polarization unless "
                "requested (charged states only, below), quantum effects of the environment.")
    rows = []
    for c in cols:
        s = disorder_stats(model_df[c].to_numpy(dtype=float), n_boot=500, seed=0)
        rows.append(_sigma_row(c, s))
    rep.facts["model"] = True
    if rows:
        st = pd.DataFrame(rows)
        rep.facts["model_stats"] = st
        rep.display(st, list(st.columns))
        c0 = cols[0]
        values = model_df[c0].to_numpy(dtype=float)
        shape = skew_check(values)
        rep.facts.setdefault("shapes", {})[f"the film-wide model's {quantity_name(c0)}"] = shape
        rep.figure(plot_histogram(values, label=quantity_name(c0), show_in=_meV_or_none(c0)), "model_histogram.png",
                   f"Film-wide model: distribution of {quantity_name(c0)}" + (" (skewed: no Gaussian drawn)" if shape["skewed"]
                                                              else ""))
    if "P_cation_eV" in model_df or "P_anion_eV" in model_df:
        polarization_section(rep, result)
    if parity:
        rep.text("Parity of the model against full embedded QM on the sampled sites: " +
                 ", ".join(f"{k} {_fmt(v)}" for k, v in parity.items()))


def model_parity_section(rep: ReportWriter, pairs: pd.DataFrame, parity: pd.DataFrame, *, qm_method: Any = None,
                         fit_method: Any = None) -> None:
    """The film-wide model against the sample's QM on the sampled sites (pairs and
    numbers from :func:`clusterlab.pipeline.sample_parity` and ``parity_summary``)."""
    from .study.plots import plot_parity

    if not len(parity):
        return
    fits = f" (charges and field response fitted with {fit_method.describe()})" if fit_method is not None else ""
    qm = f" ({qm_method.describe()})" if qm_method is not None else ""
    rep.text(f"Model against the sample's embedded QM{qm} on the {int(parity.n.max())} sampled sites, both at "
             f"{pairs.attrs.get('radius_A', float('nan')):g} Å: the sample's calculations are the parity points, "
             f"the model{fits} is evaluated again there (no new QM). RMS and mean of model − QM; read the RMS "
             "against the QM spread. It contains what the model leaves out and the difference of the two methods.")
    shown = parity.rename(columns={"rms_eV": "rms_error_eV", "mean_eV": "mean_error_eV", "qm_sigma_eV": "sigma_qm_eV"})
    rep.display(shown, ["quantity", "n", "rms_error_eV", "mean_error_eV", "r", "sigma_qm_eV"])
    q = str(parity.quantity.iloc[0]).replace("_shift_eV", "")
    # shifts in meV, as the tables show them
    rep.figure(plot_parity(1e3 * pairs[f"{q}_shift_qm_eV"], 1e3 * pairs[f"{q}_shift_model_eV"],
                           xlabel=f"QM {q} shift", ylabel=f"model {q} shift", unit="meV"),
               "model_parity.png", f"Film-wide model against the sample's QM: {q} shift per sampled site")


def polarization_table(result: Any) -> pd.DataFrame:
    """IP and EA environment shifts of the polarized rows of a film model result,
    with fixed charges and with the Thole polarization, and the polarization
    energies themselves: one row per quantity (``mean_eV``, ``sigma_eV`` with its
    95 % interval by the one rule of :func:`~clusterlab.stats.disorder_stats`
    (``sigma_ci_method``: chi-square for small n, bootstrap from 30 on), ``n``). The site energy is the gas-phase IP (EA) of
    the molecule plus its shift, so σ of a shift is σ of that site energy
    (conformational spread of the gas-phase values not included).
    P+ = ΔIP, P- = ΔEA (polarized minus fixed charges)."""
    from .stats import disorder_stats

    t = result.table
    rows = []
    pairs = []
    if "P_cation_eV" in t:
        c = t[t["P_cation_eV"].notna()]
        pairs += [("IP shift, fixed charges", c["cation_shift_eV"]), ("IP shift, polarized", c["cation_total_eV"]),
                  ("P+ (ΔIP)", c["P_cation_eV"])]
    if "P_anion_eV" in t:
        a = t[t["P_anion_eV"].notna()]
        pairs += [("EA shift, fixed charges", -a["anion_shift_eV"]), ("EA shift, polarized", -a["anion_total_eV"]),
                  ("P- (ΔEA)", -a["P_anion_eV"])]
    for name, values in pairs:
        st = disorder_stats(values.to_numpy(dtype=float), n_boot=500, seed=0)
        rows.append({"quantity": name, "n": st["n"], "mean_eV": st["mean"], "sigma_eV": st["sigma"],
                     "sigma_lo_eV": st["sigma_ci_lo"], "sigma_hi_eV": st["sigma_ci_hi"],
                     "sigma_ci_method": st["sigma_ci_method"]})
    return pd.DataFrame(rows)


def polarization_section(rep: ReportWriter, result: Any) -> None:
    """The charged states with and without polarization (:func:`polarization_table`)."""
    o = result.options
    st = polarization_table(result)
    if not len(st):
        return
    rep.facts["polarization"] = True
    r_pol = o.get("polarizable_radius_A")
    scale = float(o.get("polarization_scale", 1.0))
    frames = o.get("polarization_frames") or o.get("frames")
    rep.text(f"IP and EA with and without polarization ({int(st.n.max())} polarized molecules, frame(s) {frames}): "
             "Thole induced dipoles (exponential damping, van Duijnen & Swart 1998 polarizabilities) on the "
             "environment atoms "
             + (f"of the molecules within {r_pol:g} Å" if r_pol is not None else f"within {result.radius_A:g} Å")
             + ", in the field of the ion's added charge"
             + (" and of the neutral film (the dipoles already induced)" if o.get("neutral_induction", True) else "")
             + ("; no calibration factor" if scale == 1.0 else f"; calibration factor {scale:g} (explicit)")
             + ". Site energy = gas-phase IP (EA) + shift, so the σ of a shift is that of the site energy. "
             "Leaves out the ion's own density response to the dipoles and the periodic images of the dipoles "
             "(README: parity against polarizable QM).")
    rep.display(st, list(st.columns), mean_in_meV=True)


def write_lines(rep: ReportWriter, title: str, lines: list[str]) -> None:
    rep.section(title)
    rep.text("\n".join(f"- {x}" for x in lines))



def doped_section(rep: ReportWriter, film: Any, sites: Any, *, states: Any = None,
                  torsion_atoms: dict[str, Any] | None = None, cutoff_A: float | None = None,
                  n_boot: int = 2000) -> Any:
    """Host:guest section: per-species table, trap depths, triplet confinement,
    ΔEST against the torsion and the state order, as far as the data go.

    A formatting layer over :func:`clusterlab.study.doped.host_guest_overview`
    (the arguments are its own). Writes nothing and returns None for a film
    of one species; else returns the overview.
    """
    from .stats import SIGMA_BOOTSTRAP_MIN_N
    from .study.doped import host_guest_overview
    from .study.plots import plot_torsion

    try:
        ov = host_guest_overview(film, sites, cutoff_A=cutoff_A, torsion_atoms=torsion_atoms, states=states,
                                 n_boot=n_boot)
    except InputError as exc:
        rep.section("Host:guest film", f"(not shown: {exc})")
        return None
    if ov is None:
        return None
    se = ov.species
    counts = film.species
    rep.section(f"Host:guest film (host {se.host}, {counts.get(se.host, 0)} molecules; guest {se.guest}, "
                f"{counts.get(se.guest, 0)} molecules)",
                f"Per-species site energies: {100 * se.confidence:g} % intervals, σ by the one rule of the "
                f"report (chi-square below {SIGMA_BOOTSTRAP_MIN_N} sites, bootstrap BCa from there; column σ "
                "interval). Trap depths: hole = IP_host − IP_guest, "
                "electron = EA_guest − EA_host (IP = E(cation) − E(neutral), EA = E(neutral) − E(anion)); "
                "positive = the guest traps that carrier; the depth's interval is a bootstrap interval of a "
                "difference of means, the spread (σ of a host−guest site difference) follows the σ rule on the "
                "smaller species. Vertical energies of the embedding model.")
    if rep.facts.get("per_species_shown"):
        rep.text("Per-species means and σ: the table of the site-energy sample section above (shown once).")
    else:
        rep.display(se.stats, ["species", "quantity", "n", "mean_eV", "sigma_eV", "sigma_lo_eV", "sigma_hi_eV",
                               "sigma_ci_method"])
    if len(se.traps):
        rep.display(se.traps.rename(columns={"spread_ci_method": "sigma_ci_method"}),
                    ["carrier", "definition", "depth_eV", "depth_lo_eV", "depth_hi_eV", "spread_eV",
                     "spread_lo_eV", "spread_hi_eV", "sigma_ci_method", "n_host", "n_guest"])
    else:
        rep.text("(no trap depths: the sites have no IP/EA values of both species)")
    if ov.confinement is not None:
        s = ov.confinement.summary()
        rep.text(f"Triplet confinement: {_fmt(100 * s['confined_fraction'], 1)} % of {s['n_guest_sites']} guest "
                 f"sites have T1 below every host neighbour within {s['cutoff_A']:.2f} Å (margin "
                 f"T1_host,min − T1_guest: mean {_fmt(s['margin_mean_eV'])} eV, σ {_fmt(s['margin_sigma_eV'])} eV, "
                 f"min {_fmt(s['margin_min_eV'])} eV).")
    if ov.torsion is not None:
        rep.table(ov.torsion.fits, ["species", "n", "sigma_torsion_eV", "torsion_fraction",
                                    "conformational_fraction"])
        rep.figure(plot_torsion(ov.torsion), "dest_torsion.png", "ΔEST and hole–electron distance vs torsion")
    if ov.state_order is not None:
        so = ov.state_order
        s = so.summary()
        rep.text(f"State order (CT when the hole–electron distance exceeds {so.threshold_A:g} Å): S1 changes "
                 f"character between vacuum and embedding at {s['n_S1_reordered']} of {s['n_sites']} sites, "
                 f"T1 at {s['n_T1_reordered']}.")
        if len(so.flagged()):
            rep.table(so.flagged().head(20), ["frame", "molecule", "species", "S1_vacuum_character", "S1_character",
                                              "T1_vacuum_character", "T1_character"])
    if ov.notes:
        rep.text("Notes: " + "; ".join(ov.notes) + ".")
    return ov


def report_inputs(store: Any, *, film: Any = None, film_id: str | None = None,
                  method_key: str | None = None) -> tuple[Any, Any, str]:
    """The site sample of a result store and the film its host:guest section needs.

    Without ``film`` the film is rebuilt from the film spec recorded with the
    store's records (topology, trajectory and charge source, checked against
    the recorded content id by :func:`clusterlab.film.film_from_spec`).

    Parameters
    ----------
    store : ResultStore
        Open store (read-only is enough).
    film : Film, optional
        The film to use instead of the recorded one (its content id must be
        the store's).
    film_id, method_key : str, optional
        Which film and method to read when the store holds several.

    Returns
    -------
    (SiteSample, Film or None, str)
        The sample (with species and centroids when there is a film), the
        film, and why there is no film ('' when there is one).
    """
    from .errors import ClusterlabError
    from .film import film_from_spec
    from .study.sample import SiteSample

    if film is not None:
        return SiteSample.from_store(store, film=film, film_id=film_id, method_key=method_key), film, ""
    sample = SiteSample.from_store(store, film_id=film_id, method_key=method_key)
    rec = store.get(str(sample.table["key"].iloc[0])) if len(sample.table) and "key" in sample.table else None
    spec = ((rec.spec.get("payload") or {}).get("film") if rec is not None else None) or {}
    if not spec.get("topology"):
        return sample, None, "the store's records carry no film description"
    try:
        rebuilt = film_from_spec(spec)
    except (ClusterlabError, OSError) as exc:
        return sample, None, (f"the recorded film ({spec.get('topology')!r}) could not be rebuilt: "
                              f"{str(exc).splitlines()[0] if str(exc) else type(exc).__name__}")
    return SiteSample.from_store(store, film=rebuilt, film_id=film_id, method_key=method_key), rebuilt, ""


def film_missing_section(rep: ReportWriter, sample: Any, why: str) -> None:
    """Say in the report that the host:guest section needs the film, when the sites hold several species."""
    t = getattr(sample, "table", None)
    if t is not None and "species" in t.columns and t["species"].nunique() > 1:
        rep.section("Host:guest film",
                    f"(not shown: this part needs the film, for neighbours and torsions, and {why}; give the "
                    "film's files to the report)")
