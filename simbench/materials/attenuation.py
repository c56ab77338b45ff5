"""Linear attenuation coefficients mu(E) of materials, from xraylib's cross-section tables.

The total attenuation used in CT is the sum of photoelectric absorption, incoherent (Compton)
and coherent (Rayleigh) scattering: a photon scattered even slightly leaves the ideal pencil
beam of one detector cell, so coherent scattering counts as attenuation (it is also what the
NIST XCOM column "total attenuation with coherent scattering" tabulates). The energy-absorption
coefficient (for air kerma, half-value layers and detector absorption) is computed here from
xraylib's photoelectric cross sections, fluorescence yields and line energies and the
Klein-Nishina energy-transfer fraction (see :func:`mass_energy_absorption_cm2_g`): xraylib's own
``CS_Energy`` departs from the Hubbell & Seltzer table by up to 30 % between 15 and 60 keV
(an open xraylib issue), which would bias air-kerma weighted half-value layers.

Energies outside :data:`VALID_ENERGY_RANGE_KEV` and attenuation coefficients no real material
has (non-finite, or above :data:`MAX_MU_PER_MM`) are refused with a one-line
:class:`~simbench.errors.InputError`; the functions take a ``where`` so that callers can name
the field the energies came from.
"""

from __future__ import annotations

from collections import OrderedDict
from typing import Sequence

import re
import threading
from functools import lru_cache

import numpy as np
import xraylib
import xraylib_np

from simbench.errors import InputError, Where
from simbench.materials.catalogue import element_symbol_to_z
from simbench.materials.spec import MaterialSpec

#: Energies (keV) where both xraylib tables used here are defined.
VALID_ENERGY_RANGE_KEV = (1.0, 800.0)
#: Largest linear attenuation coefficient any material can have, 1/mm: the densest elements
#: reach about 1.4e4 /mm at 1 keV (xraylib CS_Total times the element density, e.g.
#: plutonium 7.2e3 cm^2/g x 19.8 g/cm^3), and no compound is denser than osmium (22.6 g/cm^3)
MAX_MU_PER_MM = 1.0e5

_CACHE_SIZE = 32
_mu_cache: "OrderedDict[tuple, np.ndarray]" = OrderedDict()
_mu_cache_lock = threading.Lock()
_MASS_CACHE_SIZE = 256
_mass_cache: "OrderedDict[tuple, np.ndarray]" = OrderedDict()


def _place(where: "Where | str | None", field: str) -> Where:
    """The caller's place, or a generic one naming ``field``."""
    if where is None:
        return Where("<input>", field=field)
    return Where(where) if isinstance(where, str) else where


def _energies(energies_kev, where: "Where | str | None" = None) -> np.ndarray:
    e = np.atleast_1d(np.asarray(energies_kev, dtype=np.float64))
    if e.ndim != 1:
        raise ValueError(f"energies must be a 1-D array in keV, got shape {e.shape}")
    lo, hi = VALID_ENERGY_RANGE_KEV
    bad = ~np.isfinite(e) | (e < lo) | (e > hi)
    if bad.any():
        raise InputError(_place(where, "energy"),
                         f"energy {e[bad][0]:g} keV is outside the attenuation tables",
                         f"an energy from {lo:g} to {hi:g} keV")
    return e


def _check_mu(spec: MaterialSpec, mu: np.ndarray, energies: np.ndarray) -> None:
    """Refuse attenuation no real material has: non-finite, or above MAX_MU_PER_MM."""
    bad = ~(np.abs(mu) <= MAX_MU_PER_MM)
    if bad.any():
        i = int(np.argmax(bad))
        density = (f" (density {spec.density_g_cm3:g} g/cm^3)" if spec.kind != "mu" else "")
        raise InputError(Where("<input>", field=f"materials.{spec.name}"),
                         f"material '{spec.name}' would attenuate {mu[i]:g} /mm at "
                         f"{energies[min(i, energies.size - 1)]:g} keV{density}, more than any "
                         "real material",
                         f"at most {MAX_MU_PER_MM:g} /mm; no material is denser than "
                         "osmium, 22.6 g/cm^3")


def _composition(spec: MaterialSpec) -> tuple[np.ndarray, np.ndarray]:
    if not spec.mass_fractions:
        raise ValueError(f"material '{spec.name}' has no composition (kind {spec.kind!r})")
    z = np.array([element_symbol_to_z(s) for s, _ in spec.mass_fractions], dtype=np.int64)
    w = np.array([float(f) for _, f in spec.mass_fractions], dtype=np.float64)
    return z, w


