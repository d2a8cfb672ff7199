"""The shift-convergence panel: run a radius scan in the background.

A thin layer over :func:`clusterlab.radius_scan` (and
:func:`clusterlab.study.plots.plot_convergence`): the panel collects the
settings, starts the scan in a worker thread, and redraws the table and the
convergence plot each time the scan reports a finished radius. Errors land
in the panel's error box, never lost in a thread.
"""

from __future__ import annotations

import html
import threading
import traceback
from collections.abc import Sequence
from typing import Any

import ipywidgets as widgets
import numpy as np
import pandas as pd
import traitlets

from ..labels import MAX_COLUMNS, display_table, left_out_note
from ..qm.method import Method
from ..ranges import parse_radii
from ..store import ResultStore
from ..study.plots import plot_convergence
from ..study.scan import pick_species_molecule, radius_scan
from ._controls import Radii, fit_control, format_radii, link_radii, row, species_dropdown
from ._jobs import BackgroundJob, count_text
from . import _style

__all__ = ["ShiftScanPanel", "MethodControls", "make_method"]


def make_method(preset: str, **overrides: Any) -> Method:
    """``Method.preset(preset, **overrides)`` with empty overrides dropped."""
    clean = {k: v for k, v in overrides.items() if v is not None and v != ""}
    return Method.preset(preset, **clean)


#: bookkeeping columns not shown in the panels' tables (they stay in exports)
HIDDEN_COLUMNS = frozenset({
    "key", "kind", "status", "method_key", "pid", "host", "worker", "version", "created_at", "stored_at",
    "n_failures", "error", "scf_energy_Eh", "rule", "qm_shell_A", "resname", "centroid_x_A", "centroid_y_A",
    "centroid_z_A", "S1_follow_overlap", "S1_followed_eV", "S1_followed_shift_eV",
})


def frame_html(df: pd.DataFrame, *, max_rows: int = 200, css_class: str = "clusterlab-table",
               hide: frozenset[str] = HIDDEN_COLUMNS, max_columns: int | None = MAX_COLUMNS) -> str:
    """HTML table of a DataFrame as :func:`clusterlab.labels.display_table`
    shows it (human headers, shifts and σ in meV, molecule/frame/radius
    first, at most ``max_columns`` columns, the left-out ones named under
    it); non-scalar and bookkeeping columns (``hide``) left out."""
    if df is None or len(df) == 0:
        return '<div style="color:#777">no results yet</div>'
    keep = [c for c in df.columns if c not in hide
            and df[c].map(lambda v: np.isscalar(v) or v is None).all()]
    shown = display_table(df[keep].head(max_rows), max_columns=max_columns)
    note = left_out_note(shown, "in the panel's table and the export")
    note = (f'<div class="clusterlab-hidden-columns" style="color:#555;font-size:11px">'
            f'{html.escape(note)}</div>') if note else ""
    return shown.to_html(index=False, classes=css_class, border=0) + note


_TABLE_CSS = ("<style>.clusterlab-table{border-collapse:collapse;font-size:12px}"
              ".clusterlab-table th{background:#E9E4D8;padding:2px 6px;text-align:right}"
              ".clusterlab-table td{padding:1px 6px;text-align:right;border-top:1px solid #e6e1d6}</style>")


