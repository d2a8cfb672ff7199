"""Studies over molecules, frames and radii (radius scans, site sampling, plots)."""
