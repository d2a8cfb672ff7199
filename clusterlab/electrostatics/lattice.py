"""Site energies of a charge among randomly oriented dipoles on a cubic lattice.

A check of the electrostatic site-energy idea against the analytic
dipolar-disorder result: for dipoles of size p with random orientations on a
simple cubic lattice of spacing a, the energy of a unit charge at a site,
:math:`U_i = \\sum_{j\\ne i} e\\,\\mathbf p_j\\cdot(\\mathbf r_i-\\mathbf r_j)/(\\varepsilon |\\mathbf r_i-\\mathbf r_j|^3)`,
is Gaussian with

.. math:: \\sigma^2 = \\frac{e^2 p^2}{3\\varepsilon^2}\\sum_{j} r_{ij}^{-4}
          = \\frac{S_4}{3}\\Big(\\frac{e p}{\\varepsilon a^2}\\Big)^2,
   \\qquad S_4 = \\sum_{\\mathbf n\\in\\mathbb Z^3\\setminus 0} |\\mathbf n|^{-4} = 16.5323,

(Dieckmann, Bässler & Borsenberger, J. Chem. Phys. 99, 8136 (1993); Young,
Philos. Mag. B 72, 435 (1995)), and correlation
:math:`C(r)\\to \\frac{4\\pi}{3}\\frac{e^2p^2}{\\varepsilon^2 a^3 r}` at r >> a
(from Poisson's equation; i.e. :math:`C/\\sigma^2 = (4\\pi/S_4)\\,a/r \\approx 0.76\\,a/r`,
cf. Novikov et al., Phys. Rev. Lett. 81, 4472 (1998), who quote about 0.74,
from memory).

The lattice is periodic (n x n x n sites). Site energies are one FFT
convolution of the dipoles with a kernel, the field of a unit charge at the
lattice sites, taken either as the minimum-image direct field (truncated at
the cube around each site) or as the tinfoil Ewald field of the periodic
lattice. Both underestimate S4 by O(1/n) (images replace distant
independent dipoles); :func:`kernel_s4` gives the kernel's own effective
lattice sum, and a Richardson step between n and 2n removes the O(1/n) term.

Units: spacing Å, dipoles e·Å, energies eV.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from ..errors import InputError
from ..units import COULOMB_EV_A, DEBYE_E_A
from .ewald import ewald_potential

FloatArray = npt.NDArray[np.float64]

#: sum of 1/|n|^4 over the simple cubic lattice without the origin (project reference table)
S4_SIMPLE_CUBIC = 16.5323

__all__ = [
    "S4_SIMPLE_CUBIC",
    "lattice_sum_s4",
    "dipolar_sigma_eV",
    "unit_charge_field_kernel",
    "kernel_s4",
    "random_dipoles",
    "dipolar_site_energies",
    "expected_correlation_eV2",
    "sample_correlation_eV2",
]


def lattice_sum_s4(radius: int = 60) -> float:
    """:math:`\\sum_{0<|n|\\le R} |n|^{-4}` over Z³ plus the continuum tail 4π/R.

    The tail correction makes the error O(R^-2); R = 60 gives about 1e-4.
    """
    if radius < 2:
        raise InputError(f"radius must be >= 2 lattice units; got {radius!r}.")
    g = np.arange(-radius, radius + 1, dtype=np.float64)
    n2 = (g[:, None, None] ** 2 + g[None, :, None] ** 2 + g[None, None, :] ** 2).ravel()
    n2 = n2[(n2 > 0) & (n2 <= radius * radius)]
    # tail: integral over |r| > R of 1/r^4, with R at the midpoint shell (radius + ~0)
    return float(np.sum(1.0 / n2**2) + 4.0 * np.pi / radius)


def dipolar_sigma_eV(dipole_D: float, spacing_A: float, eps_r: float = 1.0,
                     concentration: float = 1.0, s4: float = S4_SIMPLE_CUBIC) -> float:
    """Analytic width (eV) of dipolar disorder: sqrt(c S4/3) e p/(ε a²).

    Parameters
    ----------
    dipole_D : float, Debye
    spacing_A : float, Å
    eps_r : float, relative permittivity
    concentration : float in (0, 1], fraction of sites carrying a dipole
    """
    if spacing_A <= 0 or eps_r <= 0 or not 0 < concentration <= 1:
        raise InputError("need spacing_A > 0, eps_r > 0 and 0 < concentration <= 1.")
    p_eA = dipole_D * DEBYE_E_A
    return float(np.sqrt(concentration * s4 / 3.0) * COULOMB_EV_A * p_eA / (eps_r * spacing_A**2))


def _sites(n: int) -> FloatArray:
    g = np.arange(n, dtype=np.float64)
    return np.array(np.meshgrid(g, g, g, indexing="ij")).reshape(3, -1).T


def unit_charge_field_kernel(n: int, spacing_A: float = 1.0, kind: str = "minimum_image",
                             accuracy: float = 1e-10) -> FloatArray:
    """Field (e/Å² per unit charge) of a unit charge at the origin at every lattice site.

    Parameters
    ----------
    n : int
        Lattice size per direction (n³ sites).
    kind : {"minimum_image", "ewald"}
        ``"minimum_image"``: r/r³ of the nearest image only (sites at exactly
        half a box length get the half-sum of the two images, zero along that
        axis); ``"ewald"``: tinfoil Ewald field of the periodic lattice.

    Returns
    -------
    ndarray, shape (n, n, n, 3); zero at the origin.
    """
    if n < 2:
        raise InputError(f"n must be >= 2; got {n!r}.")
    pts = _sites(n) * spacing_A
    length = n * spacing_A
    if kind == "minimum_image":
        d = pts - length * np.round(pts / length)
        half = np.isclose(np.abs(pts / length - np.round(pts / length)), 0.5)
        d = np.where(half, 0.0, d)  # symmetric: the two images at ±L/2 cancel along that axis
        r = np.linalg.norm(pts - length * np.round(pts / length), axis=1)
        with np.errstate(divide="ignore", invalid="ignore"):
            e = np.where(r[:, None] > 0, d / r[:, None] ** 3, 0.0)
    elif kind == "ewald":
        _, f = ewald_potential(pts, [[0.0, 0.0, 0.0]], [1.0], [length] * 3 + [90.0] * 3,
                               non_neutral="background", field=True, accuracy=accuracy)
        e = f / COULOMB_EV_A
    else:
        raise InputError(f"{kind!r} is an invalid kernel kind. Use 'minimum_image' or 'ewald'.")
    return e.reshape(n, n, n, 3)


def kernel_s4(kernel: FloatArray, spacing_A: float = 1.0) -> float:
    """Effective lattice sum of a kernel, :math:`a^4 \\sum_n |K(n)|^2` (-> S4 for n -> inf)."""
    return float(np.sum(kernel**2) * spacing_A**4)


def random_dipoles(n: int, dipole_eA: float, rng: np.random.Generator) -> FloatArray:
    """Isotropically oriented dipoles of size ``dipole_eA`` on n³ sites, shape (n, n, n, 3)."""
    v = rng.normal(size=(n, n, n, 3))
    return dipole_eA * v / np.linalg.norm(v, axis=-1, keepdims=True)


def dipolar_site_energies(dipoles_eA: npt.ArrayLike, kernel: FloatArray, eps_r: float = 1.0) -> FloatArray:
    """Energy (eV) of a unit positive charge at every site from all other dipoles.

    :math:`U_i = \\frac{e}{\\varepsilon}\\sum_j \\mathbf p_j\\cdot\\mathbf K(\\mathbf r_i-\\mathbf r_j)`,
    a periodic convolution done by FFT.

    Parameters
    ----------
    dipoles_eA : array_like, shape (n, n, n, 3), e·Å
    kernel : ndarray, shape (n, n, n, 3), from :func:`unit_charge_field_kernel`
    eps_r : float

    Returns
    -------
    ndarray, shape (n, n, n), eV
    """
    p = np.asarray(dipoles_eA, dtype=np.float64)
    if p.shape != kernel.shape:
        raise InputError(f"dipoles shape {p.shape} must match kernel shape {kernel.shape}.")
    ax = (0, 1, 2)
    acc = np.zeros(p.shape[:3], dtype=complex)
    for x in range(3):
        acc += np.fft.fftn(kernel[..., x], axes=ax) * np.fft.fftn(p[..., x], axes=ax)
    return np.real(np.fft.ifftn(acc, axes=ax)) * COULOMB_EV_A / eps_r


def expected_correlation_eV2(kernel: FloatArray, dipole_eA: float, eps_r: float = 1.0) -> FloatArray:
    """Exact ensemble correlation :math:`\\langle U_0 U_r\\rangle` (eV²) for random dipoles.

    :math:`C(\\mathbf r) = \\frac{p^2}{3}\\sum_n \\mathbf K(\\mathbf n)\\cdot\\mathbf K(\\mathbf n+\\mathbf r)`
    (times (e/ε)²); ``C[0, 0, 0]`` is σ². Shape (n, n, n).
    """
    ax = (0, 1, 2)
    acc = np.zeros(kernel.shape[:3])
    for x in range(3):
        fk = np.fft.fftn(kernel[..., x], axes=ax)
        acc += np.real(np.fft.ifftn(fk * np.conj(fk), axes=ax))
    return acc * (dipole_eA**2 / 3.0) * (COULOMB_EV_A / eps_r) ** 2


def sample_correlation_eV2(energies_eV: npt.ArrayLike) -> FloatArray:
    """Sample spatial correlation of a periodic site-energy field, shape (n, n, n):
    :math:`C(\\mathbf r) = \\langle \\delta U(\\mathbf s)\\,\\delta U(\\mathbf s+\\mathbf r)\\rangle_s`."""
    u = np.asarray(energies_eV, dtype=np.float64)
    du = u - u.mean()
    f = np.fft.fftn(du)
    return np.real(np.fft.ifftn(f * np.conj(f))) / du.size
