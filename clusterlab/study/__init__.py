"""Studies over molecules, frames and radii: radius scans, site-energy
samples, their statistics and plots."""

from .sample import SiteSample, choose_frames, choose_molecules, sample_sites, site_table
from .scan import ScanResult, radius_scan
from .tasks import TASK_FN, cluster_task, run_cluster_task

__all__ = ["radius_scan", "ScanResult", "sample_sites", "SiteSample", "choose_molecules", "choose_frames",
           "site_table",
           "cluster_task", "run_cluster_task", "TASK_FN"]
