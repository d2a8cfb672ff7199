"""The TDA response operator in the molecular-orbital basis, density fitted,
on an orbital window: the fast route for large molecules.

PySCF's TDA operator (``pyscf.tdscf.rhf._gen_tda_operation``) turns each
trial vector X (occupied x virtual) into an AO transition density and builds
its Coulomb, exchange and exchange-correlation matrices in the AO basis. With
density fitting the exchange of a non-symmetric density costs
``naux * nao**3`` per vector; for a 60-atom emitter in 6-31G (386 AO, 3,166
fitting functions) that is 80 % of the response time (measured:
``bench/bench_large_site.py``). In the MO basis the same terms need only the
fitted three-index integrals of the orbital blocks, built once per SCF:

    (A X)_jb = (e_b - e_j) X_jb + 2 sum_kc (jb|kc) X_kc            [singlets only]
               - c_x sum_kc (jk|bc) X_kc + (f_xc X)_jb

with (pq|rs) = sum_P B^P_pq B^P_rs from PySCF's own Cholesky-factored
fitting integrals (the same numbers PySCF's AO route contracts), so the
exchange of one vector costs ``naux * (no**2 nv + no nv**2)``. The
exchange-correlation kernel is PySCF's (``cache_xc_kernel``, spin-adapted as
in ``nr_rks_fxc_st``), contracted with the transition density built from the
window's orbitals on the response grid (LDA and GGA functionals). What does
not depend on the spin (the ground-state density on the grid, the window's
orbitals there, B_oo/B_vv and B_ov) is one :class:`OperatorSetup`, built once
and shared by the singlet and triplet operators of the same SCF.

The **orbital window** keeps the occupied orbitals within ``window_Eh`` of the
HOMO and the virtual orbitals within ``window_Eh`` of the LUMO: low-lying
states are made of frontier pairs, and core and high virtual orbitals only
enter them through small couplings (the frozen-core idea of correlated
methods, common practice). The error this makes is measured against the
full space in the tests and in the benchmark; ``window_Eh=None`` keeps every
orbital, and then the operator equals PySCF's to rounding (a test checks it
against ``_gen_tda_operation``).

Not covered (the callers fall back to PySCF's AO route): range-separated
functionals (their long-range exchange needs attenuated fitting integrals),
meta-GGAs, non-local correlation, and unrestricted references. Induced
dipoles of a polarizable environment answer the transition density through
PySCF's own solvent term (``_B_dot_x`` on the AO transition density).
"""

from __future__ import annotations

import hashlib
import logging
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

from ..errors import InputError

FloatArray = npt.NDArray[np.float64]
log = logging.getLogger("clusterlab.qm")


@dataclass(frozen=True)
class OrbitalWindow:
    """Which occupied and virtual orbitals the response sees.

    ``occ`` and ``vir`` index the occupied and virtual orbitals of the SCF
    (0 = the lowest occupied / the LUMO), ascending.
    """

    occ: npt.NDArray[np.intp]
    vir: npt.NDArray[np.intp]
    nocc: int
    nvir: int

    @property
    def n_pairs(self) -> int:
        return len(self.occ) * len(self.vir)

    @property
    def is_full(self) -> bool:
        return len(self.occ) == self.nocc and len(self.vir) == self.nvir

    def embed(self, x: FloatArray) -> FloatArray:
        """Window vectors (m, no_w*nv_w) as full (m, nocc*nvir) vectors (zeros outside)."""
        x = np.atleast_2d(x)
        out = np.zeros((len(x), self.nocc, self.nvir))
        out[:, self.occ[:, None], self.vir[None, :]] = x.reshape(len(x), len(self.occ), len(self.vir))
        return out.reshape(len(x), -1)

    def restrict(self, x: FloatArray) -> FloatArray:
        """Full vectors (m, nocc*nvir) cut to the window (m, no_w*nv_w)."""
        x = np.atleast_2d(x).reshape(-1, self.nocc, self.nvir)
        return x[:, self.occ[:, None], self.vir[None, :]].reshape(len(x), -1)


def orbital_window(mo_energy: FloatArray, mo_occ: FloatArray, window_Eh: float | None) -> OrbitalWindow:
    """The occupied orbitals within ``window_Eh`` (Hartree) below the HOMO and
    the virtual ones within ``window_Eh`` above the LUMO (None: all)."""
    mo_energy = np.asarray(mo_energy, float)
    occ_mask = np.asarray(mo_occ) > 0
    e_o, e_v = mo_energy[occ_mask], mo_energy[~occ_mask]
    nocc, nvir = len(e_o), len(e_v)
    if window_Eh is None:
        return OrbitalWindow(np.arange(nocc), np.arange(nvir), nocc, nvir)
    occ = np.flatnonzero(e_o >= e_o.max() - window_Eh)
    vir = np.flatnonzero(e_v <= e_v.min() + window_Eh)
    return OrbitalWindow(occ, vir, nocc, nvir)


