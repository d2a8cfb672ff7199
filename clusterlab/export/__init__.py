"""Export for transport models: site and pair tables, rates, files.

- :mod:`~clusterlab.export.sites`: the site table (:func:`site_table`), the
  one reader of the film model (:func:`film_model_input`), column docs
  (:func:`column_info`) and sign conventions;
- :mod:`~clusterlab.export.pairs`: the pair table (:func:`pair_table`):
  neighbour pairs, excitonic couplings, joined transfer integrals;
- :mod:`~clusterlab.export.rates`: hopping rates on the tables
  (:func:`hopping_rates`) and a hopping graph from them
  (:func:`graph_from_export`);
- :mod:`~clusterlab.export.files`: the file format (:func:`write_export`,
  :func:`read_export`, :func:`export_metadata`);
- :mod:`~clusterlab.export.study`: everything in one call
  (:func:`export_study`);
- :mod:`~clusterlab.export.transfer_tasks`: transfer integrals of many pairs
  through the runner and the result store (:func:`compute_transfer_integrals`).

Sign conventions follow :mod:`clusterlab.transport.rates`.
"""

from __future__ import annotations

from .files import EXPORT_FORMAT, EXPORT_FORMAT_VERSION, ExportTables, export_metadata, read_export, write_export
from .pairs import pair_classes, pair_table
from .rates import graph_from_export, hopping_rates
from .sites import (
    NO_SOURCE,
    QUANTITIES,
    SIGN_CONVENTIONS,
    FilmModelInput,
    column_info,
    film_model_input,
    site_table,
    unwrapped_centroids,
)
from .study import export_study
from .transfer_tasks import compute_transfer_integrals, transfer_task

__all__ = [
    "export_study",
    "site_table",
    "pair_table",
    "pair_classes",
    "hopping_rates",
    "graph_from_export",
    "write_export",
    "read_export",
    "export_metadata",
    "column_info",
    "film_model_input",
    "FilmModelInput",
    "unwrapped_centroids",
    "ExportTables",
    "EXPORT_FORMAT",
    "EXPORT_FORMAT_VERSION",
    "QUANTITIES",
    "NO_SOURCE",
    "SIGN_CONVENTIONS",
    "compute_transfer_integrals",
    "transfer_task",
]