def _mass_coefficient(spec: MaterialSpec, energies: np.ndarray, table) -> np.ndarray:
    """sum_i w_i table(Z_i, E) for a material's composition, cached on the composition alone:
    materials that differ only in density (a random family's drawn contrasts) share it."""
    if not spec.mass_fractions:
        return _mass_coefficient_of(spec, energies, table)
    key = (spec.mass_fractions, table, energies.tobytes())
    with _mu_cache_lock:
        cached = _mass_cache.get(key)
        if cached is not None:
            _mass_cache.move_to_end(key)
    if cached is None:
        cached = _mass_coefficient_of(spec, energies, table)
        with _mu_cache_lock:
            _mass_cache[key] = cached
            while len(_mass_cache) > _MASS_CACHE_SIZE:
                _mass_cache.popitem(last=False)
    return cached.copy()


def _mass_coefficient_of(spec: MaterialSpec, energies: np.ndarray, table) -> np.ndarray:
    z, w = _composition(spec)
    per_element = np.asarray(table(z, energies), dtype=np.float64)  # (nZ, E)
    if not np.all(np.isfinite(per_element)) or np.any(per_element <= 0):
        raise ValueError(f"cross sections unavailable for material '{spec.name}' "
                         f"(valid energies: {VALID_ENERGY_RANGE_KEV[0]:g} to "
                         f"{VALID_ENERGY_RANGE_KEV[1]:g} keV)")
    return w @ per_element


def mass_attenuation_cm2_g(spec: MaterialSpec, energies_kev, *,
                           where: "Where | str | None" = None) -> np.ndarray:
    """Mass attenuation coefficient mu/rho of a material, cm^2/g.

    Parameters
    ----------
    spec : MaterialSpec
        A material with a composition (catalogue or custom).
    energies_kev : array_like, shape (E,)
        Photon energies, keV, within :data:`VALID_ENERGY_RANGE_KEV`.
    where : Where or str, optional
        Place of the field the energies came from, named in the error.

    Raises
    ------
    InputError
        An energy outside :data:`VALID_ENERGY_RANGE_KEV` (one line naming ``where``).

    Returns
    -------
    ndarray, shape (E,), float64

    Notes
    -----
    Mixture rule: ``mu/rho = sum_i w_i (mu/rho)_i`` with mass fractions ``w_i`` and the
    elemental total cross sections (photoelectric + Compton + Rayleigh) of xraylib
    (``CS_Total``).

    References
    ----------
    Hubbell J H and Seltzer S M, Tables of X-Ray Mass Attenuation Coefficients and Mass
    Energy-Absorption Coefficients, NISTIR 5632 (1995).
    Schoonjans T et al., The xraylib library for X-ray-matter interactions. Recent
    developments, Spectrochim. Acta B 66 (2011) 776-784.
    """
    return _mass_coefficient(spec, _energies(energies_kev, where), xraylib_np.CS_Total)


ELECTRON_REST_ENERGY_KEV = 510.99895  # CODATA 2018
_AVOGADRO_BARN = 0.602214076  # N_A * 1e-24 cm^2/barn, so Z/A * sigma[barn] * this = cm^2/g
_GAUSS_COS, _GAUSS_WEIGHTS = np.polynomial.legendre.leggauss(128)
_FLUORESCENCE_SHELLS = {"K": xraylib.K_SHELL, "L1": xraylib.L1_SHELL, "L2": xraylib.L2_SHELL,
                        "L3": xraylib.L3_SHELL}
_LINE_MACROS = [(name, getattr(xraylib, name)) for name in dir(xraylib)
                if re.match(r"^(K|L1|L2|L3)[KLMNOPQ]\d?_LINE$", name)]


