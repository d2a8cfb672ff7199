"""Colours, scene text and legends shared by the notebook widgets.

Presentation only: nothing here computes a physical quantity. The 3D
scenes are written as PDB text (a copy of the coordinates, never the
analysis Universe) with a per-atom number in the B-factor column that the
viewer colours through a colour scale.

Palette ("harbour at dusk", this project's own):

* background: slate ``#1F2630``
* QM region: lime ``#B5E61D`` (central molecule), sage ``#6FB36B``
  (QM-shell neighbours)
* point charges: sign by hue, size by depth of colour, with a floor so
  that a small charge stays coloured: negative from lagoon ``#2E9AA5``
  (smallest) to glacier ``#44E5F2`` (largest), positive from rust
  ``#C4623F`` to flame ``#FF7A45``
* rest of the film: pewter ``#8D99A6`` lines (grey: no colour of a charge)
* site energies: periwinkle ``#6E7FF2`` - orchid ``#B070D0`` - coral
  ``#E2705A`` - straw ``#F6D66B`` (sequential, low to high)

Every colour drawn on the dark background has a contrast ratio of at
least 3:1 against it (:func:`contrast_ratio`, the relative-luminance
formula of WCAG 2.1).
"""

from __future__ import annotations

import html
import io
from collections.abc import Sequence

import numpy as np
import numpy.typing as npt

BACKGROUND = "#1F2630"
PANEL_BG = "#F6F4EF"
INK = "#1F2630"
QM_CENTRAL = "#B5E61D"
QM_SHELL = "#6FB36B"
FILM_REST = "#8D99A6"
#: negative point charges, smallest |q| first (the floor) to the largest
CHARGE_NEG_SCALE: tuple[str, ...] = ("#2E9AA5", "#44E5F2")
#: positive point charges (and zero), smallest first
CHARGE_POS_SCALE: tuple[str, ...] = ("#C4623F", "#FF7A45")
ENERGY_SCALE: tuple[str, ...] = ("#6E7FF2", "#B070D0", "#E2705A", "#F6D66B")
WARN = "#B4441C"
OK = "#2E7D5B"

#: B-factor values are the shown number times this (PDB keeps 2 decimals)
BFACTOR_SCALE = 100.0

#: chain letters of the scene PDB
CHAIN_FILM, CHAIN_QM, CHAIN_SHELL, CHAIN_SITE = "F", "Q", "S", "M"
#: chains of the negative and of the positive (or zero) point charges
CHAIN_ENV_NEG, CHAIN_ENV_POS = "N", "P"

#: the film's residue numbers are the molecule ids (0-based), so that the
#: viewer's own atom names ("[RES]12:...") carry the id the panels show
RESNO_OFFSET = 0


def _atom_line(serial: int, element: str, resname: str, chain: str, resseq: int,
               xyz: Sequence[float], bfactor: float) -> str:
    name = element[:2].upper()
    b = float(np.clip(bfactor, -999.99, 9999.99))
    return (f"HETATM{serial % 100000:5d} {name:<4s} {resname[:3]:>3s} {chain}{resseq % 10000:4d}    "
            f"{xyz[0]:8.3f}{xyz[1]:8.3f}{xyz[2]:8.3f}{1.0:6.2f}{b:6.2f}          {element[:2]:>2s}\n")


def film_scene_pdb(symbols: Sequence[str], positions_A: npt.ArrayLike, molecule_of_atom: npt.ArrayLike,
                   resnames: Sequence[str], *, bfactors: npt.ArrayLike | None = None,
                   chain: str | Sequence[str] = CHAIN_FILM, title: str = "film") -> str:
    """PDB text of a whole frame, atoms in film order (atom ``i`` of the
    text is atom ``i`` of the film), residue number = molecule id
    (:data:`RESNO_OFFSET`).

    Parameters
    ----------
    symbols : sequence of str, length n
    positions_A : array_like, shape (n, 3), Å
    molecule_of_atom : array_like, shape (n,), int
    resnames : sequence of str, one per molecule
    bfactors : array_like, shape (n,), optional
        Number written in the B-factor column (already scaled).
    chain : str or sequence of str (one per atom)
    """
    pos = np.asarray(positions_A, dtype=float)
    mol = np.asarray(molecule_of_atom, dtype=np.int64)
    b = np.zeros(len(pos)) if bfactors is None else np.asarray(bfactors, dtype=float)
    chains = [chain] * len(pos) if isinstance(chain, str) else list(chain)
    out = io.StringIO()
    out.write(f"REMARK   1 clusterlab scene: {title}\n")
    for i in range(len(pos)):
        out.write(_atom_line(i + 1, symbols[i], str(resnames[mol[i]]), chains[i], int(mol[i]) + RESNO_OFFSET, pos[i],
                             b[i]))
    out.write("END\n")
    return out.getvalue()


