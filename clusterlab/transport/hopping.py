"""Reference hopping simulation: kinetic Monte Carlo and master equation.

A :class:`HoppingGraph` holds sites and directed hops ``i -> j`` with a rate
(s^-1) and a minimum-image hop vector (Å). Summing hop vectors gives
displacements unwrapped across periodic boundaries, so a periodic film graph
can be used as it is exported.

Two independent solvers run on the same graph:

- :func:`run_kmc`: rejection-free kinetic Monte Carlo (Gillespie, J. Comput.
  Phys. 22, 403 (1976); Bortz, Kalos & Lebowitz, J. Comput. Phys. 17, 10
  (1975)) for many independent walkers at once. Gives a diffusion coefficient
  ``D = <|dr - <dr>|^2> / (2 d dt)`` and, with rates built in a field, a drift
  mobility ``mu = q v . F / |F|^2``.
- :func:`master_equation_mobility`: the single-carrier (low-density) steady
  state of the master equation ``dp/dt = W p`` solved with a sparse direct
  solver, giving the drift mobility in a field without noise.

Mobility is taken from the drift velocity in a small applied field (field
included in the hop energies, see :func:`build_hopping_graph`). The Einstein
relation ``mu = e D / kT`` (:meth:`KMCResult.einstein_mobility`) is offered
as well; it holds only at zero field in the nondispersive (equilibrated)
regime.

Model limits: one carrier at a time (no site exclusion, no carrier-carrier
Coulomb interaction), so results are the low-density limit.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

import numpy as np
import numpy.typing as npt
import scipy.sparse as sp
import scipy.sparse.csgraph as csgraph
import scipy.sparse.linalg as spla

from ..errors import ConvergenceError, InputError
from ..units import KB_EV
from .rates import carrier_charge, field_energy_change, marcus_rate, miller_abrahams_rate

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]

__all__ = [
    "HoppingGraph",
    "KMCResult",
    "build_hopping_graph",
    "cubic_lattice_pairs",
    "run_kmc",
    "steady_state_occupation",
    "master_equation_mobility",
    "A2_PER_VS_TO_CM2_PER_VS",
]

#: 1 Å^2/(V s) in cm^2/(V s)
A2_PER_VS_TO_CM2_PER_VS: float = 1e-16


@dataclass(frozen=True, eq=False)
class HoppingGraph:
    """Sites and directed hops, stored row-compressed by source site.

    Build with :meth:`from_edges` or :func:`build_hopping_graph`.

    Attributes
    ----------
    n_sites : int
    src, dst : ndarray of int64, shape (m,)
        Directed hops ``src -> dst``, sorted by ``src``.
    rate_per_s : ndarray of float, shape (m,), s^-1
    dr_A : ndarray of float, shape (m, 3), Å
        Minimum-image hop vectors ``r_dst - r_src``.
    indptr : ndarray of int64, shape (n_sites + 1,)
        Hops leaving site ``s`` are ``indptr[s]:indptr[s+1]``.
    total_rate_per_s : ndarray of float, shape (n_sites,), s^-1
        Escape rate of each site.
    keys : ndarray of float, shape (m,)
        ``src + (cumulative rate within the row) / total_rate``: one sorted
        table so that all walkers choose their next hop with a single
        ``searchsorted``.
    """

    n_sites: int
    src: IntArray
    dst: IntArray
    rate_per_s: FloatArray
    dr_A: FloatArray
    indptr: IntArray = field(repr=False)
    total_rate_per_s: FloatArray = field(repr=False)
    keys: FloatArray = field(repr=False)

    @classmethod
    def from_edges(
        cls,
        n_sites: int,
        src: npt.ArrayLike,
        dst: npt.ArrayLike,
        rate_per_s: npt.ArrayLike,
        dr_A: npt.ArrayLike,
    ) -> "HoppingGraph":
        """Build a graph from directed hops.

        Parameters
        ----------
        n_sites : int
        src, dst : array_like of int, shape (m,)
            Site indices in ``[0, n_sites)``; ``src != dst``.
        rate_per_s : array_like of float, shape (m,), s^-1, >= 0
        dr_A : array_like of float, shape (m, 3), Å

        Raises
        ------
        InputError
            On bad shapes, indices out of range, self-hops or negative rates.
        """
        n = int(n_sites)
        if n < 1:
            raise InputError(f"n_sites must be >= 1; got {n_sites!r}.")
        s = np.asarray(src, dtype=np.int64).ravel()
        d = np.asarray(dst, dtype=np.int64).ravel()
        k = np.asarray(rate_per_s, dtype=np.float64).ravel()
        v = np.asarray(dr_A, dtype=np.float64)
        m = s.size
        if d.size != m or k.size != m or v.shape != (m, 3):
            raise InputError(
                "src, dst, rate_per_s must have the same length m and dr_A shape (m, 3); "
                f"got {s.size}, {d.size}, {k.size} and {v.shape}."
            )
        if m and (s.min() < 0 or d.min() < 0 or s.max() >= n or d.max() >= n):
            raise InputError(f"site indices must lie in [0, {n}); got src/dst outside.")
        if np.any(s == d):
            raise InputError("self-hops (src == dst) are not allowed.")
        if not np.all(np.isfinite(k)) or np.any(k < 0):
            raise InputError("rate_per_s must be finite and >= 0 s^-1.")
        if not np.all(np.isfinite(v)):
            raise InputError("dr_A must be finite.")
        order = np.argsort(s, kind="stable")
        s, d, k, v = s[order], d[order], k[order], v[order]
        counts = np.bincount(s, minlength=n)
        indptr = np.zeros(n + 1, dtype=np.int64)
        np.cumsum(counts, out=indptr[1:])
        total = np.bincount(s, weights=k, minlength=n).astype(np.float64)
        # cumulative rate within each row, normalised to (0, 1]
        csum = np.cumsum(k)
        row_start = np.concatenate(([0.0], csum))[indptr[:-1]]
        local = csum - row_start[s]
        with np.errstate(invalid="ignore", divide="ignore"):
            frac = np.where(total[s] > 0, local / total[s], 1.0)
        frac = np.minimum(frac, 1.0)
        last = indptr[1:][counts > 0] - 1
        frac[last] = 1.0  # exact row end: no round-off gap
        keys = s.astype(np.float64) + frac
        return cls(n, s, d, k, v, indptr, total, keys)

    @property
    def n_hops(self) -> int:
        """Number of directed hops."""
        return int(self.src.size)

    def rate_matrix(self) -> sp.csr_matrix:
        """Master-equation generator ``W`` (s^-1), shape (n, n): ``dp/dt = W p``.

        ``W[j, i] = k_(i->j)`` for ``i != j`` and ``W[i, i] = -sum_j k_(i->j)``.
        """
        n = self.n_sites
        off = sp.coo_matrix((self.rate_per_s, (self.dst, self.src)), shape=(n, n))
        return (off - sp.diags(self.total_rate_per_s)).tocsr()


def cubic_lattice_pairs(
    n_per_side: int, spacing_A: float
) -> tuple[FloatArray, IntArray, IntArray, FloatArray, FloatArray]:
    """Nearest-neighbour pairs of a periodic simple cubic lattice.

    Parameters
    ----------
    n_per_side : int, >= 3
    spacing_A : float, Å

    Returns
    -------
    positions_A : ndarray, shape (n^3, 3), Å
    i, j : ndarray of int64, shape (3 n^3,)
        Each undirected pair once.
    dr_A : ndarray, shape (3 n^3, 3), Å
        Minimum-image vectors ``r_j - r_i``.
    box : ndarray, shape (6,)
        ``[L, L, L, 90, 90, 90]``.
    """
    n = int(n_per_side)
    if n < 3:
        raise InputError(f"n_per_side must be >= 3 (so that +x and -x neighbours differ); got {n_per_side!r}.")
    a = float(spacing_A)
    if not a > 0:
        raise InputError(f"spacing_A must be > 0; got {spacing_A!r}.")
    g = np.indices((n, n, n)).reshape(3, -1).T  # (N, 3) integer coordinates
    idx = (g[:, 0] * n + g[:, 1]) * n + g[:, 2]
    ii, jj, dd = [], [], []
    for axis in range(3):
        h = g.copy()
        h[:, axis] = (h[:, axis] + 1) % n
        ii.append(idx)
        jj.append((h[:, 0] * n + h[:, 1]) * n + h[:, 2])
        step = np.zeros((idx.size, 3))
        step[:, axis] = a
        dd.append(step)
    box = np.array([n * a, n * a, n * a, 90.0, 90.0, 90.0])
    return g * a, np.concatenate(ii), np.concatenate(jj), np.concatenate(dd), box


def build_hopping_graph(
    site_energy_eV: npt.ArrayLike,
    i: npt.ArrayLike,
    j: npt.ArrayLike,
    dr_A: npt.ArrayLike,
    T_K: float,
    *,
    law: Literal["miller-abrahams", "marcus"] = "miller-abrahams",
    carrier: str = "hole",
    field_V_per_A: npt.ArrayLike | None = None,
    nu0_per_s: float | None = None,
    gamma_per_A: float | None = None,
    J_eV: npt.ArrayLike | None = None,
    lambda_eV: npt.ArrayLike | None = None,
) -> HoppingGraph:
    """Hopping graph from site energies and undirected neighbour pairs.

    Each pair ``(i, j)`` gives the two hops ``i -> j`` and ``j -> i`` with
    ``dE = E_j - E_i - q F . dr`` (see :mod:`clusterlab.transport.rates`).

    Parameters
    ----------
    site_energy_eV : array_like, shape (n,), eV
        Carrier site energies (``+IP`` holes, ``-EA`` electrons, S1/T1 excitons).
    i, j : array_like of int, shape (m,)
        Pairs, each once.
    dr_A : array_like, shape (m, 3), Å
        Minimum-image vectors ``r_j - r_i``.
    T_K : float, K
    law : {'miller-abrahams', 'marcus'}
    carrier : {'hole', 'electron', 'exciton'}
        Sets the charge used in the field term.
    field_V_per_A : array_like, shape (3,), V/Å, optional
    nu0_per_s, gamma_per_A : float
        Miller-Abrahams parameters (required for that law).
    J_eV : array_like, shape (m,) or scalar, eV
        Marcus couplings (required for that law).
    lambda_eV : array_like, shape (m,) or scalar, eV
        Marcus reorganisation energies (required for that law).

    Raises
    ------
    InputError
        For missing law parameters, an unknown law or bad shapes.
    """
    E = np.asarray(site_energy_eV, dtype=np.float64).ravel()
    a = np.asarray(i, dtype=np.int64).ravel()
    b = np.asarray(j, dtype=np.int64).ravel()
    v = np.asarray(dr_A, dtype=np.float64).reshape(-1, 3)
    if a.size != b.size or v.shape[0] != a.size:
        raise InputError(f"i, j and dr_A must have the same length; got {a.size}, {b.size}, {v.shape[0]}.")
    if a.size and (min(a.min(), b.min()) < 0 or max(a.max(), b.max()) >= E.size):
        raise InputError(f"pair indices must lie in [0, {E.size}) (one per site energy).")
    F = np.zeros(3) if field_V_per_A is None else np.asarray(field_V_per_A, dtype=np.float64)
    src = np.concatenate([a, b])
    dst = np.concatenate([b, a])
    dvec = np.concatenate([v, -v])
    dE = field_energy_change(E[dst] - E[src], dvec, F, carrier)
    if law == "miller-abrahams":
        if nu0_per_s is None or gamma_per_A is None:
            raise InputError("law='miller-abrahams' needs nu0_per_s and gamma_per_A.")
        r = np.linalg.norm(dvec, axis=1)
        k = miller_abrahams_rate(dE, r, T_K, nu0_per_s=nu0_per_s, gamma_per_A=gamma_per_A)
    elif law == "marcus":
        if J_eV is None or lambda_eV is None:
            raise InputError("law='marcus' needs J_eV and lambda_eV (per pair or scalar).")
        Jp = np.broadcast_to(np.asarray(J_eV, dtype=np.float64), a.shape)
        lp = np.broadcast_to(np.asarray(lambda_eV, dtype=np.float64), a.shape)
        k = marcus_rate(np.concatenate([Jp, Jp]), dE, np.concatenate([lp, lp]), T_K)
    else:
        raise InputError(f"{law!r} is not a rate law. Use 'miller-abrahams' or 'marcus'.")
    return HoppingGraph.from_edges(E.size, src, dst, k, dvec)


def _drift_inputs(field_V_per_A: npt.ArrayLike, carrier: str, *, zero_hint: str = "",
                  exciton_hint: str = "") -> tuple[FloatArray, float, int]:
    """Field vector, its squared norm and the carrier charge of a drift
    mobility, with the errors for a zero field and for excitons."""
    F = np.asarray(field_V_per_A, dtype=np.float64).reshape(3)
    F2 = float(F @ F)
    if F2 == 0:
        raise InputError(f"field_V_per_A is zero{zero_hint}.")
    q = carrier_charge(carrier)
    if q == 0:
        raise InputError(f"an exciton has no drift mobility{exciton_hint}.")
    return F, F2, q


@dataclass(frozen=True, eq=False)
class KMCResult:
    """Walker displacements at common sample times.

    Attributes
    ----------
    times_s : ndarray, shape (n_samples,), s
    displacement_A : ndarray, shape (n_samples, n_walkers, 3), Å
        Unwrapped displacement from the start site at each sample time.
    n_hops : ndarray of int64, shape (n_walkers,)
    n_steps : int
        Vectorised steps taken.
    """

    times_s: FloatArray
    displacement_A: FloatArray
    n_hops: IntArray
    n_steps: int

    @property
    def n_walkers(self) -> int:
        return int(self.displacement_A.shape[1])

    def _window(self, skip_fraction: float) -> tuple[FloatArray, float]:
        if not 0.0 <= skip_fraction < 1.0:
            raise InputError(f"skip_fraction must be in [0, 1); got {skip_fraction!r}.")
        t_end = self.times_s[-1]
        k0 = int(np.searchsorted(self.times_s, skip_fraction * t_end, side="left"))
        k0 = min(k0, self.times_s.size - 1)
        if skip_fraction == 0.0:
            t0, r0 = 0.0, np.zeros_like(self.displacement_A[-1])
        else:
            t0, r0 = float(self.times_s[k0]), self.displacement_A[k0]
        dt = float(t_end - t0)
        if dt <= 0:
            raise InputError("skip_fraction leaves no time window; lower it or add samples.")
        return self.displacement_A[-1] - r0, dt

    def diffusion_coefficient(
        self, *, dims: tuple[int, ...] = (0, 1, 2), skip_fraction: float = 0.5
    ) -> tuple[float, float]:
        """Diffusion coefficient and its standard error, in cm^2/s.

        ``D = <|dr - <dr>|^2> / (2 d dt)`` over the window from
        ``skip_fraction * t_end`` to ``t_end``, ``d = len(dims)``; the error is
        the standard error over independent walkers. The mean drift is
        removed, so this also works in a field.

        Parameters
        ----------
        dims : tuple of int
            Cartesian axes to use (``(0, 1, 2)`` for 3-d, ``(0,)`` for x only).
        skip_fraction : float in [0, 1)
            Start of the window as a fraction of the run: skips the initial
            relaxation of walkers started off equilibrium.
        """
        dr, dt = self._window(skip_fraction)
        x = dr[:, list(dims)]
        n = x.shape[0]
        if n < 2:
            raise InputError("need at least 2 walkers for an error bar.")
        sq = np.sum((x - x.mean(axis=0)) ** 2, axis=1) * n / (n - 1)
        scale = 1.0 / (2 * len(dims) * dt) * 1e-16  # Å^2/s -> cm^2/s
        return float(sq.mean() * scale), float(sq.std(ddof=1) / np.sqrt(n) * scale)

    def drift_velocity(self, *, skip_fraction: float = 0.5) -> tuple[FloatArray, FloatArray]:
        """Mean velocity (cm/s), shape (3,), and its standard error (cm/s)."""
        dr, dt = self._window(skip_fraction)
        n = dr.shape[0]
        v = dr.mean(axis=0) / dt * 1e-8
        err = dr.std(axis=0, ddof=1) / np.sqrt(n) / dt * 1e-8
        return v, err

    def mobility(
        self, field_V_per_A: npt.ArrayLike, carrier: str, *, skip_fraction: float = 0.5
    ) -> tuple[float, float]:
        """Drift mobility ``q v . F / |F|^2`` and its standard error, cm^2/(V s).

        ``field_V_per_A`` must be the field the graph's rates were built with.
        """
        F, F2, q = _drift_inputs(field_V_per_A, carrier, zero_hint="; use einstein_mobility() for zero field",
                                 exciton_hint="; use diffusion_coefficient()")
        dr, dt = self._window(skip_fraction)
        proj = q * (dr @ F) / F2 / dt  # Å^2/(V s)
        n = proj.size
        return (
            float(proj.mean() * A2_PER_VS_TO_CM2_PER_VS),
            float(proj.std(ddof=1) / np.sqrt(n) * A2_PER_VS_TO_CM2_PER_VS),
        )

    def einstein_mobility(
        self, T_K: float, *, skip_fraction: float = 0.5
    ) -> tuple[float, float]:
        """``mu = e D / kT`` (cm^2/(V s)) with its error; zero field, nondispersive only."""
        D, err = self.diffusion_coefficient(skip_fraction=skip_fraction)
        kT = KB_EV * float(T_K)
        return D / kT, err / kT


def run_kmc(
    graph: HoppingGraph,
    *,
    n_walkers: int,
    t_max_s: float,
    n_samples: int = 20,
    seed: int | None = None,
    start_sites: npt.ArrayLike | None = None,
    max_steps: int = 1_000_000,
) -> KMCResult:
    """Rejection-free kinetic Monte Carlo for independent walkers.

    All walkers move at once: each step draws a waiting time
    ``-ln(u1) / Gamma_s`` and picks the next hop with probability
    ``k / Gamma_s`` by one ``searchsorted`` over :attr:`HoppingGraph.keys`.

    Parameters
    ----------
    graph : HoppingGraph
    n_walkers : int
    t_max_s : float, s
        Simulated time of every walker.
    n_samples : int
        Displacements are recorded at ``t_max * (1..n_samples) / n_samples``.
    seed : int, optional
        For ``numpy.random.default_rng``.
    start_sites : array_like of int, shape (n_walkers,), optional
        Default: uniformly random sites.
    max_steps : int
        Safety limit on the number of vectorised steps.

    Returns
    -------
    KMCResult

    Raises
    ------
    InputError
        For bad parameters.
    ConvergenceError
        If ``max_steps`` is reached before every walker reaches ``t_max_s``.
    """
    nw = int(n_walkers)
    if nw < 1:
        raise InputError(f"n_walkers must be >= 1; got {n_walkers!r}.")
    if not (np.isfinite(t_max_s) and t_max_s > 0):
        raise InputError(f"t_max_s must be finite and > 0; got {t_max_s!r}.")
    ns = int(n_samples)
    if ns < 1:
        raise InputError(f"n_samples must be >= 1; got {n_samples!r}.")
    rng = np.random.default_rng(seed)
    if start_sites is None:
        site = rng.integers(0, graph.n_sites, size=nw)
    else:
        site = np.asarray(start_sites, dtype=np.int64).ravel().copy()
        if site.size != nw or site.min() < 0 or site.max() >= graph.n_sites:
            raise InputError(
                f"start_sites must have {nw} entries in [0, {graph.n_sites}); got {site.size} entries."
            )
    samples = float(t_max_s) * np.arange(1, ns + 1) / ns
    out = np.zeros((ns, nw, 3))
    pos = np.zeros((nw, 3))
    t = np.zeros(nw)
    nxt = np.zeros(nw, dtype=np.int64)
    hops = np.zeros(nw, dtype=np.int64)
    active = np.arange(nw)
    steps = 0
    total = graph.total_rate_per_s
    while active.size:
        if steps >= max_steps:
            raise ConvergenceError(
                f"run_kmc reached max_steps={max_steps} with {active.size} walkers short of "
                f"t_max_s={t_max_s}; raise max_steps or lower t_max_s."
            )
        steps += 1
        s = site[active]
        g = total[s]
        u1 = rng.random(active.size)
        with np.errstate(divide="ignore"):
            dt = np.where(g > 0, -np.log1p(-u1) / g, np.inf)
        t_new = t[active] + dt
        # record the current position at every sample time the jump passes
        while True:
            nn = nxt[active]
            due = (nn < ns) & (t_new > samples[np.minimum(nn, ns - 1)])
            if not due.any():
                break
            w = active[due]
            out[nxt[w], w] = pos[w]
            nxt[w] += 1
        moving = np.isfinite(t_new) & (nxt[active] < ns)
        w = active[moving]
        if w.size:
            target = s[moving] + rng.random(w.size)
            e = np.searchsorted(graph.keys, target, side="right")
            e = np.clip(e, graph.indptr[s[moving]], graph.indptr[s[moving] + 1] - 1)
            pos[w] += graph.dr_A[e]
            site[w] = graph.dst[e]
            t[w] = t_new[moving]
            hops[w] += 1
        active = active[nxt[active] < ns]
    return KMCResult(samples, out, hops, steps)


def steady_state_occupation(graph: HoppingGraph) -> FloatArray:
    """Steady-state occupation probabilities of the single-carrier master equation.

    Solves ``W p = 0`` with ``sum(p) = 1`` by a sparse LU factorisation
    (SuperLU via :func:`scipy.sparse.linalg.spsolve`). Cost grows quickly
    with size for 3-d graphs (about 1 s for 8000 lattice sites, 4 s for 14000).

    Returns
    -------
    ndarray, shape (n_sites,)

    Raises
    ------
    InputError
        If the graph is not strongly connected (no unique steady state).
    ConvergenceError
        If the solution has a large residual or clearly negative entries.
    """
    n = graph.n_sites
    adj = sp.coo_matrix((np.ones(graph.n_hops), (graph.src, graph.dst)), shape=(n, n)).tocsr()
    ncomp, _ = csgraph.connected_components(adj, directed=True, connection="strong")
    if ncomp != 1:
        raise InputError(
            f"the hopping graph has {ncomp} strongly connected components; a unique steady "
            "state needs every site reachable from every other (check the cutoff and zero rates)."
        )
    scale = float(graph.rate_per_s.max())
    W = (graph.rate_matrix() / scale).tocsc()
    # fix p_0 = 1 and drop the (redundant) first balance equation: keeps the
    # matrix structurally symmetric, so the minimum-degree ordering of A + A^T
    # gives little fill-in
    A = W[1:, 1:]
    b = -W[1:, 0].toarray().ravel()
    if n == 1:
        return np.ones(1)
    rest = spla.spsolve(A, b, permc_spec="MMD_AT_PLUS_A")
    p = np.concatenate(([1.0], np.atleast_1d(rest)))
    res = float(np.abs(W @ p).max() / max(np.abs(W.diagonal()).max(), 1e-300) / np.abs(p).max())
    if not np.all(np.isfinite(p)) or res > 1e-9 or p.min() < -1e-9 * p.max():
        raise ConvergenceError(
            f"master-equation steady state failed (relative residual {res:.2e}, "
            f"min p/max p {p.min() / p.max():.2e})."
        )
    p = np.clip(p, 0.0, None)
    return p / p.sum()


def master_equation_mobility(
    graph: HoppingGraph, field_V_per_A: npt.ArrayLike, carrier: str
) -> float:
    """Drift mobility (cm^2/(V s)) from the master-equation steady state.

    ``v = sum_hops p_src k dr`` and ``mu = q v . F / |F|^2``. Use a graph
    built with the same ``field_V_per_A`` (and a field small enough for
    linear response: ``e |F| a << kT``).

    Raises
    ------
    InputError
        For a zero field or an exciton carrier.
    """
    F, F2, q = _drift_inputs(field_V_per_A, carrier, zero_hint="; a drift mobility needs a field")
    p = steady_state_occupation(graph)
    flux = p[graph.src] * graph.rate_per_s
    v = flux @ graph.dr_A  # Å/s
    return float(q * (v @ F) / F2 * A2_PER_VS_TO_CM2_PER_VS)
