"""The static-disorder panel: sample site energies, look at their spread.

A thin layer over :func:`clusterlab.sample_sites`,
:func:`clusterlab.study.site_table` (a result store's sites),
:meth:`clusterlab.SiteSample.growth`, :mod:`clusterlab.stats` and
:mod:`clusterlab.study.plots`: it gathers settings, runs the sample in a
worker thread, and draws what the library computes (histogram with the
Gaussian fit and confidence intervals, mean and σ against radius, site
energies on the 3D film, the spatial correlation). For a film of two or more
species a "host:guest" tab shows :func:`clusterlab.study.doped.host_guest_overview`
(per-species table, trap depths, triplet confinement, ΔEST against the
torsion, state order). Export writes the table as CSV.
"""

from __future__ import annotations

import html
import os
import threading
import time
import traceback
from collections.abc import Mapping, Sequence
from typing import Any

import ipywidgets as widgets
import numpy as np
import numpy.typing as npt
import pandas as pd
import traitlets

from ..errors import InputError
from ..labels import quantity_name, shown_in_meV
from ..ranges import parse_frames, parse_radii
from ..stats import MIN_PAIRS_PER_BIN, correlation_note, disorder_stats, disorder_summary
from ..stats import spatial_correlation  # noqa: F401 - the kernel under site_correlation, kept importable here
from ..store import ResultStore
from ..study.doped import host_guest_overview, n_species
from ..study.plots import plot_correlation, plot_growth, plot_histogram, plot_torsion
from ..study.sample import SiteSample, choose_molecules, sample_sites, site_correlation, site_table
from ..export import export_study
from ._controls import Radii, format_radii, link_radii, make_view, row, species_dropdown
from ._jobs import BackgroundJob, count_text
from . import _style
from .calc import _TABLE_CSS, MethodControls, frame_html

__all__ = ["DisorderPanel"]


