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
from collections.abc import Callable, Sequence
from typing import Any

import ipywidgets as widgets
import numpy as np
import pandas as pd

from ._jobs import BackgroundJob
from . import _style

__all__ = ["ShiftScanPanel", "MethodControls", "parse_radii", "library_scan", "method_presets", "make_method"]


# ------------------------------------------------------------- library links
def library_scan() -> Callable[..., Any]:
    """The library's :func:`radius_scan` (imported on first use)."""
    try:
        from clusterlab import radius_scan  # type: ignore[attr-defined]
    except ImportError:
        from clusterlab.study.scan import radius_scan  # type: ignore[no-redef]
    return radius_scan


def _method_class() -> Any:
    try:
        from clusterlab import Method  # type: ignore[attr-defined]
    except ImportError:
        from clusterlab.qm.method import Method  # type: ignore[no-redef]
    return Method


def method_presets() -> dict[str, str]:
    """Preset name -> one-line description, from ``Method.presets()``."""
    return dict(_method_class().presets())


def make_method(preset: str, **overrides: Any) -> Any:
    """``Method.preset(preset, **overrides)`` with empty overrides dropped."""
    clean = {k: v for k, v in overrides.items() if v is not None and v != ""}
    return _method_class().preset(preset, **clean)


def parse_radii(text: str) -> list[float]:
    """Radii (Å) from ``"6, 9, 12"``, ``"6 9 12"`` or a range ``"6:15:3"``
    (start:stop:step, stop included when on the grid).

    Raises
    ------
    clusterlab.errors.InputError
        On anything that is not a list of positive numbers.
    """
    from clusterlab.errors import InputError

    t = str(text).strip()
    if not t:
        raise InputError("no radii given; type radii in Å such as '6, 9, 12' or a range '6:15:3'.")
    try:
        if ":" in t:
            parts = [float(p) for p in t.split(":")]
            if len(parts) != 3 or parts[2] <= 0:
                raise ValueError
            start, stop, step = parts
            n = int(np.floor((stop - start) / step + 1e-9)) + 1
            radii = [round(start + i * step, 6) for i in range(max(n, 0))]
        else:
            radii = [float(p) for p in t.replace(",", " ").split()]
    except ValueError as exc:
        raise InputError(f"radii {text!r} are not valid; use numbers in Å such as '6, 9, 12' "
                         "or a range start:stop:step such as '6:15:3'.") from exc
    if not radii or any(not np.isfinite(r) or r <= 0 for r in radii):
        raise InputError(f"radii {text!r} must be positive numbers of Å; got {radii}.")
    return sorted(set(radii))


#: bookkeeping columns not shown in the panels' tables (they stay in exports)
HIDDEN_COLUMNS = frozenset({
    "key", "kind", "status", "method_key", "pid", "host", "worker", "version", "created_at", "stored_at",
    "n_failures", "error", "scf_energy_Eh", "rule", "qm_shell_A", "resname", "centroid_x_A", "centroid_y_A",
    "centroid_z_A", "S1_follow_overlap", "S1_followed_eV", "S1_followed_shift_eV",
})