class MethodControls(widgets.VBox):
    """Method preset dropdown plus basis and state-count overrides.

    Choosing a preset fills the basis and state boxes with the preset's
    values; :meth:`build` returns ``Method.preset(name, basis=..., n_singlets=...,
    n_triplets=...)``.
    """

    def __init__(self, preset: str = "draft", *, basis: str = "", n_singlets: int | None = None,
                 n_triplets: int | None = None) -> None:
        presets = dict(Method.presets())
        if preset not in presets:
            presets = {preset: "", **presets}
        self._descriptions = presets
        lab = _style.LABEL_STYLE
        self.preset = widgets.Dropdown(options=list(presets), value=preset, description="method", style=lab)
        self.note = widgets.HTML()
        self.basis = widgets.Combobox(value="", options=["sto-3g", "6-31g", "def2-svp", "def2-tzvp"],
                                      description="basis", ensure_option=False, style=lab)
        self.singlets = widgets.BoundedIntText(value=0, min=0, max=50, description="singlets",
                                               layout=widgets.Layout(width="180px"), style=lab)
        self.triplets = widgets.BoundedIntText(value=0, min=0, max=50, description="triplets",
                                               layout=widgets.Layout(width="180px"), style=lab)
        self.preset.observe(self._on_preset, names="value")
        self._on_preset({"new": preset})
        if basis:
            self.basis.value = basis
        if n_singlets is not None:
            self.singlets.value = int(n_singlets)
        if n_triplets is not None:
            self.triplets.value = int(n_triplets)
        super().__init__([row(self.preset, self.basis), self.note,
                          row(self.singlets, self.triplets)])

    def _on_preset(self, change: dict) -> None:
        name = change["new"]
        self.note.value = (f'<span style="color:#555;font-size:12px">preset {html.escape(name)}: '
                           f'{html.escape(self._descriptions.get(name, ""))} (the boxes override it)</span>')
        try:
            m = make_method(name)
        except Exception:  # noqa: BLE001 - shown when the run builds the method
            return
        self.basis.value = m.basis
        self.singlets.value = int(m.n_singlets)
        self.triplets.value = int(m.n_triplets)

    def build(self) -> Method:
        """The Method of the current settings."""
        return make_method(self.preset.value, basis=self.basis.value.strip(),
                           n_singlets=int(self.singlets.value), n_triplets=int(self.triplets.value))