def klein_nishina_transfer_fraction(energies_kev) -> np.ndarray:
    """Mean fraction of the photon energy given to the electron in a free-electron Compton event.

    Parameters
    ----------
    energies_kev : array_like, shape (E,)

    Returns
    -------
    ndarray, shape (E,)
        ``sigma_tr / sigma`` of the Klein-Nishina cross section.

    Notes
    -----
    With ``k = E / m c^2`` and ``r = E'/E = 1 / (1 + k (1 - cos theta))``,
    ``d sigma / d cos theta ~ r^2 (r + 1/r - sin^2 theta)``; the fraction is
    ``int dsigma (1 - r) / int dsigma`` (128-point Gauss-Legendre in cos theta).

    References
    ----------
    Klein O and Nishina Y, Z. Phys. 52 (1929) 853-868.
    """
    k = np.asarray(energies_kev, dtype=np.float64)[:, None] / ELECTRON_REST_ENERGY_KEV
    cos_t = _GAUSS_COS[None, :]
    r = 1.0 / (1.0 + k * (1.0 - cos_t))
    dsigma = r * r * (r + 1.0 / r - (1.0 - cos_t * cos_t))
    return (dsigma * (1.0 - r)) @ _GAUSS_WEIGHTS / (dsigma @ _GAUSS_WEIGHTS)


@lru_cache(maxsize=None)
def _mean_fluorescence_energy_kev(z: int, shell: str) -> float:
    """Mean energy of the fluorescence photon emitted to fill a vacancy in ``shell``."""
    weighted = total = 0.0
    for name, macro in _LINE_MACROS:
        if not re.match(rf"^{shell}[KLMNOPQ]", name):
            continue
        try:
            rate = xraylib.RadRate(z, macro)
            energy = xraylib.LineEnergy(z, macro)
        except ValueError:
            continue
        weighted += rate * energy
        total += rate
    return weighted / total if total > 0 else 0.0


def _element_energy_absorption(z: np.ndarray, energies: np.ndarray) -> np.ndarray:
    """mu_en/rho of elements, cm^2/g, shape (nZ, E)."""
    tau = np.asarray(xraylib_np.CS_Photo(z, energies), dtype=np.float64)
    atomic_weight = np.array([xraylib.AtomicWeight(int(zi)) for zi in z])
    sigma_kn = np.asarray(xraylib_np.CS_KN(energies), dtype=np.float64)  # barn / electron
    compton_tr = (z / atomic_weight * _AVOGADRO_BARN)[:, None] * (
        sigma_kn * klein_nishina_transfer_fraction(energies))[None, :]
    fluorescence = np.zeros_like(tau)
    for shell, macro in _FLUORESCENCE_SHELLS.items():
        mean_energy = np.array([_mean_fluorescence_energy_kev(int(zi), shell) for zi in z])
        if not np.any(mean_energy > 0):
            continue
        cross = np.asarray(xraylib_np.CS_FluorShell(z, np.array([macro]), energies),
                           dtype=np.float64)[:, 0, :]  # cm^2/g, 0 where the shell is absent
        fluorescence += cross * mean_energy[:, None]
    return tau + compton_tr - fluorescence / energies[None, :]


def mass_energy_absorption_cm2_g(spec: MaterialSpec, energies_kev, *,
                                 where: "Where | str | None" = None) -> np.ndarray:
    """Mass energy-absorption coefficient mu_en/rho of a material, cm^2/g.

    Parameters
    ----------
    spec : MaterialSpec
        A material with a composition.
    energies_kev : array_like, shape (E,)
        Photon energies, keV, within :data:`VALID_ENERGY_RANGE_KEV`.
    where : Where or str, optional
        Place of the field the energies came from, named in the error.

    Raises
    ------
    InputError
        An energy outside :data:`VALID_ENERGY_RANGE_KEV` (one line naming ``where``).

    Returns
    -------
    ndarray, shape (E,), float64

    Notes
    -----
    Per element ``mu_en/rho = tau (1 - X) + sigma_KN * (sigma_tr/sigma)_KN`` and
    ``mu_en/rho = sum_i w_i (mu_en/rho)_i`` for a mixture, where ``tau`` is the photoelectric
    cross section (xraylib ``CS_Photo``), ``tau X = sum_shells sigma_fluor,shell * E_fluor,shell
    / E`` the energy carried away by K and L fluorescence (xraylib ``CS_FluorShell``,
    ``RadRate``, ``LineEnergy``), and the Compton term uses the free-electron Klein-Nishina
    cross section and energy-transfer fraction (binding lowers mostly the forward scattering,
    which transfers little energy). Radiative losses of the secondary electrons (``g``) are
    neglected (< 0.1 % in air and water below 1 MeV). Agreement with the Hubbell & Seltzer
    table for air and water is within 0.5 % from 10 to 150 keV. Air kerma per photon fluence
    at energy E is ``E (mu_en/rho)_air``.

    References
    ----------
    Hubbell J H, Photon mass attenuation and energy-absorption coefficients from 1 keV to
    20 MeV, Int. J. Appl. Radiat. Isot. 33 (1982) 1269-1290.
    Hubbell J H and Seltzer S M, NISTIR 5632 (1995).
    """
    energies = _energies(energies_kev, where)
    z, w = _composition(spec)
    return w @ _element_energy_absorption(z, energies)