def frame_html(df: pd.DataFrame, *, max_rows: int = 200, css_class: str = "clusterlab-table",
               hide: frozenset[str] = HIDDEN_COLUMNS) -> str:
    """HTML table of a DataFrame (scalar columns, floats with 4 decimals;
    bookkeeping columns in ``hide`` left out)."""
    if df is None or len(df) == 0:
        return '<div style="color:#777">no results yet</div>'
    keep = [c for c in df.columns if c not in hide
            and df[c].map(lambda v: np.isscalar(v) or v is None).all()]
    return df[keep].head(max_rows).to_html(index=False, classes=css_class, float_format=lambda v: f"{v:.4f}",
                                           na_rep="–", border=0)


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
                 n_triplets: int | None = None, errors: widgets.Output | None = None) -> None:
        try:
            presets = method_presets()
        except Exception as exc:  # noqa: BLE001 - the engine may be missing; say so
            presets = {preset: "(method presets unavailable)"}
            if errors is not None:
                errors.append_stderr(f"Method presets could not be loaded: {exc}\n")
        if preset not in presets:
            presets = {preset: "", **presets}
        self._descriptions = presets
        self.preset = widgets.Dropdown(options=list(presets), value=preset, description="method")
        self.note = widgets.HTML()
        self.basis = widgets.Combobox(value="", options=["sto-3g", "6-31g", "def2-svp", "def2-tzvp"],
                                      description="basis", ensure_option=False)
        self.singlets = widgets.BoundedIntText(value=0, min=0, max=50, description="singlets",
                                               layout=widgets.Layout(width="170px"))
        self.triplets = widgets.BoundedIntText(value=0, min=0, max=50, description="triplets",
                                               layout=widgets.Layout(width="170px"))
        self.preset.observe(self._on_preset, names="value")
        self._on_preset({"new": preset})
        if basis:
            self.basis.value = basis
        if n_singlets is not None:
            self.singlets.value = int(n_singlets)
        if n_triplets is not None:
            self.triplets.value = int(n_triplets)
        super().__init__([widgets.HBox([self.preset, self.basis]), self.note,
                          widgets.HBox([self.singlets, self.triplets])])

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

    def build(self) -> Any:
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

    Attributes
    ----------
    scan_fn : callable
        The scan function; defaults to the library's ``radius_scan``
        (imported on first use). Tests put a recording fake here.
    plot_fn : callable
        ``plot_fn(scan_df, tol_eV=...) -> Figure``; defaults to
        :func:`clusterlab.study.plots.plot_convergence`.
    rows : list of dict
        Rows reported so far by the running scan.
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

    def __init__(self, film: Any, *, explorer: Any = None, molecule: int = 0, frame: int = 0,
                 radii_A: Sequence[float] = (6.0, 9.0, 12.0), preset: str = "draft", basis: str = "",
                 n_singlets: int | None = None, n_triplets: int | None = None, tol_meV: float = 10.0,
                 periodic_limit: bool = False, store: str = "", runner: str = "serial", **kwargs: Any) -> None:
        self.film = film
        self.explorer = explorer
        self._scan_fn: Callable[..., Any] | None = None
        self._plot_fn: Callable[..., Any] | None = None
        self.rows: list[dict] = []
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
        self.method_controls = MethodControls(preset, basis=basis, n_singlets=n_singlets,
                                              n_triplets=n_triplets, errors=self.errors)
        self.preset = self.method_controls.preset
        self.basis = self.method_controls.basis
        self.singlets = self.method_controls.singlets
        self.triplets = self.method_controls.triplets
        self.radii = widgets.Text(value=", ".join(f"{r:g}" for r in radii_A), description="radii (Å)",
                                  placeholder="6, 9, 12  or  6:15:3")
        self.tol = widgets.BoundedFloatText(value=tol_meV, min=0.01, max=1000.0, step=1.0,
                                            description="tol (meV)", layout=widgets.Layout(width="170px"))
        self.periodic_limit = widgets.Checkbox(value=periodic_limit, description="periodic (Ewald) limit",
                                               indent=False)
        self.store = widgets.Text(value=str(store), description="store", placeholder="optional .sqlite path")
        self.runner = widgets.Dropdown(options=["serial", "processes", "dask"], value=runner,
                                       description="runner", layout=widgets.Layout(width="200px"))
        self.molecule = widgets.BoundedIntText(value=molecule, min=0, max=max(film.n_molecules - 1, 0),
                                               description="molecule", layout=widgets.Layout(width="170px"))
        self.frame = widgets.BoundedIntText(value=frame, min=0, max=max(film.n_frames - 1, 0),
                                            description="frame", layout=widgets.Layout(width="170px"))
        self.rule = widgets.Dropdown(options=["atom", "centroid"], value="atom", description="rule",
                                     layout=widgets.Layout(width="200px"))
        self.qm_shell = widgets.BoundedFloatText(value=0.0, min=0.0, max=20.0, step=0.25,
                                                 description="QM shell", layout=widgets.Layout(width="170px"))
        self.run_button = widgets.Button(description="run scan", button_style="success", icon="play")
        self.cancel_button = widgets.Button(description="cancel", button_style="warning", icon="stop",
                                            disabled=True)
        self.progress = widgets.IntProgress(value=0, min=0, max=1, description="radii",
                                            layout=widgets.Layout(width="320px"))
        self.status = widgets.HTML(value='<span style="color:#555">ready</span>')
        self.plot = widgets.Image(format="png", layout=widgets.Layout(max_width="560px"))
        self.table_html = widgets.HTML(value=_TABLE_CSS + frame_html(pd.DataFrame()))

        if explorer is not None:
            explorer.on_change(self._follow_explorer)
            self._follow_explorer(explorer.cluster)
            for w in (self.molecule, self.frame, self.rule, self.qm_shell):
                w.disabled = True

        self.run_button.on_click(self._on_run_click)
        self.cancel_button.on_click(self._on_cancel_click)

        settings = widgets.VBox([
            self.method_controls,
            widgets.HBox([self.radii, self.tol, self.periodic_limit]),
            widgets.HBox([self.molecule, self.frame, self.rule, self.qm_shell]),
            widgets.HBox([self.store, self.runner]),
            widgets.HBox([self.run_button, self.cancel_button, self.progress]),
            self.status,
        ])
        results = widgets.VBox([self.plot, widgets.Box([self.table_html],
                                                       layout=widgets.Layout(overflow="auto", max_width="100%"))])
        super().__init__([settings, results, self.errors], **kwargs)
        self.add_class("clusterlab-scan-panel")

    # ------------------------------------------------------------- links
    @property
    def scan_fn(self) -> Callable[..., Any]:
        """Scan function (default: the library's ``radius_scan``)."""
        return self._scan_fn if self._scan_fn is not None else library_scan()

    @scan_fn.setter
    def scan_fn(self, fn: Callable[..., Any] | None) -> None:
        self._scan_fn = fn

    @property
    def plot_fn(self) -> Callable[..., Any]:
        """Plot function (default: :func:`clusterlab.study.plots.plot_convergence`)."""
        if self._plot_fn is not None:
            return self._plot_fn
        from clusterlab.study.plots import plot_convergence

        return plot_convergence

    @plot_fn.setter
    def plot_fn(self, fn: Callable[..., Any] | None) -> None:
        self._plot_fn = fn

    def _follow_explorer(self, cluster: Any) -> None:
        ex = self.explorer
        self.molecule.value = ex.molecule
        self.frame.value = ex.frame
        self.rule.value = ex.rule
        self.qm_shell.value = ex.qm_shell_A

    # ----------------------------------------------------------- settings
    def build_method(self) -> Any:
        """The Method of the current settings (``Method.preset`` + overrides)."""
        return self.method_controls.build()

    def settings(self) -> dict[str, Any]:
        """Keyword arguments the scan will get (except film, method and callbacks)."""
        s: dict[str, Any] = {
            "molecule": int(self.molecule.value),
            "radii": parse_radii(self.radii.value),
            "frame": int(self.frame.value),
            "rule": str(self.rule.value),
            "qm_shell": float(self.qm_shell.value),
            "periodic_limit": bool(self.periodic_limit.value),
            "tol_eV": float(self.tol.value) * 1e-3,
            "runner": str(self.runner.value),
        }
        if self.store.value.strip():
            from clusterlab.store import ResultStore

            s["store"] = ResultStore(self.store.value.strip())
        return s

    # --------------------------------------------------------------- run
    def run(self) -> "ShiftScanPanel":
        """Start the scan in a background thread (returns at once)."""
        if self.running:
            self._set_status("a scan is already running; cancel it first", "warn")
            return self
        self.rows = []
        self.result = None
        self.error = ""
        self.exception = None
        self.n_plots = 0
        self.errors.clear_output()
        try:
            settings = self.settings()
            self.method = self.build_method()
            fn = self.scan_fn
        except Exception as exc:  # noqa: BLE001 - shown to the user
            self._fail(exc)
            return self
        self.progress.max = len(settings["radii"])
        self.progress.value = 0
        self.progress.bar_style = "info"
        self.table_html.value = _TABLE_CSS + frame_html(pd.DataFrame())
        self.plot.value = b""
        self.run_button.disabled = True
        self.cancel_button.disabled = False
        self._set_status(f"running {len(settings['radii'])} radii with {html.escape(self.method.describe())}"
                         if hasattr(self.method, "describe") else "running", "info")
        self._start(self._work, (fn, settings), "clusterlab-scan")
        return self

    def _work(self, fn: Callable[..., Any], settings: dict[str, Any]) -> None:
        s = dict(settings)
        molecule, radii = s.pop("molecule"), s.pop("radii")
        try:
            result = fn(self.film, molecule, radii, self.method, progress=False, on_result=self._on_result,
                        cancel=self._cancel, **s)
        except Exception as exc:  # noqa: BLE001 - shown in the panel
            if self._cancel.is_set() and "cancel" in type(exc).__name__.lower():
                self._set_status(f"cancelled after {len(self.rows)} radii", "warn")
                self.progress.bar_style = "warning"
            else:
                self._fail(exc)
        else:
            self.result = result
            self._finish(result)
        finally:
            store = s.get("store")
            if store is not None and hasattr(store, "close"):
                store.close()
            self.run_button.disabled = False
            self.cancel_button.disabled = True

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

    def _draw(self, df: pd.DataFrame) -> None:
        states = self.plotted_states(df)
        if not states or "radius_A" not in df.columns:
            return
        # the vacuum reference (radius 0) is the zero of every shift: leave it off the axis
        rows = df[pd.to_numeric(df["radius_A"], errors="coerce") > 0]
        if not len(rows):
            return
        fig = self.plot_fn(rows, states, tol_eV=float(self.tol.value) * 1e-3)
        self.plot.value = _style.figure_png(fig)
        self.n_plots += 1

    def _finish(self, result: Any) -> None:
        table = getattr(result, "table", None)
        if isinstance(table, pd.DataFrame) and len(table):
            self.table_html.value = _TABLE_CSS + frame_html(table.drop(columns=["frame", "molecule"],
                                                                       errors="ignore"))
            try:
                self._draw(table)
            except Exception:  # noqa: BLE001
                self.errors.append_stderr(traceback.format_exc())
        verdict = getattr(result, "verdict", None)
        msg = getattr(verdict, "message", "") if verdict is not None else ""
        if self._cancel.is_set():
            self._set_status(f"cancelled after {len(self.rows)} radii. {html.escape(str(msg))}", "warn")
            self.progress.bar_style = "warning"
        else:
            self.progress.value = self.progress.max
            self.progress.bar_style = "success"
            ok = bool(getattr(verdict, "converged", False))
            self._set_status(f"finished. {html.escape(str(msg))}", "ok" if ok else "warn")

    def _fail(self, exc: BaseException) -> None:
        self.exception = exc
        self.error = f"{type(exc).__name__}: {exc}"
        text = "".join(traceback.format_exception(type(exc), exc, exc.__traceback__))
        self.errors.append_stderr(text)
        self.progress.bar_style = "danger"
        self._set_status(f"failed: {html.escape(self.error)}", "error")

    def _set_status(self, text: str, kind: str) -> None:
        colour = {"ok": _style.OK, "warn": _style.WARN, "error": "#a00", "info": "#335"}.get(kind, "#555")
        self.status.value = f'<span class="clusterlab-status" style="color:{colour}">{text}</span>'

    @property
    def table(self) -> pd.DataFrame:
        """The finished result's table, or the rows reported so far."""
        t = getattr(self.result, "table", None)
        if isinstance(t, pd.DataFrame):
            return t
        with self._lock:
            return pd.DataFrame(self.rows)