class ShiftScanPanel(BackgroundJob, widgets.VBox):
    """Run a radius scan of the environment shift and watch it converge.

    Parameters
    ----------
    film : clusterlab.Film
    explorer : FilmExplorer, optional
        When given, the central molecule, frame, rule and QM shell follow
        the explorer, and its radius is a default scan radius.
    molecule, frame : int
        Central molecule and frame when there is no explorer.
    radii_A : sequence of float, default (6, 9, 12)
        Scan radii (Å) at start.
    preset : str, default "draft"
        Method preset at start (see ``Method.presets()``).
    basis : str, optional
        Basis at start ("" keeps the preset's).
    n_singlets, n_triplets : int, optional
        State counts at start (None keeps the preset's).
    tol_meV : float, default 10.0
        Convergence tolerance (meV).
    store : str, optional
        Path of a result store ("" for none).
    runner : str, default "serial"

    Traits
    ------
    molecule_id : Int
        Central molecule (follows the explorer when there is one).
    frame_index : Int
    cut_rule : Unicode
        ``"atom"`` or ``"centroid"``.
    qm_shell_A : Float
        QM-shell distance (Å).
    radii_A : List of Float
        Scan radii (Å), ascending; mirrors the radii box (text in the
        grammar of :mod:`clusterlab.ranges`, e.g. ``"6-15:3"``).
    tol_meV : Float
        Convergence tolerance (meV).
    with_periodic_limit : Bool
        End the scan with the periodic (Ewald) embedding.

    Each trait is linked to its control (``molecule``, ``frame``, ``rule``,
    ``qm_shell``, ``radii``, ``tol``, ``periodic_limit``).

    Attributes
    ----------
    rows : list of dict
        Rows reported so far by the running scan.
    narration : list of str
        The scan's narration so far (``radius_scan(on_step=)``).
    result : ScanResult or None
        The finished scan's result.
    error : str
        Text of the last failure ("" if none).
    errors : ipywidgets.Output
        Tracebacks of failures.
    plot : ipywidgets.Image
        The convergence plot (PNG).
    table_html : ipywidgets.HTML
    progress : ipywidgets.IntProgress
    """

    molecule_id = traitlets.CInt(0)
    frame_index = traitlets.CInt(0)
    cut_rule = traitlets.Unicode("atom")
    qm_shell_A = traitlets.Float(0.0)
    radii_A = Radii((6.0, 9.0, 12.0))
    tol_meV = traitlets.Float(10.0)
    with_periodic_limit = traitlets.Bool(False)

    def __init__(self, film: Any, *, explorer: Any = None, molecule: int = 0, frame: int = 0,
                 radii_A: Sequence[float] = (6.0, 9.0, 12.0), preset: str = "draft", basis: str = "",
                 n_singlets: int | None = None, n_triplets: int | None = None, tol_meV: float = 10.0,
                 periodic_limit: bool = False, store: str = "", runner: str = "serial", **kwargs: Any) -> None:
        self.film = film
        self.explorer = explorer
        self.rows: list[dict] = []
        #: the running scan's narration, one line per step (the status line shows the latest)
        self.narration: list[str] = []
        self.result: Any = None
        self.error = ""
        self.method: Any = None
        self.n_plots = 0
        #: shift columns to plot (None: all with numbers, state-followed duplicates left out)
        self.plot_states: list[str] | None = None
        self._lock = threading.Lock()
        self._init_job()
        self._cancel_message = 'cancelling after the radius in progress…'

        self.errors = widgets.Output(layout=widgets.Layout(max_height="220px", overflow="auto"))
        lab = _style.LABEL_STYLE
        w = widgets.Layout
        self.method_controls = MethodControls(preset, basis=basis, n_singlets=n_singlets,
                                              n_triplets=n_triplets)
        self.preset = self.method_controls.preset
        self.basis = self.method_controls.basis
        self.singlets = self.method_controls.singlets
        self.triplets = self.method_controls.triplets
        self.radii = widgets.Text(value=format_radii(radii_A), description="radii (Å)",
                                  placeholder="6, 9, 12  or  6-15:3", style=lab)
        self.radii.add_class("clusterlab-radii")
        self.tol = widgets.BoundedFloatText(value=tol_meV, min=0.01, max=1000.0, step=1.0,
                                            description="tol (meV)", layout=w(width="180px"), style=lab)
        self.periodic_limit = widgets.Checkbox(value=periodic_limit, description="periodic (Ewald) limit",
                                               indent=False, layout=w(width="auto"))
        self.store = widgets.Text(value=str(store), description="store", placeholder="optional .sqlite path",
                                  layout=w(width="420px"), style=lab)
        self.runner = widgets.Dropdown(options=["serial", "processes", "dask"], value=runner,
                                       description="runner", layout=w(width="220px"), style=lab)
        self.molecule = widgets.BoundedIntText(value=molecule, min=0, max=max(film.n_molecules - 1, 0),
                                               description="molecule", layout=w(width="180px"), style=lab)
        self.species = species_dropdown(film)
        self.frame = widgets.BoundedIntText(value=frame, min=0, max=max(film.n_frames - 1, 0),
                                            description="frame", layout=w(width="180px"), style=lab)
        self.rule = widgets.Dropdown(options=["atom", "centroid"], value="atom", description="rule",
                                     layout=w(width="200px"), style=lab)
        self.qm_shell = widgets.BoundedFloatText(value=0.0, min=0.0, max=20.0, step=0.25,
                                                 description="QM shell (Å)", layout=w(width="180px"), style=lab)
        self.run_button = widgets.Button(description="run scan", button_style="success", icon="play",
                                         layout=w(width="auto"))
        self.cancel_button = widgets.Button(description="cancel", button_style="warning", icon="stop",
                                            disabled=True, layout=w(width="auto"))
        self.progress = widgets.IntProgress(value=0, min=0, max=1, description="radii",
                                            layout=w(width="320px"), style=lab)
        self.status = widgets.HTML(value='<span class="clusterlab-status" style="color:#555">ready</span>')
        self.plot = widgets.Image(format="png", layout=w(max_width="560px"))
        _style.show_png(self.plot, None)
        self.table_html = widgets.HTML(value=_TABLE_CSS + frame_html(pd.DataFrame()))

        for name, control in (("molecule_id", self.molecule), ("frame_index", self.frame),
                              ("cut_rule", self.rule), ("qm_shell_A", self.qm_shell), ("tol_meV", self.tol),
                              ("with_periodic_limit", self.periodic_limit)):
            traitlets.link((control, "value"), (self, name))
        link_radii(self.radii, self)
        if explorer is not None:
            for source, name, control in (("molecule", "molecule_id", self.molecule),
                                          ("frame", "frame_index", self.frame), ("rule", "cut_rule", self.rule),
                                          ("qm_shell_A", "qm_shell_A", self.qm_shell)):
                traitlets.dlink((explorer, source), (self, name))
                control.disabled = True
            self.species.disabled = True
        self.species.observe(self._on_species, names="value")

        self.run_button.on_click(self._on_run_click)
        self.cancel_button.on_click(self._on_cancel_click)

        settings = widgets.VBox([
            self.method_controls,
            row(self.radii, self.tol, self.periodic_limit),
            row(self.species, self.molecule, self.frame, self.rule, self.qm_shell),
            row(self.store, self.runner),
            row(self.run_button, self.cancel_button, self.progress),
            self.status,
        ])
        results = widgets.VBox([self.plot, widgets.Box([self.table_html],
                                                       layout=widgets.Layout(overflow="auto", max_width="100%"))])
        super().__init__([widgets.HTML(_style.PANEL_CSS), settings, results, self.errors], **kwargs)
        self.add_class("clusterlab-scan-panel")
        self.add_class("clusterlab-panel")

    def _on_species(self, change: dict) -> None:
        """A chosen species puts its molecule nearest the box centre into the
        molecule box (:func:`clusterlab.study.scan.pick_species_molecule`)."""
        if change["new"]:
            self.molecule_id = pick_species_molecule(self.film, change["new"], frame=self.frame_index)

    # ------------------------------------------------------------ checks
    @traitlets.validate("molecule_id")
    def _valid_molecule(self, proposal: dict) -> int:
        return self.film.check_molecule(proposal["value"])

    @traitlets.validate("frame_index")
    def _valid_frame(self, proposal: dict) -> int:
        return self.film.check_frame(proposal["value"])

    @traitlets.validate("qm_shell_A")
    def _valid_shell(self, proposal: dict) -> float:
        return fit_control(self.qm_shell, proposal["value"], "qm_shell_A", "Å", grow=True)

    @traitlets.validate("tol_meV")
    def _valid_tol(self, proposal: dict) -> float:
        return fit_control(self.tol, proposal["value"], "tol_meV", "meV")

    # ----------------------------------------------------------- settings
    def build_method(self) -> Any:
        """The Method of the current settings (``Method.preset`` + overrides)."""
        return self.method_controls.build()

    def settings(self) -> dict[str, Any]:
        """Keyword arguments the scan will get (except film, method and callbacks).

        Raises
        ------
        clusterlab.errors.InputError
            If the radii box does not hold radii in the grammar of :mod:`clusterlab.ranges`.
        """
        s: dict[str, Any] = {
            "molecule": self.molecule_id,
            "radii": parse_radii(self.radii.value),
            "frame": self.frame_index,
            "rule": self.cut_rule,
            "qm_shell": self.qm_shell_A,
            "periodic_limit": self.with_periodic_limit,
            "tol_eV": self.tol_meV * 1e-3,
            "runner": str(self.runner.value),
        }
        if self.store.value.strip():
            s["store"] = ResultStore(self.store.value.strip())
        return s

    # --------------------------------------------------------------- run
    def run(self) -> "ShiftScanPanel":
        """Start the scan in a background thread (returns at once)."""
        if self.running:
            self._set_status("a scan is already running; cancel it first", "warn")
            return self
        self.error = ""
        self.exception = None
        self.errors.clear_output()
        try:
            settings = self.settings()
            self.method = self.build_method()
        except Exception as exc:  # noqa: BLE001 - shown to the user; the last scan's results stay
            self._fail(exc)
            return self
        self.rows = []
        self.narration = []
        self.result = None
        self.n_plots = 0
        self.progress.max = len(settings["radii"])
        self.progress.value = 0
        self.progress.bar_style = "info"
        self.table_html.value = _TABLE_CSS + frame_html(pd.DataFrame())
        _style.show_png(self.plot, None)
        self.run_button.disabled = True
        self.cancel_button.disabled = False
        self._set_status(f"running {len(settings['radii'])} radii with {html.escape(self.method.describe())}",
                         "info")
        self._start(self._work, (settings,), "clusterlab-scan")
        return self

    def _work(self, settings: dict[str, Any]) -> None:
        s = dict(settings)
        molecule, radii = s.pop("molecule"), s.pop("radii")
        try:
            result = radius_scan(self.film, molecule, radii, self.method, progress=False, on_result=self._on_result,
                                 cancel=self._cancel, on_step=self._on_step, **s)
        except Exception as exc:  # noqa: BLE001 - shown in the panel
            if self._cancel.is_set():
                # a cancel is not a failure: whatever the scan raised on the way out, keep what finished
                self._show_partial()
            else:
                self._fail(exc)
        else:
            self.result = result
            self._finish(result)
        finally:
            store = s.get("store")
            if store is not None:
                store.close()
            self.run_button.disabled = False
            self.cancel_button.disabled = True

    def _on_step(self, line: str) -> None:
        """The scan's narration (worker thread): the status line shows the latest step."""
        self.narration.append(line)
        if not self._cancel.is_set():
            self._set_status(html.escape(line), "info")

    def _on_result(self, row: dict) -> None:
        """Called by the scan (worker thread) after each radius."""
        try:
            with self._lock:
                self.rows.append(dict(row))
                df = pd.DataFrame(self.rows)
            r = pd.to_numeric(df.get("radius_A", pd.Series(dtype=float)), errors="coerce")
            self.progress.value = min(int(np.isfinite(r).sum()), self.progress.max)
            self.table_html.value = _TABLE_CSS + frame_html(df.drop(columns=["frame", "molecule"], errors="ignore"))
            self._draw(df)
        except Exception:  # noqa: BLE001 - never break the scan because of the display
            self.errors.append_stderr(traceback.format_exc())

    def plotted_states(self, df: pd.DataFrame) -> list[str]:
        """Shift columns drawn: :attr:`plot_states` if set, else every
        ``*_shift_eV`` column holding numbers except the state-followed
        duplicates."""
        if self.plot_states is not None:
            return [c for c in self.plot_states if c in df.columns]
        return [c for c in df.columns if str(c).endswith("_shift_eV") and "_followed" not in str(c)
                and pd.to_numeric(df[c], errors="coerce").notna().any()]

    def _draw(self, df: pd.DataFrame, states: list[str] | None = None) -> None:
        states = [c for c in states if c in df.columns] if states else self.plotted_states(df)
        if not states or "radius_A" not in df.columns:
            return
        # the vacuum reference (radius 0) is the zero of every shift: leave it off the axis
        rows = df[pd.to_numeric(df["radius_A"], errors="coerce") > 0]
        if not len(rows):
            return
        fig = plot_convergence(rows, states, tol_eV=self.tol_meV * 1e-3)
        _style.show_png(self.plot, _style.figure_png(fig))
        self.n_plots += 1

    def _show_partial(self) -> None:
        """Status, table and plot of a cancelled scan (the radii reported before the cancel)."""
        with self._lock:
            df = pd.DataFrame(self.rows)
        n = len(self.rows)
        self._set_status(f"cancelled after {count_text(n, 'radius', 'radii')}"
                         + ("; the finished radii are kept below" if n else ""), "warn")
        self.progress.bar_style = "warning"
        if n:
            self.table_html.value = _TABLE_CSS + frame_html(df.drop(columns=["frame", "molecule"],
                                                                    errors="ignore"))
            try:
                self._draw(df)
            except Exception:  # noqa: BLE001 - never hide the cancel because of the display
                self.errors.append_stderr(traceback.format_exc())

    def _finish(self, result: Any) -> None:
        table = getattr(result, "table", None)
        tracked = getattr(result, "tracked", None)
        if isinstance(table, pd.DataFrame) and len(table):
            self.table_html.value = _TABLE_CSS + frame_html(table.drop(columns=["frame", "molecule"],
                                                                       errors="ignore"))
            try:
                # the finished plot draws exactly the quantities the verdict judged
                self._draw(table, list(tracked) if tracked else None)
            except Exception:  # noqa: BLE001
                self.errors.append_stderr(traceback.format_exc())
        verdict = getattr(result, "verdict", None)
        msg = getattr(verdict, "message", "") if verdict is not None else ""
        if self._cancel.is_set():
            self._set_status(f"cancelled after {count_text(len(self.rows), 'radius', 'radii')}; the finished radii are "
                             f"kept below. {html.escape(str(msg))}", "warn")
            self.progress.bar_style = "warning"
        else:
            self.progress.value = self.progress.max
            self.progress.bar_style = "success"
            ok = bool(getattr(verdict, "converged", False))
            self._set_status(f"finished. {html.escape(str(msg))}", "ok" if ok else "warn")


    @property
    def table(self) -> pd.DataFrame:
        """The finished result's table, or the rows reported so far."""
        t = getattr(self.result, "table", None)
        if isinstance(t, pd.DataFrame):
            return t
        with self._lock:
            return pd.DataFrame(self.rows)
