"""Error hierarchy of clusterlab.

Every error clusterlab raises on purpose derives from :class:`ClusterlabError`.
Input problems are also :class:`ValueError` (so generic handlers still work);
failed calculations are also :class:`RuntimeError`.
"""

from __future__ import annotations


class ClusterlabError(Exception):
    """Base class of every error raised on purpose by clusterlab."""


class InputError(ClusterlabError, ValueError):
    """Raised when a user-supplied value, file or setting is invalid.

    The message names the offending value (and file, when there is one) and
    what would be valid.
    """


class FilmError(InputError):
    """Raised when a film (topology/trajectory) cannot be used as given:
    atom-count mismatch, missing box, unknown elements, non-integer molecular
    charges."""


class ChargeError(FilmError):
    """Raised when atomic partial charges are missing or inconsistent."""


class CarvingError(InputError):
    """Raised when a cluster cannot be carved as asked (bad molecule id,
    radius, or a periodic carve of a film without a box)."""


class StudyFileError(InputError):
    """Raised when a study file (TOML) has a missing, unknown or invalid key."""


class ProvenanceError(InputError):
    """Raised when results of different films or methods would be mixed: a
    run into a store that holds another film's results, or a report or export
    of a store with several films or methods and no choice among them (the
    message lists the choices)."""


class CalculationError(ClusterlabError, RuntimeError):
    """Raised when a quantum-chemistry calculation fails."""


class ConvergenceError(CalculationError):
    """Raised when an SCF or response calculation does not converge and the
    caller asked for failures to raise instead of being flagged."""


class GeometryError(CalculationError):
    """Raised when an environment point charge sits closer to a QM atom than
    the safety threshold (overlapping molecules, a carving bug)."""


class MoleculeBoundaryWarning(UserWarning):
    """Warned when a film's bonds and residues disagree about where molecules
    end: a residue made of several bonded fragments, or one bonded fragment
    spread over several residues. Molecules are the fragments then; the
    warning names the residues, so that a missing bond or a residue numbering
    slip does not pass unseen."""


class QMRegionSizeWarning(UserWarning):
    """Warned before a calculation whose QM region is much larger than its
    central molecule (a QM shell that pulls in many neighbours): the message
    gives the atom and basis-function counts and a rough cost factor."""
