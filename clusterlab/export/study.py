"""The whole transport export in one call: :func:`export_study`.

The only orchestration of :mod:`clusterlab.export`: it builds the site table
(:mod:`~clusterlab.export.sites`), the pair tables of every exported frame
(:mod:`~clusterlab.export.pairs`), optional rate sets
(:mod:`~clusterlab.export.rates`) and writes the files with their sidecar
(:mod:`~clusterlab.export.files`).
"""

from __future__ import annotations

import inspect
import numbers
import os
from typing import TYPE_CHECKING, Any, Iterable, Literal, Mapping, Sequence

import pandas as pd

from ..errors import InputError
from .files import export_metadata, write_export
from .pairs import pair_table
from .rates import hopping_rates
from .sites import film_model_input, site_table

if TYPE_CHECKING:  # pragma: no cover
    from ..film import Film

__all__ = ["export_study"]


def export_study(
    film: "Film",
    folder: str | os.PathLike[str],
    *,
    sample: Any = None,
    model: Any = None,
    cutoff_A: float,
    frames: Iterable[int] | None = None,
    criterion: Literal["centroid", "atom"] = "centroid",
    transition_charges: Any = None,
    refractive_index: float = 1.0,
    transfer: pd.DataFrame | None = None,
    rates: Mapping[str, Any] | Sequence[Mapping[str, Any]] | None = None,
    method: Any = None,
    verdict: Any = None,
    vacuum_eV: Any = None,
    metadata: Mapping[str, Any] | None = None,
) -> dict[str, str]:
    """Site table, pair tables of every exported frame, optional rates, files: one call.

    Parameters
    ----------
    film : Film
    folder : path
    sample : SiteSample or DataFrame, optional
        QM results (see :func:`~clusterlab.export.sites.site_table`'s ``qm``).
    model : film model result or DataFrame, optional
        Electrostatic-model results (see
        :func:`~clusterlab.export.sites.film_model_input`).
    cutoff_A : float, Å
        Pair cutoff.
    frames : iterable of int, optional
        Default: the frames of the site table.
    criterion, transition_charges, refractive_index, transfer
        See :func:`~clusterlab.export.pairs.pair_table`. When the model
        carries its state-charge set (as ``run_film_model`` does), its transition
        charges are used when ``transition_charges`` is not given, and its
        reference fits' vacuum energies when ``vacuum_eV`` is not given.
    rates : mapping or sequence of mappings, optional
        Keyword arguments of :func:`~clusterlab.export.rates.hopping_rates`
        (one rate set each; give each a ``label`` when there are several).
    method : Method, optional
        The QM method, for the sidecar; default the sample's (``SiteSample.method``).
    verdict, vacuum_eV
        See :func:`~clusterlab.export.sites.site_table`.
    metadata : mapping, optional
        Free entries written under ``"user"`` in the sidecar.

    Returns
    -------
    dict of str to str
        Paths of the written files (see :func:`~clusterlab.export.files.write_export`).

    Examples
    --------
    >>> paths = export_study(film, "export", sample=sample, cutoff_A=8.0)  # doctest: +SKIP
    >>> sorted(paths)  # doctest: +SKIP
    ['pairs_csv', 'pairs_parquet', 'sidecar', 'sites_csv', 'sites_parquet']
    """
    if method is None and getattr(sample, "method", None) is not None:
        method = sample.method  # the sample's one method, so the sidecar names it
    if isinstance(cutoff_A, bool) or not isinstance(cutoff_A, numbers.Real):
        raise InputError(f"cutoff_A={cutoff_A!r} must be a number of Å (e.g. 8.0).")
    model_charges = film_model_input(model).charges if model is not None else None
    if model_charges is not None and hasattr(model_charges, "transition_e"):
        # a model that carries its state-charge set (run_film_model): use its
        # transition charges and reference-fit vacuum energies unless given
        if transition_charges is None and any(v is not None for v in model_charges.transition_e.values()):
            transition_charges = model_charges
        if vacuum_eV is None and getattr(model_charges, "fits", None):
            vacuum_eV = model_charges
    sites = site_table(film, qm=sample, model=model, frames=frames, verdict=verdict, vacuum_eV=vacuum_eV)
    frame_list = sorted({int(f) for f in sites["frame"]})
    tabs = [pair_table(film, f, cutoff_A, criterion=criterion, transition_charges=transition_charges,
                       refractive_index=refractive_index, transfer=transfer) for f in frame_list]
    pairs = pd.concat(tabs, ignore_index=True) if tabs else pd.DataFrame()
    if rates:
        allowed = [n for n in inspect.signature(hopping_rates).parameters if n not in ("sites", "pairs")]
        for kw in ([rates] if isinstance(rates, Mapping) else list(rates)):
            if not isinstance(kw, Mapping):
                raise InputError(f"rates entry {kw!r} must be a mapping of hopping_rates keywords.")
            unknown = sorted(set(kw) - set(allowed))
            if unknown:
                raise InputError(f"rates entry {dict(kw)!r}: {unknown[0]!r} is not a keyword of hopping_rates; "
                                 f"valid keywords are {', '.join(allowed)}.")
            attrs = dict(pairs.attrs)
            pairs = hopping_rates(sites, pairs, **dict(kw))
            pairs.attrs = {**attrs, **pairs.attrs}
    meta = export_metadata(film, sites=sites, pairs=pairs, method=method, frames=frame_list, cutoff_A=cutoff_A,
                           criterion=criterion, refractive_index=refractive_index, extra=metadata)
    return write_export(folder, sites, pairs, metadata=meta)