def _compute_mu_table(materials: tuple, energies: np.ndarray) -> np.ndarray:
    out = np.empty((len(materials), energies.size), dtype=np.float64)
    for m, spec in enumerate(materials):
        if spec.kind == "mu":
            out[m] = spec.mu_per_mm
            continue
        if not (np.isfinite(spec.density_g_cm3) and spec.density_g_cm3 > 0):
            raise ValueError(f"material '{spec.name}' has density {spec.density_g_cm3!r} g/cm^3 "
                             "(valid: finite, > 0)")
        # (cm^2/g) * (g/cm^3) = 1/cm; / 10 -> 1/mm
        with np.errstate(over="ignore"):
            out[m] = (_mass_coefficient(spec, energies, xraylib_np.CS_Total)
                      * spec.density_g_cm3 / 10.0)
    for m, spec in enumerate(materials):
        _check_mu(spec, out[m], energies)
    return out


def mu_table(materials: Sequence[MaterialSpec], energies_kev, *,
             where: "Where | str | None" = None) -> np.ndarray:
    """Linear attenuation coefficients of several materials on an energy grid, 1/mm.

    Parameters
    ----------
    materials : sequence of MaterialSpec, length M
        Catalogue, custom or explicit-mu materials.
    energies_kev : array_like, shape (E,)
        Photon energies, keV, within :data:`VALID_ENERGY_RANGE_KEV` (1 to 800 keV).
    where : Where or str, optional
        Place of the field the energies came from (e.g. a command-line option), named in the
        error for an energy outside the tables.

    Returns
    -------
    ndarray, shape (M, E), float64
        ``mu[m, e]`` in 1/mm: total attenuation **with coherent scattering** (photoelectric +
        Compton + Rayleigh). Explicit-mu materials (kind ``"mu"``) are constant in energy.
        A fresh array each call (callers may modify it).

    Raises
    ------
    InputError
        An energy outside the tables (one line naming ``where`` and the valid range); an
        attenuation coefficient that is not finite or above :data:`MAX_MU_PER_MM` (one line
        naming the material), e.g. a custom material of absurd density.
    ValueError
        A non-positive density or an unknown element.

    Notes
    -----
    ``mu = (mu/rho) * rho / 10`` with ``mu/rho`` in cm^2/g from :func:`mass_attenuation_cm2_g`
    and ``rho`` in g/cm^3. Results are kept in a small least-recently-used cache keyed on the
    (hashable, frozen) specs and the bytes of the energy grid.

    Examples
    --------
    >>> from simbench.materials import get_material
    >>> round(float(mu_table([get_material("water")], [60.0])[0, 0]), 5)
    0.02059
    """
    specs = tuple(materials)
    for spec in specs:
        if not isinstance(spec, MaterialSpec):
            raise TypeError(f"expected MaterialSpec, got {type(spec).__name__}")
    energies = _energies(energies_kev, where)
    key = (specs, energies.tobytes())
    with _mu_cache_lock:
        cached = _mu_cache.get(key)
        if cached is not None:
            _mu_cache.move_to_end(key)
    if cached is None:
        cached = _compute_mu_table(specs, energies)
        with _mu_cache_lock:
            _mu_cache[key] = cached
            while len(_mu_cache) > _CACHE_SIZE:
                _mu_cache.popitem(last=False)
    return cached.copy()


def mu_per_mm(material: MaterialSpec, energy_kev: float, *,
              where: "Where | str | None" = None) -> float:
    """Linear attenuation coefficient of one material at one energy, 1/mm (see :func:`mu_table`)."""
    return float(mu_table([material], [energy_kev], where=where)[0, 0])


__all__ = ["MAX_MU_PER_MM", "VALID_ENERGY_RANGE_KEV", "klein_nishina_transfer_fraction", "mass_attenuation_cm2_g",
           "mass_energy_absorption_cm2_g", "mu_table", "mu_per_mm"]
