"""Common container for excited states from any response model.

Both the full TDA/TDDFT path (PySCF ``tdscf``) and the simplified TDA
(:mod:`clusterlab.qm.stda`) return :class:`ResponseStates`, so state
following, results and studies do not care which model made them.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import numpy.typing as npt

FloatArray = npt.NDArray[np.float64]


@dataclass
class ResponseStates:
    """Excited states of one spin kind from one response calculation.

    Attributes
    ----------
    kind : {"singlet", "triplet"}
    model : str
        "tda", "tddft" or "stda".
    energies_Eh : ndarray, shape (n,)
        Excitation energies (Hartree), ascending.
    amplitudes : ndarray, shape (n, nocc, nvir)
        Excitation amplitudes X (for full TDDFT: X + Y) over the occupied x
        virtual orbital pairs of the SCF (``mo_occ > 0`` first, in orbital
        order), normalised so that ``sum(X**2) == 1`` for every state.
        States of the sTDA live in a truncated space: amplitudes outside it
        are zero.
    transition_dipoles_au : ndarray, shape (n, 3)
        <0|mu|n> in e·bohr (zeros for triplets).
    osc_strength : ndarray, shape (n,)
        Oscillator strength f = 2/3 E |mu|^2 (zero for triplets).
    converged : ndarray of bool, shape (n,)
    extra : dict
        Model-specific diagnostics (e.g. sTDA configuration-space sizes).
    """

    kind: str
    model: str
    energies_Eh: FloatArray
    amplitudes: FloatArray
    transition_dipoles_au: FloatArray
    osc_strength: FloatArray
    converged: npt.NDArray[np.bool_]
    extra: dict = field(default_factory=dict)

    @property
    def n_states(self) -> int:
        return int(len(self.energies_Eh))
