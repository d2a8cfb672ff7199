"""Studies over molecules, frames and radii: radius scans, site-energy
samples, their statistics and plots, state-charge fits and the film-wide
electrostatic model."""

from .chargefits import ConformerSpread, add_field_response, conformer_spread, fit_state_charges
from .doped import (ConfinementResult, HostGuestOverview, SpeciesEnergies, StateOrderResult, TorsionResult,
                    dest_torsion, host_guest_overview, species_energies, state_order, state_table, torsion_table,
                    triplet_confinement)
from .filmmodel import FilmModel, FilmModelResult, film_site_energies, run_film_model
from .sample import SiteSample, choose_frames, choose_molecules, sample_sites, site_table
from .scan import ScanResult, pick_species_molecule, radius_scan
from .tasks import TASK_FN, cluster_task, run_cluster_task

__all__ = ["radius_scan", "ScanResult", "pick_species_molecule", "sample_sites", "SiteSample", "choose_molecules", "choose_frames",
           "site_table",
           "cluster_task", "run_cluster_task", "TASK_FN", "fit_state_charges", "add_field_response",
           "conformer_spread", "ConformerSpread", "FilmModel", "FilmModelResult", "film_site_energies",
           "run_film_model", "species_energies", "SpeciesEnergies", "triplet_confinement", "ConfinementResult",
           "torsion_table", "dest_torsion", "TorsionResult", "state_table", "state_order", "StateOrderResult",
           "host_guest_overview", "HostGuestOverview"]