class DisorderPanel(BackgroundJob, widgets.VBox):
    """Sample site energies over molecules and frames and look at the disorder.

    Parameters
    ----------
    film : clusterlab.Film
    molecules : str, default "all"
        Which molecules: an MDAnalysis selection, ids (``"0-9, 20"``, ends
        included; see :mod:`clusterlab.ranges`) or "all".
    n_molecules : int, default 0
        Random subset of that many molecules (0: all selected).
    frames : str, default "0"
        Frames (``"0"``, ``"0, 10"``, ``"0-19:5"`` with both ends included,
        ``"-1"`` for the last, ``"all"``).
    radii_A : sequence of float, default (10.0,)
        One sample per radius (several radii give σ and mean vs radius).
    preset, basis, n_singlets, n_triplets : method settings at start
    store : str, default "clusterlab_sites.sqlite"
        Result store the sample writes into (and a re-run resumes from).
    runner : str, default "serial"
    seed : int, default 0
        Seed of the molecule subset and the bootstrap intervals.
    show_view : bool, default True
        Build the 3D site-energy view.
    torsion_atoms : mapping species -> 4 ints, optional
        Atoms (indices within the molecule) of the donor-acceptor torsion for
        the host:guest tab (see :func:`clusterlab.study.doped.dest_torsion`).
    neighbour_cutoff_A : float, optional
        Host-neighbour distance of the triplet confinement (default: the
        library's, capped at half the box).

    Traits
    ------
    radii_A : List of Float
        Sample radii (Å), ascending; mirrors the radii box (text in the
        grammar of :mod:`clusterlab.ranges`, e.g. ``"6-12:3"``).
    shown_quantity : Unicode or None
        Column drawn (linked to the ``quantity`` dropdown).
    shown_radius_A : Float or None
        Radius whose sites are drawn (linked to ``radius_pick``).
    shown_frame : Int or None
        Frame of the 3D site-energy scene (linked to ``frame_pick``).

    Attributes
    ----------
    data : pandas.DataFrame
        The site-energy table shown (sample result, loaded store or rows so far).
    result : SampleResult or None
    error : str
    errors : ipywidgets.Output
    hist_plot, growth_plot, corr_plot : ipywidgets.Image
    view : nglview.NGLWidget or None
    overview : HostGuestOverview or None
        What the host:guest tab shows (None for a one-species film).
    doped_html : ipywidgets.HTML or None
        The host:guest tab's tables (None for a one-species film).
    torsion_plot : ipywidgets.Image or None
    """

    radii_A = Radii((10.0,))
    shown_quantity = traitlets.Unicode(None, allow_none=True)
    shown_radius_A = traitlets.Float(None, allow_none=True)
    shown_frame = traitlets.Int(None, allow_none=True)

    def __init__(self, film: Any, *, molecules: str = "all", n_molecules: int = 0, frames: str = "0",
                 radii_A: Sequence[float] = (10.0,), preset: str = "draft", basis: str = "",
                 n_singlets: int | None = None, n_triplets: int | None = None,
                 store: str = "clusterlab_sites.sqlite", runner: str = "serial", seed: int = 0,
                 show_view: bool = True, torsion_atoms: Mapping[str, Sequence[int]] | None = None,
                 neighbour_cutoff_A: float | None = None, **kwargs: Any) -> None:
        self.film = film
        self.torsion_atoms = dict(torsion_atoms) if torsion_atoms else None
        self.neighbour_cutoff_A = neighbour_cutoff_A
        self.overview: Any = None
        #: where the per-state data of the shown sites are (a store path), for the state order
        self.states_source: Any = None
        self.data = pd.DataFrame()
        self.rows: list[dict] = []
        #: the running sample's narration, one line per site (the status line shows the latest)
        self.narration: list[str] = []
        self.result: Any = None
        self.error = ""
        self.stats: pd.Series | None = None
        self.growth: pd.DataFrame | None = None
        self.correlation: pd.DataFrame | None = None
        self.site_values: dict[int, float] = {}
        self.scene_pdb = ""
        self._lock = threading.Lock()
        self._init_job()
        self._cancel_message = 'cancelling… (finished sites are kept in the store)'
        self._site_comp: Any = None
        #: least time between two redraws while a sample runs (s)
        self.redraw_interval_s = 3.0
        self._radius_chosen = False
        #: correlation bins with fewer pairs are not drawn (the library's stated threshold)
        self.min_pairs = MIN_PAIRS_PER_BIN
        #: bootstrap resamples of the sites for the C(r) error bars
        self.correlation_boot = 200
        self._last_draw = -np.inf

        self.errors = widgets.Output(layout=widgets.Layout(max_height="220px", overflow="auto"))
        w = widgets.Layout
        lab = _style.LABEL_STYLE
        self.molecules = widgets.Text(value=molecules, description="molecules",
                                      placeholder="all, ids 0-9, or a selection", layout=w(width="300px"), style=lab)
        self.species = species_dropdown(film)
        self.n_molecules = widgets.BoundedIntText(value=n_molecules, min=0, max=max(film.n_molecules, 1),
                                                  description="random n", layout=w(width="180px"), style=lab)
        self.frames = widgets.Text(value=frames, description="frames", placeholder="0 | 0, 10 | 0-19:5 | all",
                                   layout=w(width="300px"), style=lab)
        self.radii = widgets.Text(value=format_radii(radii_A), description="radii (Å)",
                                  placeholder="10  or  6-12:3", layout=w(width="300px"), style=lab)
        self.method_controls = MethodControls(preset, basis=basis, n_singlets=n_singlets,
                                              n_triplets=n_triplets)
        self.preset = self.method_controls.preset
        self.basis = self.method_controls.basis
        self.singlets = self.method_controls.singlets
        self.triplets = self.method_controls.triplets
        self.store = widgets.Text(value=str(store), description="store", layout=w(width="420px"), style=lab)
        self.runner = widgets.Dropdown(options=["serial", "processes", "dask"], value=runner,
                                       description="runner", layout=w(width="220px"), style=lab)
        self.seed = widgets.IntText(value=seed, description="seed", layout=w(width="180px"), style=lab)
        auto = w(width="auto")
        self.run_button = widgets.Button(description="run sample", button_style="success", icon="play", layout=auto)
        self.cancel_button = widgets.Button(description="cancel", button_style="warning", icon="stop",
                                            disabled=True, layout=w(width="auto"))
        self.load_button = widgets.Button(description="load store", icon="folder-open", layout=w(width="auto"))
        self.progress = widgets.IntProgress(value=0, min=0, max=1, description="sites", layout=w(width="320px"),
                                            style=lab)
        self.status = widgets.HTML(value='<span class="clusterlab-status" style="color:#555">ready</span>')

        self.quantity = widgets.Dropdown(options=[], description="quantity", layout=w(width="300px"), style=lab)
        self.radius_pick = widgets.Dropdown(options=[], description="radius (Å)", layout=w(width="220px"), style=lab)
        self.frame_pick = widgets.Dropdown(options=[], description="3D frame", layout=w(width="220px"), style=lab)
        self.export_path = widgets.Text(value="site_energies.csv", description="CSV file", layout=w(width="420px"),
                                        style=lab)
        self.export_button = widgets.Button(description="export CSV", icon="download", layout=w(width="auto"))
        self.transport_path = widgets.Text(value="transport_export", description="folder", layout=w(width="420px"),
                                           style=lab)
        self.transport_cutoff = widgets.BoundedFloatText(value=8.0, min=1.0, max=50.0, description="pairs (Å)",
                                                         layout=w(width="180px"), style=lab)
        self.transport_button = widgets.Button(description="export for transport", icon="share",
                                               layout=w(width="auto"))

        self.hist_plot = widgets.Image(format="png", layout=w(max_width="560px"))
        self.stats_html = widgets.HTML()
        self.growth_plot = widgets.Image(format="png", layout=w(max_width="560px"))
        self.growth_note = widgets.HTML()
        self.corr_plot = widgets.Image(format="png", layout=w(max_width="560px"))
        for image in (self.hist_plot, self.growth_plot, self.corr_plot):
            _style.show_png(image, None)
        self.corr_note = widgets.HTML()
        self.colourbar = widgets.HTML()
        self.table_html = widgets.HTML()
        self.view: Any = None
        scene: list[widgets.Widget] = [row(self.frame_pick, self.colourbar)]
        if show_view:
            self.view = make_view("420px")
            scene.append(self.view)

        tabs: list[widgets.Widget] = [
            widgets.HBox([self.hist_plot, self.stats_html]),
            widgets.VBox([self.growth_note, self.growth_plot]),
            widgets.VBox(scene),
            widgets.VBox([self.corr_note, self.corr_plot]),
            self.table_html,
        ]
        titles = ["histogram", "σ and mean vs radius", "on the film", "spatial correlation", "table"]
        self.doped_html: widgets.HTML | None = None
        self.torsion_plot: widgets.Image | None = None
        if n_species(film) >= 2:
            self.doped_html = widgets.HTML()
            self.torsion_plot = widgets.Image(format="png", layout=w(max_width="560px"))
            _style.show_png(self.torsion_plot, None)
            tabs.append(widgets.VBox([self.doped_html, self.torsion_plot]))
            titles.append("host:guest")
        self.tabs = widgets.Tab(children=tabs)
        for i, t in enumerate(titles):
            self.tabs.set_title(i, t)

        self.run_button.on_click(self._on_run_click)
        self.cancel_button.on_click(self._on_cancel_click)
        self.load_button.on_click(self._on_load_click)
        self.export_button.on_click(self._on_export_click)
        self.transport_button.on_click(self._on_transport_click)
        link_radii(self.radii, self)
        for dd, name in ((self.quantity, "shown_quantity"), (self.radius_pick, "shown_radius_A"),
                         (self.frame_pick, "shown_frame")):
            traitlets.link((dd, "value"), (self, name))
            dd.observe(self._on_pick, names="value")
        self.tabs.observe(self._on_tab, names="selected_index")

        settings = widgets.VBox([
            row(self.molecules, self.species, self.n_molecules, self.seed),
            row(self.frames, self.radii),
            self.method_controls,
            self.runner,
            row(self.store, self.load_button),
            row(self.run_button, self.cancel_button, self.progress),
            self.status,
            row(self.quantity, self.radius_pick),
        ])
        export = widgets.VBox([row(self.export_path, self.export_button),
                               row(self.transport_path, self.transport_cutoff, self.transport_button)])
        super().__init__([widgets.HTML(_style.PANEL_CSS), settings, self.tabs, export, self.errors], **kwargs)
        self.add_class("clusterlab-disorder-panel")
        self.add_class("clusterlab-panel")
        self._draw_film_scene()

    # ---------------------------------------------------------- settings
    def selected_molecules(self) -> npt.NDArray[np.int64]:
        """Molecule ids of the current selection, of the species chosen in
        :attr:`species` (random subset when asked; :func:`clusterlab.study.choose_molecules`)."""
        text = self.molecules.value.strip() or "all"
        sel = choose_molecules(self.film, text, species=self.species.value or None)
        n = int(self.n_molecules.value)
        if 0 < n < len(sel):
            sel = choose_molecules(self.film, sel, n=n, seed=int(self.seed.value))
        return sel

    def build_method(self) -> Any:
        return self.method_controls.build()

    def settings(self) -> dict[str, Any]:
        """What the sample will be run with (ids, frames, radii, store path, runner, seed)."""
        return {
            "molecules": self.selected_molecules(),
            "frames": parse_frames(self.frames.value.strip() or "all", self.film.n_frames),
            "radii": parse_radii(self.radii.value),
            "store": self.store.value.strip(),
            "runner": str(self.runner.value),
            "seed": int(self.seed.value),
        }

    # --------------------------------------------------------------- run
    def run(self) -> "DisorderPanel":
        """Start the sample in a background thread (returns at once)."""
        if self.running:
            self._set_status("a sample is already running; cancel it first", "warn")
            return self
        self.errors.clear_output()
        self.error = ""
        self.exception = None
        self.rows = []
        self.narration = []
        self.result = None
        try:
            s = self.settings()
            if not s["store"]:
                raise InputError("a store path is needed: the sample writes every site into it as it finishes.")
            method = self.build_method()
        except Exception as exc:  # noqa: BLE001
            self._fail(exc)
            return self
        self._last_draw = -np.inf
        self.progress.max = len(s["molecules"]) * len(s["frames"]) * len(s["radii"])
        self.progress.value = 0
        self.progress.bar_style = "info"
        self.run_button.disabled = True
        self.cancel_button.disabled = False
        self._set_status(f"sampling {len(s['molecules'])} molecule(s) × {len(s['frames'])} frame(s) × "
                         f"{len(s['radii'])} radius/radii", "info")
        self._radius_chosen = False
        self._start(self._work, (method, s), "clusterlab-sample")
        return self

    def _work(self, method: Any, s: dict[str, Any]) -> None:
        try:
            with ResultStore(s["store"]) as store:
                radius: float | list[float] = s["radii"][0] if len(s["radii"]) == 1 else list(s["radii"])
                res = sample_sites(self.film, s["molecules"], s["frames"], radius, method, store=store,
                                   runner=s["runner"], seed=s["seed"], progress=False, on_result=self._on_result,
                                   cancel=self._cancel, on_step=self._on_step)
                self.result = res
        except Exception as exc:  # noqa: BLE001
            if self._cancel.is_set():
                # a cancel is not a failure: show the sites that finished before it
                with self._lock:
                    done = pd.DataFrame(self.rows)
                if len(done):
                    self.set_data(done)
                self._set_status(f"cancelled after {count_text(len(done), 'site', 'sites')}"
                                 + ("; they are in the store and shown below" if len(done) else ""), "warn")
                self.progress.bar_style = "warning"
            else:
                self._fail(exc)
        else:
            table = getattr(res, "table", None)
            self.states_source = s["store"]
            if isinstance(table, pd.DataFrame) and len(table):
                self.set_data(table)
            elif self.rows:
                self.set_data(pd.DataFrame(self.rows))
            failures = list(getattr(res, "failures", []) or [])
            if failures:
                self.errors.append_stderr("failed sites:\n" + "\n".join(map(str, failures)) + "\n")
            if self._cancel.is_set():
                self._set_status(f"cancelled after {count_text(len(self.rows), 'site', 'sites')}; they are in the "
                                 "store and shown below", "warn")
                self.progress.bar_style = "warning"
            else:
                self.progress.value = self.progress.max
                self.progress.bar_style = "success" if not failures else "warning"
                self._set_status(f"finished: {len(self.data)} site energies"
                                 + (f", {len(failures)} failed (see below)" if failures else ""),
                                 "ok" if not failures else "warn")
        finally:
            self.run_button.disabled = False
            self.cancel_button.disabled = True

    def _on_step(self, line: str) -> None:
        """The sample's narration (worker thread): the status line shows the latest site."""
        self.narration.append(line)
        if not self._cancel.is_set():
            self._set_status(html.escape(line), "info")

    def _on_result(self, row: dict) -> None:
        """Called by the sample (worker thread) after each site; redraws at
        most every :attr:`redraw_interval_s` seconds (always at the end)."""
        try:
            with self._lock:
                self.rows.append(dict(row))
                df = pd.DataFrame(self.rows)
            self.progress.value = min(len(self.rows), self.progress.max)
            now = time.monotonic()
            if now - self._last_draw >= self.redraw_interval_s:
                self.set_data(df)
                self._last_draw = time.monotonic()
            else:
                self.data = df
        except Exception:  # noqa: BLE001
            self.errors.append_stderr(traceback.format_exc())

    # -------------------------------------------------------------- data
    def load(self, source: str | os.PathLike[str] | pd.DataFrame | None = None) -> pd.DataFrame:
        """Show a site-energy table: a DataFrame, or a result store path
        (default: the store box)."""
        try:
            if isinstance(source, pd.DataFrame):
                df = source
            else:
                path = os.fspath(source) if source is not None else self.store.value.strip()
                df = site_table(path, film=self.film)
                self.states_source = path
            self.set_data(df)
            self._set_status(f"loaded {len(df)} site energies", "ok")
        except Exception as exc:  # noqa: BLE001
            self._fail(exc)
        return self.data

    def set_data(self, df: pd.DataFrame) -> None:
        """Replace the shown table and redraw everything."""
        self.data = df.reset_index(drop=True)
        qs = [c for c in self.data.columns if str(c).endswith("_eV")
              and pd.api.types.is_numeric_dtype(self.data[c])]
        keep_q = self.quantity.value if self.quantity.value in qs else (qs[0] if qs else None)
        self._refreshing = True
        try:
            # shown by name ("S1 shift"), the value stays the column
            self.quantity.options = [(quantity_name(c), c) for c in qs]
            self.quantity.value = keep_q
            radii = sorted(pd.to_numeric(self.data.get("radius_A", pd.Series(dtype=float)),
                                         errors="coerce").dropna().unique().tolist())
            # the largest radius unless the user picked one
            keep_r = self.radius_pick.value if (self._radius_chosen and self.radius_pick.value in radii) \
                else (radii[-1] if radii else None)
            self.radius_pick.options = [(f"{r:g}", r) for r in radii]
            self.radius_pick.value = keep_r
            frames = sorted(int(f) for f in self.data["frame"].dropna().unique()) if "frame" in self.data else []
            keep_f = self.frame_pick.value if self.frame_pick.value in frames else (frames[0] if frames else None)
            self.frame_pick.options = frames
            self.frame_pick.value = keep_f
        finally:
            self._refreshing = False
        self.refresh()

    def _on_pick(self, change: dict) -> None:
        if getattr(self, "_refreshing", False):
            return
        if change.get("owner") is self.radius_pick:
            self._radius_chosen = True
        with self.errors:
            self.refresh()

    def _subset(self) -> pd.DataFrame:
        d = self.data
        if self.radius_pick.value is not None and "radius_A" in d:
            d = d[np.isclose(pd.to_numeric(d["radius_A"], errors="coerce"), float(self.radius_pick.value))]
        return d

    def _shift_column(self, q: str) -> str:
        if q.endswith("_shift_eV"):
            return q
        cand = q[: -len("_eV")] + "_shift_eV"
        return cand if cand in self.data.columns else q

    def refresh(self) -> None:
        """Redraw histogram, growth, film scene, correlation and table."""
        self.table_html.value = _TABLE_CSS + frame_html(self.data)
        q = self.quantity.value
        if q is None or not len(self.data):
            return
        sub = self._subset()
        vals = pd.to_numeric(sub[q], errors="coerce").to_numpy(dtype=float)
        steps = [self._draw_histogram, self._draw_growth, self._draw_correlation]
        if self.doped_html is not None:
            steps.append(self._draw_doped)
        for step in steps:
            try:
                step(q, sub, vals)
            except Exception as exc:  # noqa: BLE001 - one failed plot must not hide the others
                self.errors.append_stderr(f"{step.__name__[6:]}: {type(exc).__name__}: {exc}\n")
        try:
            self._draw_film_scene()
        except Exception:  # noqa: BLE001
            self.errors.append_stderr(traceback.format_exc())

    def _draw_histogram(self, q: str, sub: pd.DataFrame, vals: np.ndarray) -> None:
        finite = vals[np.isfinite(vals)]
        if finite.size < 3:
            self.stats = None
            self.stats_html.value = f"<i>{finite.size} site(s) so far; the statistics need at least 3.</i>"
            return
        self.stats = disorder_stats(finite, seed=int(self.seed.value))
        _style.show_png(self.hist_plot, _style.figure_png(plot_histogram(
            finite, self.stats, label=quantity_name(q), show_in="meV" if shown_in_meV(q) else None)))
        # the same σ and interval as the histogram's text (one rule: stats.disorder_summary)
        rows = "".join(f"<tr><td>{html.escape(k)}</td><td>{html.escape(v)}</td></tr>"
                       for k, v in disorder_summary(self.stats).itertuples(index=False))
        self.stats_html.value = f'<table class="clusterlab-table clusterlab-stats">{rows}</table>'

    def _draw_growth(self, q: str, sub: pd.DataFrame, vals: np.ndarray) -> None:
        col = self._shift_column(q)
        if "radius_A" not in self.data:
            return
        self.growth = SiteSample(table=self.data).growth(col, seed=int(self.seed.value))
        if len(self.growth) < 2:
            self.growth_note.value = ("<i>σ and mean against radius need at least 2 radii with 3 or more "
                                      "sites each (give several radii).</i>")
            _style.show_png(self.growth_plot, None)
            return
        self.growth_note.value = f"<span>{html.escape(quantity_name(col))} per radius</span>"
        _style.show_png(self.growth_plot, _style.figure_png(plot_growth(
            self.growth, label=quantity_name(col), show_in="meV" if shown_in_meV(col) else None)))

    def _draw_correlation(self, q: str, sub: pd.DataFrame, vals: np.ndarray) -> None:
        ok = np.isfinite(vals)
        if ok.sum() < 3:
            self._no_correlation("the spatial correlation needs at least 3 sites with a value; "
                                 f"{int(ok.sum())} so far.")
            return
        self.correlation = site_correlation(sub[ok], q, film=self.film, n_bins=10, n_boot=self.correlation_boot,
                                            seed=int(self.seed.value), min_pairs=self.min_pairs)
        note = correlation_note(self.correlation)
        if note is not None:
            self._no_correlation(note)
            return
        c = self.correlation
        self.corr_note.value = (f"<span>{html.escape(quantity_name(q))}, {int(ok.sum())} sites: bins with at least "
                                f"{self.min_pairs} pairs drawn ({int(c.shown.sum())} of {len(c)}), error bars "
                                f"95 % bootstrap over sites, numbers = pairs per bin</span>")
        _style.show_png(self.corr_plot, _style.figure_png(plot_correlation(c)))

    def _no_correlation(self, why: str) -> None:
        """Say why C(r) is not drawn, in words, instead of empty axes."""
        self.corr_note.value = f'<i class="clusterlab-no-correlation">{html.escape(why)}</i>'
        _style.show_png(self.corr_plot, None)

    def _draw_doped(self, q: str, sub: pd.DataFrame, vals: np.ndarray) -> None:
        """The host:guest tab: formats :func:`clusterlab.study.doped.host_guest_overview` of the shown sites."""
        if self.doped_html is None or self.torsion_plot is None:  # a one-species film has no such tab
            return
        self.overview = host_guest_overview(self.film, sub, cutoff_A=self.neighbour_cutoff_A,
                                            torsion_atoms=self.torsion_atoms, states=self.states_source,
                                            seed=int(self.seed.value))
        ov = self.overview
        parts = [f"<b>host {html.escape(ov.species.host)}, guest {html.escape(ov.species.guest)}</b>",
                 frame_html(ov.species.stats)]
        if len(ov.species.traps):
            parts += ["<b>trap depths</b> (hole = IP_host − IP_guest, electron = EA_guest − EA_host; "
                      "positive: the guest traps)", frame_html(ov.species.traps)]
        if ov.confinement is not None:
            c = ov.confinement.summary()
            parts.append(f'<div class="clusterlab-confinement">triplet confinement: '
                         f'{100 * c["confined_fraction"]:.1f} % of {c["n_guest_sites"]} guest sites below every '
                         f'host neighbour within {c["cutoff_A"]:.2f} Å (mean margin {c["margin_mean_eV"]:.3f} eV)'
                         '</div>')
        if ov.state_order is not None:
            so = ov.state_order.summary()
            parts.append(f"state order: S1 changes character at {so['n_S1_reordered']} of {so['n_sites']} sites, "
                         f"T1 at {so['n_T1_reordered']}")
        parts += [f"<i>{html.escape(n)}</i>" for n in ov.notes]
        self.doped_html.value = _TABLE_CSS + "<br>".join(parts)
        _style.show_png(self.torsion_plot, _style.figure_png(plot_torsion(ov.torsion)) if ov.torsion is not None
                        else None)

    # ------------------------------------------------------------- scene
    def _draw_film_scene(self) -> None:
        film = self.film
        frame = self.frame_pick.value if self.frame_pick.value is not None else 0
        q = self.quantity.value
        self.site_values = {}
        if q is not None and len(self.data) and "frame" in self.data:
            sub = self._subset()
            sub = sub[sub["frame"] == frame]
            vals = pd.to_numeric(sub[q], errors="coerce")
            self.site_values = {int(m): float(v) for m, v in zip(sub["molecule"], vals) if np.isfinite(v)}
        lo = min(self.site_values.values()) if self.site_values else 0.0
        hi = max(self.site_values.values()) if self.site_values else 1.0
        span = hi - lo if hi > lo else 1.0
        mol_of_atom = film.molecule_of_atom
        b = np.zeros(film.n_atoms)
        chains = np.full(film.n_atoms, _style.CHAIN_FILM, dtype=object)
        for m, v in self.site_values.items():
            idx = film.molecule_atoms(m)
            b[idx] = _style.BFACTOR_SCALE * (v - lo) / span
            chains[idx] = _style.CHAIN_SITE
        geo = film.frame_geometry(int(frame), periodic=film.has_box)
        self.scene_pdb = _style.film_scene_pdb(film.symbols, geo.positions_A, mol_of_atom, film.molecule_resnames,
                                               bfactors=b, chain=list(chains), title=f"site energies, frame {frame}")
        self.colourbar.value = _style.colourbar_html(lo, hi, f"{quantity_name(q) if q else 'site energy'} (eV), frame {frame}") \
            if self.site_values else '<i style="color:#777">no site energies yet</i>'
        if self.view is None:
            return
        import nglview

        if self._site_comp is not None:
            self.view.remove_component(self._site_comp)
        comp = self.view.add_component(nglview.TextStructure(self.scene_pdb, ext="pdb"),
                                       default_representation=False, name="sites")
        comp.add_representation("line", selection=f":{_style.CHAIN_FILM}", color=_style.FILM_REST, opacity=0.35)
        if self.site_values:
            # thick enough to read among the film's lines
            comp.add_representation("ball+stick", selection=f":{_style.CHAIN_SITE}", color="bfactor",
                                    color_scale=list(_style.ENERGY_SCALE),
                                    color_domain=[0.0, _style.BFACTOR_SCALE], radius_scale=1.6)
        self._site_comp = comp

    def _on_tab(self, change: dict) -> None:
        # a view created in a hidden tab has no size: fit it when its tab shows
        if change["new"] == 2 and self.view is not None:
            with self.errors:
                self.view.handle_resize()
                if self._site_comp is not None:
                    self._site_comp.center()

    # ------------------------------------------------------------ export
    def export(self, path: str | os.PathLike[str] | None = None) -> str:
        """Write the shown table as CSV (one row per site) and return the path.

        Raises
        ------
        clusterlab.errors.InputError
            If there is nothing to export.
        """
        if not len(self.data):
            raise InputError("nothing to export yet: run a sample or load a store first.")
        p = os.fspath(path) if path is not None else self.export_path.value.strip()
        if not p:
            raise InputError("no export path given; type a file name such as 'site_energies.csv'.")
        parent = os.path.dirname(os.path.abspath(p))
        os.makedirs(parent, exist_ok=True)
        self.data.to_csv(p, index=False)
        self._set_status(f"wrote {len(self.data)} rows to {html.escape(os.path.abspath(p))}", "ok")
        return p

    def export_transport(self, folder: str | os.PathLike[str] | None = None, *, cutoff_A: float | None = None) -> dict:
        """Write the transport-model export (site and pair tables as Parquet and
        CSV with a JSON sidecar; see the README) of the shown sites; returns the paths."""
        if not len(self.data):
            raise InputError("nothing to export yet: run a sample or load a store first.")
        f = os.fspath(folder) if folder is not None else self.transport_path.value.strip()
        if not f:
            raise InputError("no export folder given.")
        cut = float(self.transport_cutoff.value if cutoff_A is None else cutoff_A)
        paths = export_study(self.film, f, sample=self.data, cutoff_A=cut)
        self._set_status(f"transport export written to {html.escape(os.path.abspath(f))}", "ok")
        return paths

    # ---------------------------------------------------------- handlers
    def _on_transport_click(self, _b: Any) -> None:
        self._shown(self.export_transport)

    def _on_load_click(self, _b: Any) -> None:
        self._shown(self.load)

    def _on_export_click(self, _b: Any) -> None:
        self._shown(self.export)