def cluster_scene_pdb(cluster: object, central: int) -> tuple[str, np.ndarray]:
    """PDB text of a carved cluster for the viewer and the molecule id of
    each atom of the text.

    QM atoms of the central molecule are chain ``Q``, other QM molecules
    chain ``S``, point charges chain ``N`` (negative) or ``P`` (positive or
    zero) with ``charge × 100`` in the B-factor column; residue number =
    molecule id. Atom order: QM atoms, then the charges, as in the cluster.

    Returns
    -------
    text : str
    atom_molecule : ndarray, shape (n_qm + n_charges,), int
    """
    qm_pos = np.asarray(cluster.qm_positions)  # type: ignore[attr-defined]
    qm_mol = np.asarray(cluster.qm_atom_molecules)  # type: ignore[attr-defined]
    qm_sym = list(cluster.qm_symbols)  # type: ignore[attr-defined]
    env_pos = np.asarray(cluster.env_positions)  # type: ignore[attr-defined]
    env_q = np.asarray(cluster.env_charges)  # type: ignore[attr-defined]
    env_mol = np.asarray(cluster.env_molecules)  # type: ignore[attr-defined]
    env_sym = list(cluster.env_symbols) or ["X"] * len(env_pos)  # type: ignore[attr-defined]
    out = io.StringIO()
    out.write("REMARK   1 clusterlab scene: cluster (B-factor of chains N, P = 100 x charge / e)\n")
    serial = 1
    for s, p, m in zip(qm_sym, qm_pos, qm_mol):
        chain = CHAIN_QM if int(m) == int(central) else CHAIN_SHELL
        out.write(_atom_line(serial, s, "QMR", chain, int(m) + RESNO_OFFSET, p, 0.0))
        serial += 1
    for s, p, q, m in zip(env_sym, env_pos, env_q, env_mol):
        chain = CHAIN_ENV_NEG if float(q) < 0 else CHAIN_ENV_POS
        out.write(_atom_line(serial, s, "ENV", chain, int(m) + RESNO_OFFSET, p, BFACTOR_SCALE * float(q)))
        serial += 1
    out.write("END\n")
    return out.getvalue(), np.r_[qm_mol, env_mol].astype(np.int64)


#: the light boxes beside a view (legend, readout, colour bar): long words
#: such as file paths wrap inside the box instead of running out of it
_BOX_STYLE = (f"font-size:12px;color:{INK};background:{PANEL_BG};padding:6px 8px;border-radius:6px;"
              "border:1px solid #d8d2c4;min-width:220px;max-width:100%;box-sizing:border-box;line-height:1.45;"
              "overflow-wrap:anywhere;word-break:break-word")

#: the panels' style sheet (a ``<style>`` element in an HTML widget of each panel): tab titles, buttons
#: and the status line take the width their text needs instead of being cut with "…"
PANEL_CSS = """<style>
.clusterlab-panel .lm-TabBar-tab, .clusterlab-panel .p-TabBar-tab {
  flex: 0 0 auto !important; max-width: none !important; min-width: fit-content !important; }
.clusterlab-panel .lm-TabBar-tabLabel, .clusterlab-panel .p-TabBar-tabLabel { overflow: visible !important; }
.clusterlab-panel .widget-toggle-button, .clusterlab-panel .jupyter-button { min-width: fit-content; }
.clusterlab-panel .widget-toggle-buttons { display: flex; flex-flow: row wrap; align-items: center; }
.clusterlab-panel .clusterlab-status { overflow-wrap: anywhere; word-break: break-word; line-height: 1.4; }
.clusterlab-panel .clusterlab-table { line-height: 1.4; }
.clusterlab-panel .clusterlab-table th { white-space: nowrap; }
.clusterlab-panel .clusterlab-stats td:first-child { text-align: left; white-space: nowrap; color: #555; }
.clusterlab-panel .clusterlab-stats td:last-child { text-align: left; }
</style>"""

#: description width of the panels' labelled controls (wide enough for "QM shell (Å)")
LABEL_STYLE = {"description_width": "92px"}


def relative_luminance(colour: str) -> float:
    """Relative luminance of an sRGB colour ``"#RRGGBB"`` (WCAG 2.1 definition:
    linearised channels weighted 0.2126, 0.7152, 0.0722)."""
    h = colour.lstrip("#")
    if len(h) != 6:
        raise ValueError(f"colour {colour!r} is not #RRGGBB")
    c = np.array([int(h[i:i + 2], 16) for i in (0, 2, 4)], dtype=float) / 255.0
    lin = np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)
    return float(lin @ np.array([0.2126, 0.7152, 0.0722]))


def contrast_ratio(a: str, b: str) -> float:
    """WCAG 2.1 contrast ratio ``(L1 + 0.05) / (L2 + 0.05)`` of two colours (1 to 21)."""
    la, lb = sorted((relative_luminance(a), relative_luminance(b)), reverse=True)
    return (la + 0.05) / (lb + 0.05)


