"""The film explorer: pick a molecule, carve a cluster, see it in 3D.

A thin layer over :meth:`clusterlab.Film.carve` and
:meth:`clusterlab.Film.radius_warnings`: every control change calls the
library and redraws; nothing here computes physics. The 3D view gets a copy
of the coordinates as PDB text (never the analysis Universe).
"""

from __future__ import annotations

import json
import traceback
from collections.abc import Callable
from typing import Any

import ipywidgets as widgets
import numpy as np
import numpy.typing as npt
import traitlets

from ..ranges import is_id_text, parse_ids
from . import _style
from ._controls import fit_control, make_view, row, species_dropdown

__all__ = ["FilmExplorer"]

#: most molecules listed in the molecule dropdown at once
MAX_LISTED = 2000

#: height of the 3D view: with the controls below it the explorer fits a 900 px high screen
VIEW_HEIGHT = "430px"


class FilmExplorer(widgets.VBox):
    """Interactive carving of one film: 3D view, controls and live readout.

    Parameters
    ----------
    film : clusterlab.Film
        Any film :func:`clusterlab.load_film` reads.
    molecule : int, default 0
        Central molecule id at start.
    radius_A : float, default 10.0
        Cut radius at start (Å).
    qm_shell_A : float, default 0.0
        QM-shell distance at start (Å): whole neighbours within it join
        the QM region.
    rule : {"atom", "centroid"}
        Cut rule at start (see :meth:`clusterlab.Film.carve`).
    frame : int, default 0
    max_radius_A : float, default 40.0
        Upper end of the radius slider (Å).
    show_view : bool, default True
        False builds the controls and readout without a 3D view (for
        scripts; the view can still be made later with :meth:`make_view`).

    Traits
    ------
    molecule : Int
        Central molecule id (assigning it selects the molecule, adding it to
        the dropdown when needed; an invalid id raises ``CarvingError``).
    radius_A : Float
        Cut radius (Å); a value beyond the slider's end extends the slider.
    qm_shell_A : Float
        QM-shell distance (Å).
    rule : Unicode
        Cut rule, ``"atom"`` or ``"centroid"``.
    frame : Int
    periodic : Bool
        Periodic images on (only when the film has a box).

    Each trait is linked to its control; changing either re-carves.

    Attributes
    ----------
    film : clusterlab.Film
    cluster : clusterlab.Cluster or None
        The cluster of the current settings (None after a carve error).
    error : str
        Message of the last carve error ("" when the last carve worked).
    view : nglview.NGLWidget or None
    scene_pdb : str
        The cluster PDB text last sent to the view.
    pick_label : str
        What the view's label says about the last picked atom (its molecule
        id, residue name and part of the cluster); "" once the centre has
        changed by any other way than that pick.
    errors : ipywidgets.Output
        Unexpected exceptions from callbacks.

    Examples
    --------
    >>> ex = FilmExplorer(film, molecule=3, radius_A=12.0)  # doctest: +SKIP
    >>> ex                                                   # doctest: +SKIP
    >>> ex.radius_A = 15.0; ex.cluster.n_env_molecules       # doctest: +SKIP
    """

    molecule = traitlets.CInt(0)
    radius_A = traitlets.Float(10.0)
    qm_shell_A = traitlets.Float(0.0)
    rule = traitlets.Unicode("atom")
    frame = traitlets.CInt(0)
    periodic = traitlets.Bool(False)

    def __init__(self, film: Any, *, molecule: int = 0, radius_A: float = 10.0, qm_shell_A: float = 0.0,
                 rule: str = "atom", frame: int = 0, max_radius_A: float = 40.0, show_view: bool = True,
                 **kwargs: Any) -> None:
        self.film = film
        self.cluster: Any = None
        self.error = ""
        self.scene_pdb = ""
        self._scene_atom_molecule: npt.NDArray[np.int64] = np.zeros(0, dtype=np.int64)
        self._callbacks: list[Callable[[Any], None]] = []
        self._film_comp: Any = None
        self._cluster_comp: Any = None
        self._film_comp_frame: int | None = None
        self._busy = False
        self._fitted: tuple | None = None
        self._picked_molecule: int | None = None
        self.pick_label = ""
        self.n_carves = 0
        lab = _style.LABEL_STYLE

        mols = film.molecules
        self.search = widgets.Text(
            value="", placeholder="id, resname or selection", description="find",
            continuous_update=False, layout=widgets.Layout(width="300px"), style=lab)
        self.species_picker = species_dropdown(film)
        self.molecule_picker = widgets.Dropdown(
            options=self._options(np.arange(min(len(mols), MAX_LISTED))), description="molecule",
            layout=widgets.Layout(width="300px"), style=lab)
        self.radius_slider = widgets.FloatSlider(
            value=float(radius_A), min=0.0, max=float(max(max_radius_A, radius_A)), step=0.5,
            description="radius (Å)", continuous_update=False, readout_format=".1f",
            layout=widgets.Layout(width="380px"), style=lab)
        self.radius_slider.add_class("clusterlab-radius")
        self.shell_slider = widgets.FloatSlider(
            value=float(qm_shell_A), min=0.0, max=8.0, step=0.25, description="QM shell (Å)",
            continuous_update=False, readout_format=".2f", layout=widgets.Layout(width="380px"), style=lab)
        self.rule_toggle = widgets.ToggleButtons(
            options=[("atom within radius", "atom"), ("centroid within radius", "centroid")],
            value=rule, description="cut rule", style={**lab, "button_width": "auto"},
            layout=widgets.Layout(width="auto"))
        self.frame_slider = widgets.IntSlider(
            value=int(frame), min=0, max=max(film.n_frames - 1, 0), description="frame",
            continuous_update=False, disabled=film.n_frames <= 1, layout=widgets.Layout(width="380px"), style=lab)
        self.periodic_box = widgets.Checkbox(
            value=bool(film.has_box), description="periodic images", disabled=not film.has_box, indent=False,
            layout=widgets.Layout(width="auto", margin="2px 24px 2px 12px"))
        self.click_box = widgets.Checkbox(value=True, description="click in view picks the centre", indent=False,
                                          layout=widgets.Layout(width="auto"))
        self.readout = widgets.HTML()
        self.legend = widgets.HTML()
        self.errors = widgets.Output(layout=widgets.Layout(max_height="160px", overflow="auto"))
        self.view: Any = None

        controls = widgets.VBox([
            row(self.search, self.species_picker, self.molecule_picker),
            row(self.radius_slider, self.shell_slider),
            row(self.frame_slider, self.rule_toggle),
            row(self.periodic_box, self.click_box),
        ])
        # the legend and the readout beside the view (not below it): on screen with the view
        side = widgets.VBox([self.legend, self.readout],
                            layout=widgets.Layout(width="330px", min_width="330px"))
        self._left = widgets.VBox([controls], layout=widgets.Layout(flex="1 1 auto"))
        self._top = widgets.HBox([self._left, side])
        if show_view:
            self._attach_view(make_view(VIEW_HEIGHT))
        super().__init__([widgets.HTML(_style.PANEL_CSS), self._top, self.errors], **kwargs)
        self.add_class("clusterlab-explorer")
        self.add_class("clusterlab-panel")

        self.molecule = int(molecule)
        self.molecule_picker.value = self.molecule
        for name, control in (("radius_A", self.radius_slider), ("qm_shell_A", self.shell_slider),
                              ("rule", self.rule_toggle), ("frame", self.frame_slider),
                              ("periodic", self.periodic_box)):
            traitlets.link((control, "value"), (self, name))
        self.observe(self._on_molecule, names="molecule")
        self.molecule_picker.observe(self._on_picker, names="value")
        self.observe(self._on_setting, names=["molecule", "radius_A", "qm_shell_A", "rule", "frame", "periodic"])
        self.search.observe(self._on_search, names="value")
        self.species_picker.observe(self._on_species, names="value")
        self.refresh()

    # ------------------------------------------------------------- settings
    @traitlets.validate("molecule")
    def _valid_molecule(self, proposal: dict) -> int:
        mol = self.film.check_molecule(proposal["value"])
        values = [v for _, v in self.molecule_picker.options]
        if mol not in values:
            self.molecule_picker.options = self._options([mol]) + list(self.molecule_picker.options)
        return mol

    @traitlets.validate("radius_A")
    def _valid_radius(self, proposal: dict) -> float:
        return fit_control(self.radius_slider, proposal["value"], "radius_A", "Å", grow=True)

    @traitlets.validate("qm_shell_A")
    def _valid_shell(self, proposal: dict) -> float:
        return fit_control(self.shell_slider, proposal["value"], "qm_shell_A", "Å", grow=True)

    @traitlets.validate("frame")
    def _valid_frame(self, proposal: dict) -> int:
        return self.film.check_frame(proposal["value"])

    def _on_molecule(self, change: dict) -> None:
        self.molecule_picker.value = change["new"]
        if change["new"] != self._picked_molecule:  # the centre changed by another way than a pick
            self._set_pick_label("")
            self._picked_molecule = None

    def _on_picker(self, change: dict) -> None:
        if change["new"] is not None:
            self.molecule = int(change["new"])

    def settings(self) -> dict[str, Any]:
        """Current carve settings as keyword arguments of the library calls."""
        return {"molecule": self.molecule, "radius": self.radius_A, "frame": self.frame,
                "qm_shell": self.qm_shell_A, "rule": self.rule, "periodic": self.periodic}

    def on_change(self, callback: Callable[[Any], None]) -> None:
        """Call ``callback(cluster)`` after every successful re-carve."""
        self._callbacks.append(callback)

    # ------------------------------------------------------------ molecules
    def _options(self, ids: npt.ArrayLike) -> list[tuple[str, int]]:
        mols = self.film.molecules
        out = []
        for i in np.asarray(ids, dtype=np.int64)[:MAX_LISTED]:
            row = mols.iloc[int(i)]
            out.append((f"{int(i)} · {row['resname']} {row['formula']}", int(i)))
        return out

    def select_molecule(self, molecule: int) -> None:
        """Make ``molecule`` the centre (adds it to the dropdown if needed);
        the same as assigning :attr:`molecule`."""
        self.molecule = int(molecule)

    def find_molecules(self, text: str) -> npt.NDArray[np.int64]:
        """Molecule ids matching ``text``: ids in the grammar of
        :mod:`clusterlab.ranges` (``"7"``, ``"3-9, 12"``, ends included), a
        residue name (case-insensitive), a species text (``"species:GST"``)
        or an MDAnalysis selection string; only molecules of the species
        chosen in :attr:`species_picker` (:meth:`clusterlab.Film.select`)."""
        species = self.species_picker.value or None
        text = text.strip()
        if not text:
            ids = np.arange(self.film.n_molecules)
        elif is_id_text(text):
            ids = parse_ids(text, self.film.n_molecules)
        else:
            names = self.film.molecules["resname"].astype(str).str.upper()
            hit = np.flatnonzero(names.to_numpy() == text.upper())
            ids = hit if hit.size else self.film.select(text)
        if species is not None:
            ids = self.film.select(np.asarray(ids).tolist(), species=species)
        return np.asarray(ids, dtype=np.int64)

    def _on_species(self, change: dict) -> None:
        """List the molecules of the chosen species (of the current search)."""
        self._on_search({"new": self.search.value})

    def _on_search(self, change: dict) -> None:
        with self.errors:
            try:
                ids = self.find_molecules(str(change["new"]))
            except Exception as exc:  # noqa: BLE001 - shown to the user
                self.error = str(exc)
                self._show_readout()
                return
            self.molecule_picker.options = self._options(ids)
            # the options change already selected the first match and re-carved

    def _on_picked(self, change: dict) -> None:
        with self.errors:
            mol, part = self._pick_target(change["new"])
            if mol is None:
                return
            centre = self.click_box.value
            self._picked_molecule = mol if centre else self._picked_molecule
            self._set_pick_label(self._describe_pick(mol, part) + ("" if centre or mol == self.molecule
                                                                   else " (click-to-centre is off)"))
            if centre and mol != self.molecule:
                self.select_molecule(mol)

    def molecule_from_pick(self, picked: dict) -> int | None:
        """Film molecule id of an atom picked in the view (nglview's
        ``picked`` dict: ``{"atom1": {"index": i, ...}, "component": c}``)."""
        return self._pick_target(picked)[0]

    def _pick_target(self, picked: dict) -> tuple[int | None, str]:
        """Molecule id of a picked atom and what the atom is in the scene
        ("QM region", "QM shell", "point charge +0.123 e", "film")."""
        atom = (picked or {}).get("atom1")
        if not isinstance(atom, dict):
            return None, ""
        comp = picked.get("component")
        idx = atom.get("index")
        if idx is not None and self.view is not None and comp is not None:
            ids = self.view._ngl_component_ids
            if self._cluster_comp is not None and comp < len(ids) \
                    and ids[comp] == self._cluster_comp.id and 0 <= idx < len(self._scene_atom_molecule):
                return int(self._scene_atom_molecule[idx]), self._scene_part(int(idx))
            if self._film_comp is not None and comp < len(ids) \
                    and ids[comp] == self._film_comp.id and 0 <= idx < len(self.film.molecule_of_atom):
                return int(self.film.molecule_of_atom[idx]), "film"
        resno = atom.get("resno")  # residue number = molecule id in both scenes (_style.RESNO_OFFSET)
        if resno is not None and 0 <= int(resno) - _style.RESNO_OFFSET < self.film.n_molecules:
            return int(resno) - _style.RESNO_OFFSET, ""
        return None, ""

    def _scene_part(self, idx: int) -> str:
        c = self.cluster
        n_qm = len(self._scene_atom_molecule) - (c.n_charges if c is not None else 0)
        if c is None or idx >= len(self._scene_atom_molecule):
            return ""
        if idx >= n_qm:
            return f"point charge {float(c.env_charges[idx - n_qm]):+.3f} e"
        return "QM region" if int(self._scene_atom_molecule[idx]) == self.molecule else "QM shell"

    def _describe_pick(self, mol: int, part: str) -> str:
        row = self.film.molecules.iloc[mol]
        return f"molecule {mol} · {row['resname']}" + (f" · {part}" if part else "")

    def _set_pick_label(self, text: str) -> None:
        """Write ``text`` into the view's pick label (the box nglview shows at
        its top left), or hide the label when ``text`` is empty."""
        if text == self.pick_label:
            return
        self.pick_label = text
        if self.view is not None:
            self.view._execute_js_code(
                f"if (this.$pickingInfo) {{ this.$pickingInfo.text({json.dumps(text)});"
                f" this.$pickingInfo.toggle({'true' if text else 'false'}); }}")

    # ------------------------------------------------------------- updates
    def _on_setting(self, change: dict) -> None:
        with self.errors:
            self.refresh()

    def carve(self) -> Any:
        """Carve with the current settings (library call) and return the cluster."""
        s = self.settings()
        return self.film.carve(s.pop("molecule"), s.pop("radius"), **s)

    def refresh(self) -> None:
        """Re-carve, update the readout, legend and 3D view."""
        if self._busy or self.molecule_picker.value is None:
            return
        self._busy = True
        try:
            try:
                self.cluster = self.carve()
                self.error = ""
                self.n_carves += 1
            except Exception as exc:  # noqa: BLE001 - carve errors are shown, not raised
                self.cluster = None
                self.error = f"{type(exc).__name__}: {exc}"
            self._show_readout()
            self._draw()
            if self.cluster is not None:
                for cb in self._callbacks:
                    try:
                        cb(self.cluster)
                    except Exception:  # noqa: BLE001
                        self.errors.append_stderr(traceback.format_exc())
        finally:
            self._busy = False

    def warnings(self) -> list[str]:
        """Plain-language warnings about the current cluster."""
        out: list[str] = []
        if not self.periodic:
            out.append("no periodic images: molecules are taken as they are in the file"
                       + ("" if self.film.has_box else " (the film has no box)") + ".")
        else:
            out.extend(self.film.radius_warnings(self.radius_A, self.frame))
        c = self.cluster
        if c is not None:
            if abs(float(c.net_env_charge)) > 1e-3:
                out.append(f"the point-charge environment is not neutral: net {float(c.net_env_charge):+.3f} e.")
            if int(c.qm_charge) != 0:
                out.append(f"the QM region carries a net charge of {int(c.qm_charge):+d} e.")
            if c.n_charges == 0:
                out.append("no point charges inside this radius: the calculation is a vacuum one.")
        return out

    def _show_readout(self) -> None:
        mol = self.molecule
        row = self.film.molecules.iloc[mol]
        rows = [("central molecule", f"{mol} ({row['resname']}, {row['formula']})"),
                ("frame", f"{self.frame} of {self.film.n_frames}")]
        c = self.cluster
        if c is not None:
            rows += [
                ("QM molecules", str(len(c.qm_molecules))),
                ("QM atoms", str(len(c.qm_symbols))),
                ("environment molecules", str(int(c.n_env_molecules))),
                ("point charges", str(int(c.n_charges))),
                ("net environment charge", f"{float(c.net_env_charge):+.3f} e"),
            ]
        self.readout.value = _style.readout_html(rows, self.warnings(), [self.error] if self.error else [])
        q_max = float(np.max(np.abs(c.env_charges))) if c is not None and c.n_charges else 1.0
        n_shell = len(c.qm_molecules) - 1 if c is not None else 0
        self.legend.value = _style.cluster_legend_html(
            q_max, n_qm_atoms=int(np.sum(np.asarray(c.qm_atom_molecules) == mol)) if c is not None else 0,
            n_shell_molecules=n_shell)
        self._q_max = q_max

    # ---------------------------------------------------------------- view
    def make_view(self) -> Any:
        """Create (if needed) and return the 3D view."""
        if self.view is None:
            self._attach_view(make_view(VIEW_HEIGHT))
            self._draw()
        return self.view

    def _attach_view(self, view: Any) -> None:
        self.view = view
        view.observe(self._on_picked, names="picked")
        view.observe(self._on_view_loaded, names=["loaded", "n_components"])
        self._left.children = (view, *self._left.children)

    def _draw(self) -> None:
        if self.view is None:
            if self.cluster is not None:
                self.scene_pdb, self._scene_atom_molecule = _style.cluster_scene_pdb(self.cluster, self.molecule)
            return
        view = self.view
        if self._film_comp is None or self._film_comp_frame != self.frame:
            if self._cluster_comp is not None:
                view.remove_component(self._cluster_comp)
                self._cluster_comp = None
            if self._film_comp is not None:
                view.remove_component(self._film_comp)
            geo = self.film.frame_geometry(self.frame, periodic=self.periodic and self.film.has_box)
            text = _style.film_scene_pdb(self.film.symbols, geo.positions_A, self.film.molecule_of_atom,
                                         self.film.molecule_resnames, title=f"frame {self.frame}")
            self._film_comp = self._add_text(text, "film")
            self._film_comp.add_representation("line", color=_style.FILM_REST, opacity=0.55)
            self._film_comp_frame = self.frame
        if self._cluster_comp is not None:
            view.remove_component(self._cluster_comp)
            self._cluster_comp = None
        if self.cluster is None:
            self.scene_pdb, self._scene_atom_molecule = "", np.zeros(0, dtype=np.int64)
            return
        self.scene_pdb, self._scene_atom_molecule = _style.cluster_scene_pdb(self.cluster, self.molecule)
        comp = self._add_text(self.scene_pdb, "cluster")
        q = _style.BFACTOR_SCALE * self._q_max
        comp.add_representation("ball+stick", selection=f":{_style.CHAIN_QM}", color=_style.QM_CENTRAL,
                                radius_scale=1.5)
        if len(self.cluster.qm_molecules) > 1:
            comp.add_representation("ball+stick", selection=f":{_style.CHAIN_SHELL}", color=_style.QM_SHELL,
                                    radius_scale=1.3)
        env_q = np.asarray(self.cluster.env_charges, dtype=float)
        # sign by hue, size by depth of colour from a floor colour at zero: a small charge stays coloured
        for chain, scale, domain, present in (
                (_style.CHAIN_ENV_NEG, tuple(reversed(_style.CHARGE_NEG_SCALE)), [-q, 0.0], (env_q < 0).any()),
                (_style.CHAIN_ENV_POS, _style.CHARGE_POS_SCALE, [0.0, q], (env_q >= 0).any())):
            if present:
                comp.add_representation("ball+stick", selection=f":{chain}", color="bfactor",
                                        color_scale=list(scale), color_domain=domain, radius_scale=0.75)
        self._cluster_comp = comp
        if self._fitted != self._fit_key() and view.loaded:
            self._centre_view()

    def _fit_key(self) -> tuple:
        """What the camera was fitted to: a change of any of these re-fits it."""
        return (self.molecule, self.radius_A, self.qm_shell_A, self.rule, self.frame, self.periodic)

    def _centre_view(self, duration_ms: int = 0) -> None:
        """Fit the camera to the whole cluster (autoView): it is a sphere
        around the central molecule, so a larger radius zooms out."""
        if self.view is None or self._cluster_comp is None:
            return
        self._cluster_comp.center(selection="*", duration=duration_ms)
        self._fitted = self._fit_key()

    def _on_view_loaded(self, change: dict) -> None:
        # calls made before the front end loaded are replayed without camera
        # moves: centre once the replayed components are all there
        with self.errors:
            view = self.view
            if view is None or not view.loaded:
                return
            if change["name"] == "loaded":
                view.handle_resize()
            if view.n_components >= len(view._ngl_component_ids) and self._fitted != self._fit_key():
                self._centre_view()

    def _add_text(self, text: str, name: str) -> Any:
        import nglview

        return self.view.add_component(nglview.TextStructure(text, ext="pdb"), default_representation=False,
                                       name=name)
