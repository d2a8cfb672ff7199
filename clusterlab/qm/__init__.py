"""Quantum engine: PySCF calculations on a :class:`~clusterlab.Cluster`."""

from .calc import Calculation, Embedding, WarmStart
from .engine import EmbeddingWarning, charged_states, check_charge_distances, excitation_series, excitations
from .method import DEFAULT_SMEARING_A, Method
from .periodic import periodic_cluster, periodic_excitations
from .response import ResponseStates
from .results import ChargedResult, ExcitationResult, ExcitedState
from .statecharges import StateCharges, state_charges
from .transfer import OrbitalCoupling, TransferIntegrals, effective_coupling, transfer_integrals

__all__ = ["Method", "DEFAULT_SMEARING_A", "excitations", "excitation_series", "charged_states",
           "periodic_excitations", "periodic_cluster", "check_charge_distances", "EmbeddingWarning",
           "ExcitationResult", "ExcitedState", "ChargedResult", "ResponseStates", "Calculation", "Embedding",
           "WarmStart", "StateCharges", "state_charges", "OrbitalCoupling", "TransferIntegrals",
           "effective_coupling", "transfer_integrals"]
