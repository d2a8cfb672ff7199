"""Glue between the panels' traits and their controls (no science here):
bounded number controls, and radii text boxes that mirror a ``radii_A``
trait through the grammar of :mod:`clusterlab.ranges`."""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from typing import Any

import ipywidgets as widgets
import traitlets

from ..errors import InputError
from ..ranges import parse_radii

__all__ = ["Radii", "fit_control", "format_radii", "link_radii", "make_view", "species_dropdown", "row",
           "ALL_SPECIES"]

#: the value of a species chooser that keeps every species
ALL_SPECIES = ""


def make_view(height: str) -> Any:
    """An nglview 3D view on the panels' dark background, ``height`` high (CSS)."""
    import nglview

    from ._style import BACKGROUND

    view = nglview.NGLWidget()
    view.background = BACKGROUND
    view._set_size("100%", height)  # the stage's own size (a Layout height leaves the canvas at 300 px)
    view.layout = widgets.Layout(flex="1 1 auto", min_width="480px")
    # nglview's pick label starts empty (a white speck): hidden until a pick fills it
    view._execute_js_code("if (this.$pickingInfo) { this.$pickingInfo.hide(); }")
    return view


def row(*children: widgets.Widget) -> widgets.HBox:
    """A row of controls that wraps onto a second line where the panel is narrow
    (instead of cutting the last control off)."""
    return widgets.HBox(list(children), layout=widgets.Layout(flex_flow="row wrap", align_items="center"))


def species_dropdown(film: Any, **kwargs: Any) -> widgets.Dropdown:
    """A species chooser for ``film``: "all species", then each species with
    its molecule count (values: :data:`ALL_SPECIES` or the species name)."""
    options = [("all species", ALL_SPECIES)] + [(f"{name} ({n})", str(name)) for name, n in film.species.items()]
    return widgets.Dropdown(options=options, value=ALL_SPECIES, description="species",
                            layout=widgets.Layout(width="220px"), **kwargs)


class Radii(traitlets.List):
    """Trait: cut radii (Å), kept as :func:`clusterlab.ranges.parse_radii`
    returns them (ascending, each once); text in the radius grammar is read too."""

    def __init__(self, default_value: Sequence[float] = (), **kwargs: Any) -> None:
        super().__init__(traitlets.Float(), default_value=list(default_value), **kwargs)

    def validate(self, obj: Any, value: Any) -> list[float]:
        return parse_radii(value if isinstance(value, str) else super().validate(obj, value))


def fit_control(control: Any, value: float, name: str, unit: str, *, grow: bool = False) -> float:
    """``value`` checked against a bounded control's ``min`` and ``max``.

    Below the minimum is an :class:`~clusterlab.errors.InputError`; above the
    maximum the control grows to hold it (``grow=True``) or it is an error.
    (Without the check the control would clamp the value and break the link
    between the control and its trait.)
    """
    value = float(value)
    lo, hi = float(control.min), float(control.max)
    if not value >= lo or (value > hi and not grow):
        top = "" if grow else f" and at most {hi:g}"
        raise InputError(f"{name}={value:g} {unit} is not valid; give at least {lo:g}{top} {unit}.")
    if value > hi:
        control.max = value
    return value


def format_radii(radii_A: Sequence[float]) -> str:
    """Radii as a radii box shows them (``"6, 9, 12"``); :func:`clusterlab.ranges.parse_radii`
    reads the text back."""
    return ", ".join(f"{float(r):g}" for r in radii_A)


def _parses_to(text: str) -> list[float] | None:
    with warnings.catch_warnings():  # repeats are warned about when the run reads the box
        warnings.simplefilter("ignore")
        try:
            return parse_radii(text)
        except InputError:
            return None


def link_radii(text: widgets.Text, owner: traitlets.HasTraits) -> None:
    """Keep ``owner.radii_A`` and a radii text box in step.

    Text that parses sets the trait; assigning the trait rewrites the text.
    Text that does not parse leaves the trait as it was: the run reads the
    box and reports the error.
    """
    def from_text(change: dict) -> None:
        radii = _parses_to(change["new"])
        if radii is not None and radii != list(owner.radii_A):
            owner.radii_A = radii

    def to_text(change: dict) -> None:
        if _parses_to(text.value) != list(change["new"]):
            text.value = format_radii(change["new"])

    owner.radii_A = _parses_to(text.value) or list(owner.radii_A)
    text.observe(from_text, names="value")
    owner.observe(to_text, names="radii_A")
