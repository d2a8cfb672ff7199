"""The :class:`Cluster`: a QM region and its point-charge environment.

A cluster is plain data (numpy arrays in Å and e) so it can come from
:meth:`clusterlab.Film.carve` or from anywhere else via
:meth:`Cluster.from_arrays`. It knows nothing about quantum chemistry.
"""

from __future__ import annotations

import hashlib
import io
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt

from .errors import InputError

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]


def _as_positions(name: str, value: Any) -> FloatArray:
    arr = np.asarray(value, dtype=np.float64)
    if arr.size == 0:
        return np.zeros((0, 3))
    if arr.ndim != 2 or arr.shape[1] != 3:
        raise InputError(f"{name} must have shape (n, 3) in Å; got shape {arr.shape}.")
    if not np.all(np.isfinite(arr)):
        raise InputError(f"{name} contains NaN or infinite coordinates.")
    return arr


@dataclass(frozen=True, eq=False)
class Cluster:
    """A QM region embedded in point charges.

    Attributes
    ----------
    qm_symbols : list of str, length n
        Element symbols of the QM atoms.
    qm_positions : ndarray, shape (n, 3), Å
    env_positions : ndarray, shape (m, 3), Å
        Positions of the environment point charges.
    env_charges : ndarray, shape (m,), e
    qm_molecules : tuple of int
        Film molecule ids in the QM region (central molecule first).
    qm_atom_molecules : ndarray, shape (n,)
        Molecule id of each QM atom.
    env_molecules : ndarray, shape (m,)
        Molecule id of each point charge (periodic images of one molecule
        share its id; see ``env_images``).
    env_images : ndarray, shape (m, 3), int
        Lattice translation (in box vectors) applied to each point charge's
        molecule, relative to the position in which the molecule was made whole.
    env_symbols : list of str, length m
        Element of each point charge (needed by polarisable models).
    qm_charge : int
        Net charge of the QM region in its ground state (e).
    frame, radius_A, rule, center : provenance of the carve
    box : ndarray (6,) or None
        ``[lx, ly, lz, alpha, beta, gamma]`` (Å, degrees) of the film.
    film_id : str
        Content hash of the film the cluster came from ("" if external).
    film_path : str
    env_polarizable : ndarray of bool, shape (m,)
        Which environment atoms carry a polarizability (whole molecules:
        the inner layer of a two-layer environment); all False by default.
    polarizable_radius_A : float
        Inner (polarizable) radius of the carve, Å (0: no polarizable layer).
    """

    qm_symbols: list[str]
    qm_positions: FloatArray
    env_positions: FloatArray
    env_charges: FloatArray
    qm_molecules: tuple[int, ...] = ()
    qm_atom_molecules: IntArray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    env_molecules: IntArray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    env_images: IntArray = field(default_factory=lambda: np.zeros((0, 3), dtype=np.int64))
    env_symbols: list[str] = field(default_factory=list)
    qm_charge: int = 0
    frame: int = 0
    radius_A: float = 0.0
    rule: str = "external"
    center: int = -1
    box: FloatArray | None = None
    film_id: str = ""
    film_path: str = ""
    env_polarizable: npt.NDArray[np.bool_] = field(default_factory=lambda: np.zeros(0, dtype=bool))
    polarizable_radius_A: float = 0.0

    def __post_init__(self) -> None:
        qm_pos = _as_positions("qm_positions", self.qm_positions)
        env_pos = _as_positions("env_positions", self.env_positions)
        env_q = np.asarray(self.env_charges, dtype=np.float64).reshape(-1)
        if len(self.qm_symbols) != len(qm_pos):
            raise InputError(
                f"qm_symbols has {len(self.qm_symbols)} entries but qm_positions has {len(qm_pos)} rows."
            )
        if len(qm_pos) == 0:
            raise InputError("A cluster needs at least one QM atom.")
        if len(env_q) != len(env_pos):
            raise InputError(
                f"env_charges has {len(env_q)} entries but env_positions has {len(env_pos)} rows."
            )
        m = len(env_pos)
        env_mol = np.asarray(self.env_molecules, dtype=np.int64).reshape(-1)
        if env_mol.size == 0:
            env_mol = np.full(m, -1, dtype=np.int64)
        env_img = np.asarray(self.env_images, dtype=np.int64).reshape(-1, 3)
        if env_img.size == 0:
            env_img = np.zeros((m, 3), dtype=np.int64)
        qm_am = np.asarray(self.qm_atom_molecules, dtype=np.int64).reshape(-1)
        if qm_am.size == 0:
            qm_am = np.full(len(qm_pos), self.qm_molecules[0] if self.qm_molecules else -1, dtype=np.int64)
        env_sym = list(self.env_symbols) if self.env_symbols else []
        if env_sym and len(env_sym) != m:
            raise InputError(f"env_symbols has {len(env_sym)} entries but there are {m} point charges.")
        for name, arr, n in (("env_molecules", env_mol, m), ("env_images", env_img, m),
                             ("qm_atom_molecules", qm_am, len(qm_pos))):
            if len(arr) != n:
                raise InputError(f"{name} has {len(arr)} entries; expected {n}.")
        env_pol = np.asarray(self.env_polarizable, dtype=bool).reshape(-1)
        if env_pol.size == 0:
            env_pol = np.zeros(m, dtype=bool)
        if len(env_pol) != m:
            raise InputError(f"env_polarizable has {len(env_pol)} entries; expected one per point charge ({m}).")
        pol_r = float(self.polarizable_radius_A)
        if not (pol_r >= 0 and np.isfinite(pol_r)):
            raise InputError(f"polarizable_radius_A={self.polarizable_radius_A!r} must be a finite non-negative "
                             "number of Å.")
        set_ = object.__setattr__
        set_(self, "env_polarizable", env_pol)
        set_(self, "polarizable_radius_A", pol_r)
        set_(self, "qm_symbols", [str(s) for s in self.qm_symbols])
        set_(self, "qm_positions", qm_pos)
        set_(self, "env_positions", env_pos)
        set_(self, "env_charges", env_q)
        set_(self, "env_molecules", env_mol)
        set_(self, "env_images", env_img)
        set_(self, "qm_atom_molecules", qm_am)
        set_(self, "env_symbols", env_sym)
        set_(self, "qm_molecules", tuple(int(i) for i in self.qm_molecules))
        if self.box is not None:
            set_(self, "box", np.asarray(self.box, dtype=np.float64).reshape(6))

    # ------------------------------------------------------------------ build
    @classmethod
    def from_arrays(
        cls,
        qm_symbols: list[str],
        qm_positions: npt.ArrayLike,
        env_positions: npt.ArrayLike | None = None,
        env_charges: npt.ArrayLike | None = None,
        *,
        qm_charge: int = 0,
        box: npt.ArrayLike | None = None,
        **provenance: Any,
    ) -> "Cluster":
        """Build a cluster from plain arrays (Å, e), e.g. one made elsewhere.

        Examples
        --------
        >>> c = Cluster.from_arrays(["O", "H", "H"], [[0, 0, 0], [0.96, 0, 0], [-0.24, 0.93, 0]],
        ...                         [[5.0, 0, 0]], [0.5])
        >>> c.n_charges
        1
        """
        env_positions = np.zeros((0, 3)) if env_positions is None else env_positions
        env_charges = np.zeros(0) if env_charges is None else env_charges
        return cls(
            qm_symbols=list(qm_symbols),
            qm_positions=np.asarray(qm_positions, dtype=float),
            env_positions=np.asarray(env_positions, dtype=float),
            env_charges=np.asarray(env_charges, dtype=float),
            qm_charge=int(qm_charge),
            box=None if box is None else np.asarray(box, dtype=float),
            **provenance,
        )

    def vacuum(self) -> "Cluster":
        """The same QM region with no environment."""
        return Cluster(
            qm_symbols=self.qm_symbols, qm_positions=self.qm_positions,
            env_positions=np.zeros((0, 3)), env_charges=np.zeros(0),
            qm_molecules=self.qm_molecules, qm_atom_molecules=self.qm_atom_molecules,
            qm_charge=self.qm_charge, frame=self.frame, radius_A=0.0, rule=self.rule,
            center=self.center, box=self.box, film_id=self.film_id, film_path=self.film_path,
        )

    # ------------------------------------------------------------- summaries
    @property
    def radius(self) -> float:
        """Cut radius in Å (alias of ``radius_A``)."""
        return self.radius_A

    @property
    def n_qm_atoms(self) -> int:
        return len(self.qm_symbols)

    @property
    def n_charges(self) -> int:
        return len(self.env_charges)

    @property
    def n_env_molecules(self) -> int:
        """Number of environment molecule copies (periodic images counted separately)."""
        if self.n_charges == 0:
            return 0
        keys = np.column_stack([self.env_molecules, self.env_images])
        return int(len(np.unique(keys, axis=0)))

    @property
    def n_polarizable(self) -> int:
        """Number of environment atoms that carry a polarizability."""
        return int(np.count_nonzero(self.env_polarizable))

    @property
    def net_env_charge(self) -> float:
        """Sum of the environment point charges (e)."""
        return float(self.env_charges.sum())

    def provenance(self) -> dict[str, Any]:
        """Where this cluster came from, as a JSON-friendly dict."""
        return {
            "film_id": self.film_id,
            "film_path": self.film_path,
            "frame": int(self.frame),
            "molecule": int(self.center),
            "qm_molecules": list(self.qm_molecules),
            "radius_A": float(self.radius_A),
            "rule": self.rule,
            "n_qm_atoms": self.n_qm_atoms,
            "n_charges": self.n_charges,
            "n_env_molecules": self.n_env_molecules,
            "net_env_charge": self.net_env_charge,
            "qm_charge": int(self.qm_charge),
            "polarizable_radius_A": float(self.polarizable_radius_A),
            "n_polarizable": self.n_polarizable,
        }

    def fingerprint(self) -> str:
        """Stable SHA-256 of the geometry, charges and QM charge (rounded to
        1e-6 Å / 1e-8 e), usable as a cache key."""
        h = hashlib.sha256()
        h.update(",".join(self.qm_symbols).encode())
        h.update(np.round(self.qm_positions, 6).astype("<f8").tobytes())
        h.update(np.round(self.env_positions, 6).astype("<f8").tobytes())
        h.update(np.round(self.env_charges, 8).astype("<f8").tobytes())
        h.update(str(int(self.qm_charge)).encode())
        if self.env_polarizable.any():  # (clusters without a polarizable layer keep their old fingerprint)
            h.update(np.packbits(self.env_polarizable).tobytes())
        return h.hexdigest()

    def fingerprint_qm(self) -> str:
        """Stable SHA-256 of the QM region alone (symbols, positions, charge)."""
        h = hashlib.sha256()
        h.update(",".join(self.qm_symbols).encode())
        h.update(np.round(self.qm_positions, 6).astype("<f8").tobytes())
        h.update(str(int(self.qm_charge)).encode())
        return h.hexdigest()

    def __repr__(self) -> str:
        return (
            f"<Cluster molecule={self.center} frame={self.frame} radius={self.radius_A:g} Å "
            f"rule={self.rule!r}: {self.n_qm_atoms} QM atoms in {len(self.qm_molecules) or 1} molecule(s), "
            f"{self.n_charges} point charges from {self.n_env_molecules} molecules, "
            f"net environment charge {self.net_env_charge:+.4f} e>"
        )

    # ---------------------------------------------------------------- writers
    def to_xyz(self, path: str | None = None) -> str:
        """Extended XYZ text: QM atoms by element, then point charges as
        ``X`` pseudo-atoms with the charge in a fifth column. Written to
        ``path`` when given; the text is always returned."""
        lines = [str(self.n_qm_atoms + self.n_charges),
                 f"clusterlab cluster: {self!r}; columns: symbol x y z charge(e) [Å]"]
        for s, (x, y, z) in zip(self.qm_symbols, self.qm_positions):
            lines.append(f"{s:<2s} {x:14.6f} {y:14.6f} {z:14.6f} {0.0:10.5f}")
        for q, (x, y, z) in zip(self.env_charges, self.env_positions):
            lines.append(f"X  {x:14.6f} {y:14.6f} {z:14.6f} {q:10.5f}")
        text = "\n".join(lines) + "\n"
        if path is not None:
            with open(path, "w", encoding="utf-8") as fh:
                fh.write(text)
        return text

    def to_pdb(self, path: str | None = None) -> str:
        """PDB text: QM atoms as residue ``QMR`` (chain A, HETATM), point
        charges as residue ``ENV`` (chain B) with the charge in the
        B-factor column, so any viewer can colour the environment by charge."""
        out = io.StringIO()
        out.write(f"REMARK   1 {self!r}\n")
        out.write("REMARK   2 B-factor column of chain B holds point charges (e)\n")
        serial = 1
        for s, (x, y, z), mol in zip(self.qm_symbols, self.qm_positions, self.qm_atom_molecules):
            name = s[:2].upper()
            out.write(
                f"HETATM{serial % 100000:5d} {name:<4s} QMR A{int(mol) % 10000:4d}    "
                f"{x:8.3f}{y:8.3f}{z:8.3f}{1.0:6.2f}{0.0:6.2f}          {s:>2s}\n"
            )
            serial += 1
        syms = self.env_symbols or ["X"] * self.n_charges
        for s, (x, y, z), q, mol in zip(syms, self.env_positions, self.env_charges, self.env_molecules):
            out.write(
                f"HETATM{serial % 100000:5d} {s[:2].upper():<4s} ENV B{int(mol) % 10000:4d}    "
                f"{x:8.3f}{y:8.3f}{z:8.3f}{1.0:6.2f}{q:6.2f}          {s:>2s}\n"
            )
            serial += 1
        out.write("END\n")
        text = out.getvalue()
        if path is not None:
            with open(path, "w", encoding="utf-8") as fh:
                fh.write(text)
        return text