def show_png(image: object, png: bytes | None) -> None:
    """Put ``png`` into an Image widget, or hide the widget while there is no
    picture (an empty Image shows the browser's broken-image icon)."""
    image.value = png or b""  # type: ignore[attr-defined]
    image.layout.display = "" if png else "none"  # type: ignore[attr-defined]


def _gradient(colours: Sequence[str]) -> str:
    return f"linear-gradient(to right, {', '.join(colours)})"


def _swatch(colour: str, *, shape: str = "round") -> str:
    radius = "50%" if shape == "round" else "2px"
    return (f'<span style="display:inline-block;width:12px;height:12px;border-radius:{radius};'
            f'background:{colour};border:1px solid #555;vertical-align:middle;margin-right:4px"></span>')


def charge_bar_html(q_max_e: float) -> str:
    """The point-charge colour bar: negative half (largest |q| at the left
    end) and positive half, each starting from its floor colour at zero."""
    q = float(q_max_e) if np.isfinite(q_max_e) and q_max_e > 0 else 1.0
    neg = _gradient(tuple(reversed(CHARGE_NEG_SCALE)))
    pos = _gradient(CHARGE_POS_SCALE)
    return (f'<div style="display:flex;height:10px;margin:2px 0;border:1px solid #888">'
            f'<div style="flex:1;background:{neg}"></div><div style="flex:1;background:{pos}"></div></div>'
            f'<div style="display:flex;justify-content:space-between"><span>&minus;{q:.2f}</span>'
            f'<span>0</span><span>+{q:.2f}</span></div>')


def cluster_legend_html(q_max_e: float, *, n_qm_atoms: int = 0, n_shell_molecules: int = 0) -> str:
    """Legend of the cluster scene: QM region, charge colour bar, rest of film."""
    shell = (f'<div>{_swatch(QM_SHELL)}QM-shell neighbours ({n_shell_molecules})</div>'
             if n_shell_molecules else "")
    return (
        f'<div class="clusterlab-legend" style="{_BOX_STYLE}">'
        f'<div style="font-weight:600;margin-bottom:3px">Legend</div>'
        f'<div>{_swatch(QM_CENTRAL)}QM region: central molecule ({n_qm_atoms} QM atoms)</div>'
        f'{shell}'
        f'<div style="margin-top:4px">Point charges (e): hue = sign, depth of colour = size '
        f'(the smallest keep a floor colour)</div>'
        f'{charge_bar_html(q_max_e)}'
        f'<div style="margin-top:4px">{_swatch(FILM_REST, shape="square")}rest of the film (grey lines)</div>'
        f"</div>"
    )


def colourbar_html(lo: float, hi: float, label: str) -> str:
    """Horizontal colour bar of the site-energy scene."""
    return (
        f'<div class="clusterlab-colourbar" style="{_BOX_STYLE}">'
        f'<div style="font-weight:600">{html.escape(label)}</div>'
        f'<div style="height:12px;margin:3px 0;border:1px solid #888;background:{_gradient(ENERGY_SCALE)}"></div>'
        f'<div style="display:flex;justify-content:space-between"><span>{lo:.3f}</span>'
        f'<span>{0.5 * (lo + hi):.3f}</span><span>{hi:.3f}</span></div>'
        f'<div style="margin-top:3px">{_swatch(FILM_REST, shape="square")}molecules not sampled</div>'
        f"</div>"
    )


def readout_html(rows: Sequence[tuple[str, str]], warnings: Sequence[str] = (), errors: Sequence[str] = ()) -> str:
    """Key/value readout with warnings (amber) and errors (red) below."""
    body = "".join(
        f'<tr><td style="padding:1px 8px 1px 0;color:#555">{html.escape(k)}</td>'
        f'<td style="padding:1px 0;font-weight:600" class="clusterlab-{_slug(k)}">{html.escape(v)}</td></tr>'
        for k, v in rows
    )
    warn = "".join(f'<div class="clusterlab-warning" style="color:{WARN};margin-top:3px">&#9888; '
                   f"{html.escape(w)}</div>" for w in warnings)
    err = "".join(f'<div class="clusterlab-error" style="color:#a00;margin-top:3px;font-weight:600">'
                  f"&#10006; {html.escape(e)}</div>" for e in errors)
    return (f'<div class="clusterlab-readout" style="{_BOX_STYLE};font-size:13px">'
            f'<table style="width:100%">{body}</table>{warn}{err}</div>')


def _slug(text: str) -> str:
    return "".join(c if c.isalnum() else "-" for c in text.lower()).strip("-")


def figure_png(fig: object, dpi: int = 96) -> bytes:
    """PNG bytes of a matplotlib Figure (object API; no pyplot state), cut to
    what is drawn (a legend below the axes included)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, bbox_inches="tight")  # type: ignore[attr-defined]
    return buf.getvalue()