def supported(mf: Any) -> tuple[bool, str]:
    """Whether :func:`tda_operator` covers this SCF; (False, why) if not."""
    from pyscf import dft, scf

    if not getattr(mf, "with_df", None):
        return False, "the SCF is not density fitted"
    if isinstance(mf, (scf.uhf.UHF, scf.rohf.ROHF)) or not isinstance(mf, scf.hf.RHF):
        return False, "the reference is not closed-shell restricted"
    if isinstance(mf, dft.rks.KohnShamDFT):
        ni = mf._numint
        omega, _alpha, _hyb = ni.rsh_and_hybrid_coeff(mf.xc, mf.mol.spin)
        if omega != 0:
            return False, f"{mf.xc} is range separated"
        if ni._xc_type(mf.xc) not in ("LDA", "GGA", "HF"):
            return False, f"{mf.xc} is a {ni._xc_type(mf.xc)} functional"
        if mf.do_nlc():
            return False, "non-local correlation"
    return True, ""


def _fitted_blocks(mf: Any, c_o: FloatArray, c_v: FloatArray, *, need_j: bool, need_k: bool
                   ) -> tuple[FloatArray | None, FloatArray | None, FloatArray | None]:
    """B_ov (naux, no*nv), B_oo (naux, no, no), B_vv (naux, nv, nv) from the
    SCF's fitting integrals (None where not needed)."""
    from pyscf.ao2mo import _ao2mo

    no, nv = c_o.shape[1], c_v.shape[1]
    mo = np.asarray(np.hstack([c_o, c_v]), order="F")
    dfobj = mf.with_df
    naux = dfobj.get_naoaux()
    b_ov = np.empty((naux, no * nv)) if need_j else None
    b_oo = np.empty((naux, no * no)) if need_k else None
    b_vv = np.empty((naux, nv * nv)) if need_k else None
    p0 = 0
    for eri1 in dfobj.loop():
        p1 = p0 + eri1.shape[0]
        if need_j:
            _ao2mo.nr_e2(eri1, mo, (0, no, no, no + nv), aosym="s2", mosym="s1", out=b_ov[p0:p1])
        if need_k:
            _ao2mo.nr_e2(eri1, mo, (0, no, 0, no), aosym="s2", mosym="s1", out=b_oo[p0:p1])
            _ao2mo.nr_e2(eri1, mo, (no, no + nv, no, no + nv), aosym="s2", mosym="s1", out=b_vv[p0:p1])
        p0 = p1
    return (b_ov, None if b_oo is None else b_oo.reshape(naux, no, no),
            None if b_vv is None else b_vv.reshape(naux, nv, nv))


#: Grid points per block of the exchange-correlation contraction, and the
#: memory (MB) the cached orbital values on the grid may take; beyond it they
#: are recomputed at every call (slower, bounded memory).
_GRID_BLOCK = 2048  # rounded down to a multiple of pyscf.dft.numint.BLKSIZE where used
_ORBITAL_CACHE_MB = 3000.0
#: Memory (MB) of the temporaries of one chunk of vectors.
_CHUNK_MB = 200.0


def fingerprint(*arrays: npt.ArrayLike) -> str:
    """A short digest of the bytes (and shapes) of ``arrays``: equal digests
    mean equal numbers (blake2b; ~1 ms per MB)."""
    h = hashlib.blake2b(digest_size=16)
    for a in arrays:
        a = np.ascontiguousarray(a)
        h.update(f"{a.dtype}{a.shape}".encode())
        h.update(a.tobytes())
    return h.hexdigest()


def setup_key(mf: Any, window: OrbitalWindow) -> tuple[str, str, str]:
    """What an :class:`OperatorSetup` of ``mf`` on ``window`` depends on: the
    orbitals (coefficients, occupations, energies), the atoms, the response
    grid (points and weights), the window's index arrays, the functional and
    the fitting basis. A changed SCF (other geometry, other environment,
    other grid) gives another key."""
    grids = getattr(mf, "grids", None)
    grid = () if grids is None or grids.coords is None else (grids.coords, grids.weights)
    digest = fingerprint(mf.mo_coeff, mf.mo_occ, mf.mo_energy, mf.mol.atom_coords(), window.occ, window.vir, *grid)
    return digest, str(getattr(mf, "xc", "hf")), str(getattr(mf.with_df, "auxbasis", None))


class OperatorSetup:
    """The spin-independent set-up of the TDA operators of one SCF on one
    orbital window and response grid, built on first use and shared by the
    singlet and triplet operators (and any later operator of the same SCF).

    * the ground-state density on the grid (PySCF's ``cache_xc_kernel``, the
      costly part of the XC kernel: AO values times every occupied orbital);
      each spin's kernel f_xc is then evaluated from it by libxc
      (``eval_xc_eff``, the call ``cache_xc_kernel`` itself ends with), so the
      set-up keeps 4 numbers per grid point instead of a second 16-number
      kernel;
    * the window's orbitals (and gradients) on the grid, cached when they fit
      in :data:`_ORBITAL_CACHE_MB` (recomputed at each use otherwise);
    * the fitted blocks B_oo and B_vv (exchange, both spins) and B_ov
      (Coulomb, singlets only: built when a singlet operator first asks).

    Memory: what one singlet operator held before sharing, plus the density
    (4 numbers per grid point); triplets add nothing. ``key`` is
    :func:`setup_key`; the owner (``clusterlab.qm.calc``) keeps one per SCF
    and drops it with the SCF's fitting integrals after the calculation.
    """

    def __init__(self, mf: Any, window: OrbitalWindow, max_memory_MB: float = 2000.0):
        from pyscf import dft

        self.key = setup_key(mf, window)
        self.mf, self.window, self.max_memory_MB = mf, window, max_memory_MB
        mo_e = np.asarray(mf.mo_energy, float)
        occ_mask = np.asarray(mf.mo_occ) > 0
        c_all = np.asarray(mf.mo_coeff, float)
        self.c_o = c_all[:, occ_mask][:, window.occ]
        self.c_v = c_all[:, ~occ_mask][:, window.vir]
        self.e_ia = mo_e[~occ_mask][window.vir][None, :] - mo_e[occ_mask][window.occ][:, None]
        self.xctype = "HF"
        self.hyb = 1.0
        if isinstance(mf, dft.rks.KohnShamDFT):
            _omega, _alpha, self.hyb = mf._numint.rsh_and_hybrid_coeff(mf.xc, mf.mol.spin)
            self.xctype = mf._numint._xc_type(mf.xc)
        self.deriv = 1 if self.xctype == "GGA" else 0
        self._rho_a: FloatArray | None = None
        self._orbitals: list[tuple[FloatArray, FloatArray, FloatArray, int, int]] | None = None
        self._orbitals_fit: bool | None = None
        self.b_ov: FloatArray | None = None
        self.b_oo: FloatArray | None = None
        self.b_vv: FloatArray | None = None

    @property
    def has_xc(self) -> bool:
        return self.xctype != "HF"

    def _grids(self):
        grids = self.mf.grids
        if grids.coords is None:
            grids.build()
        return grids

    def xc_kernel(self, singlet: bool) -> FloatArray:
        """0.5 (f_aa ± f_ab) on the grid, shape (nvar, nvar, ngrid): the
        spin-adapted kernel of ``pyscf.dft.numint.nr_rks_fxc_st`` with the
        1/2 of ``pyscf.scf._response_functions`` (its density matrices carry
        both spins)."""
        mf = self.mf
        ni = mf._numint
        if self._rho_a is None:
            rho0, _vxc, fxc = ni.cache_xc_kernel(mf.mol, self._grids(), mf.xc, mf.mo_coeff, mf.mo_occ, spin=1,
                                                 max_memory=self.max_memory_MB)
            self._rho_a = np.array(rho0[0])  # spin=1 from a closed shell: two equal halves
            del rho0, _vxc
        else:
            rho = np.repeat(self._rho_a[np.newaxis], 2, axis=0)
            fxc = ni.eval_xc_eff(mf.xc, rho, deriv=2, xctype=self.xctype, spin=1)[2]
        f = 0.5 * (fxc[0, :, 0] + fxc[0, :, 1] if singlet else fxc[0, :, 0] - fxc[0, :, 1])
        return f.reshape(1, 1, -1) if self.deriv == 0 else f

    def orbital_blocks(self):
        """Window orbitals (and gradients) on the grid, block by block:
        (phi_o (nvar, blk, no), phi_v (nvar, blk, nv), weights, p0, p1);
        cached on first use when they fit in :data:`_ORBITAL_CACHE_MB`."""
        if self._orbitals is not None:
            yield from self._orbitals
            return
        from pyscf.dft.numint import BLKSIZE

        mol, grids = self.mf.mol, self._grids()
        if self._orbitals_fit is None:
            nvar = 4 if self.deriv else 1
            size_MB = nvar * len(grids.weights) * (self.c_o.shape[1] + self.c_v.shape[1]) * 8 / 1e6
            self._orbitals_fit = size_MB <= _ORBITAL_CACHE_MB
        nao = mol.nao
        cache: list = []
        p1 = 0
        for ao, _mask, weight, _coords in self.mf._numint.block_loop(mol, grids, nao, self.deriv,
                                                                     max_memory=self.max_memory_MB,
                                                                     blksize=_GRID_BLOCK // BLKSIZE * BLKSIZE):
            p0, p1 = p1, p1 + weight.size
            ao = ao.reshape(-1, weight.size, nao)
            item = (ao @ self.c_o, ao @ self.c_v, np.array(weight), p0, p1)
            if self._orbitals_fit:
                cache.append(item)
            yield item
        if self._orbitals_fit:
            self._orbitals = cache

    def fitted(self, need_j: bool, need_k: bool) -> None:
        """Build the fitted blocks asked for that are not there yet."""
        j = need_j and self.b_ov is None
        k = need_k and self.b_oo is None
        if j or k:
            b_ov, b_oo, b_vv = _fitted_blocks(self.mf, self.c_o, self.c_v, need_j=j, need_k=k)
            if j:
                self.b_ov = b_ov
            if k:
                self.b_oo, self.b_vv = b_oo, b_vv

    def held_MB(self) -> dict[str, float]:
        """Memory held now (MB): the density on the grid, the window orbitals
        on the grid, B_ov, and B_oo with B_vv."""
        def mb(*arrays) -> float:
            return sum(a.nbytes for a in arrays if a is not None) / 1e6

        orbitals = [a for item in (self._orbitals or ()) for a in item[:3]]
        return {"density": mb(self._rho_a), "orbitals": mb(*orbitals), "b_ov": mb(self.b_ov),
                "b_oo_vv": mb(self.b_oo, self.b_vv)}


class _XCKernel:
    """f_xc contracted with window transition densities on a grid (LDA/GGA)."""

    def __init__(self, setup: OperatorSetup, singlet: bool):
        self.setup = setup
        self.fxc = setup.xc_kernel(singlet)  # (nvar, nvar, ngrid)

    def __call__(self, z: FloatArray) -> FloatArray:
        """(f_xc Z)_jb for Z of shape (n, no, nv)."""
        n, no, nv = z.shape
        out = np.zeros_like(z)
        nvar = self.fxc.shape[0]
        chunk = max(1, int(_CHUNK_MB * 1e6 / (8 * _GRID_BLOCK * (nvar + 1) * nv)))
        for phi_o, phi_v, weight, p0, p1 in self.setup.orbital_blocks():
            f = self.fxc[:, :, p0:p1]
            for c0 in range(0, n, chunk):
                zc = z[c0:c0 + chunk]
                m = len(zc)
                # Q_gnb = sum_j phi_j(g) Z_njb and P_gnj = sum_b phi_b(g) Z_njb: two matrix products
                q = (phi_o[0] @ zc.transpose(1, 0, 2).reshape(no, m * nv)).reshape(-1, m, nv)
                rho1 = np.empty((nvar, m, weight.size))
                rho1[0] = 2.0 * (q * phi_v[0][:, None, :]).sum(axis=2).T
                if nvar > 1:  # grad rho1 = 2 sum_jb Z_jb (phi_j grad phi_b + phi_b grad phi_j)
                    pz = (phi_v[0] @ zc.transpose(2, 0, 1).reshape(nv, m * no)).reshape(-1, m, no)
                    for x in range(1, nvar):
                        rho1[x] = 2.0 * ((q * phi_v[x][:, None, :]).sum(axis=2)
                                         + (pz * phi_o[x][:, None, :]).sum(axis=2)).T
                wv = np.einsum("yng,xyg->xng", rho1, f) * weight
                # V_jb = sum_g [phi_j (wv0 phi_b + sum_x wv_x d_x phi_b) + (sum_x wv_x d_x phi_j) phi_b]
                s = wv[0][:, :, None] * phi_v[0][None]
                for x in range(1, nvar):
                    s += wv[x][:, :, None] * phi_v[x][None]
                g = weight.size
                acc = phi_o[0].T @ s.transpose(1, 0, 2).reshape(g, m * nv)  # (no, m nv)
                acc = acc.reshape(no, m, nv).transpose(1, 0, 2)
                if nvar > 1:
                    r = wv[1][:, :, None] * phi_o[1][None]
                    for x in range(2, nvar):
                        r += wv[x][:, :, None] * phi_o[x][None]
                    acc = acc + (phi_v[0].T @ r.transpose(1, 0, 2).reshape(g, m * no)).reshape(nv, m, no).transpose(1, 2, 0)
                out[c0:c0 + m] += acc
        return out


def tda_operator(mf: Any, singlet: bool, window: OrbitalWindow, *, environment_response: bool = False,
                 max_memory_MB: float = 2000.0, setup: OperatorSetup | None = None):
    """The TDA operator of a closed-shell density-fitted SCF on ``window``.

    Parameters
    ----------
    mf : pyscf SCF
        Converged, density fitted, closed shell; its grid is the response grid.
    singlet : bool
    window : OrbitalWindow
    environment_response : bool
        Add the induced dipoles' answer to the transition density (singlets,
        polarizable environments: PySCF's ``with_solvent._B_dot_x``).
    max_memory_MB : float
        Memory for PySCF's grid loops.
    setup : OperatorSetup, optional
        The shared set-up of this SCF and window (the other spin's operator
        built it, or builds it now); its key must be :func:`setup_key` of
        (``mf``, ``window``). None: a private one (nothing shared).

    Returns
    -------
    vind : callable
        ``vind(x)`` with x of shape (m, no_w*nv_w) returns A x, same shape.
    hdiag : ndarray, shape (no_w*nv_w,)
        Orbital-energy differences (the operator's diagonal without coupling,
        the Davidson preconditioner of PySCF's route).

    Raises
    ------
    InputError
        ``setup`` belongs to another SCF, grid or window.
    """
    if setup is None:
        setup = OperatorSetup(mf, window, max_memory_MB)
    elif setup.key != setup_key(mf, window):
        raise InputError("the operator set-up belongs to another SCF, response grid or orbital window; build a "
                         "new OperatorSetup for this one.")
    c_o, c_v, e_ia, hyb = setup.c_o, setup.c_v, setup.e_ia, setup.hyb
    no, nv = e_ia.shape
    xc = _XCKernel(setup, singlet) if setup.has_xc else None
    setup.fitted(need_j=singlet, need_k=hyb != 0)
    b_ov = setup.b_ov if singlet else None
    b_oo, b_vv = (setup.b_oo, setup.b_vv) if hyb != 0 else (None, None)
    solvent = getattr(mf, "with_solvent", None) if environment_response else None

    def vind(xs: FloatArray) -> FloatArray:
        z = np.asarray(xs, float).reshape(-1, no, nv)
        out = z * e_ia
        if b_ov is not None:  # Coulomb: 2 (jb|kc) Z_kc
            jv = b_ov @ z.reshape(len(z), -1).T  # (naux, n)
            out += 2.0 * (b_ov.T @ jv).T.reshape(z.shape)
        if b_oo is not None:  # exchange: -c_x (jk|bc) Z_kc, fitting functions in blocks
            naux, n = b_oo.shape[0], len(z)
            pblk = max(1, min(naux, int(_CHUNK_MB * 1e6 / (16 * no * nv * n))))
            zk = z.transpose(1, 0, 2).reshape(no, n * nv)  # (k, n c)
            kz = np.zeros((n * no, nv))
            for a0 in range(0, naux, pblk):  # two large matrix products per block of fitting functions
                p = min(pblk, naux - a0)
                t = (b_oo[a0:a0 + p].reshape(p * no, no) @ zk).reshape(p, no, n, nv)  # sum_k B^P_jk Z_kc
                t = t.transpose(2, 1, 0, 3).reshape(n * no, p * nv)
                kz += t @ b_vv[a0:a0 + p].reshape(p * nv, nv)  # sum_Pc T^P_jc B^P_cb
            out -= hyb * kz.reshape(n, no, nv)
        if xc is not None:
            out += xc(z)
        if solvent is not None:
            dms = np.einsum("xov,pv,qo->xpq", z, c_v, c_o * 2.0)
            for i, dm in enumerate(dms):
                v = np.asarray(solvent._B_dot_x(dm))
                out[i] += c_o.T @ v.T @ c_v
        return out.reshape(len(z), -1)

    return vind, e_ia.ravel()
