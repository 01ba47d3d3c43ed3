"""Small simulated sensors with known truth, for the camera stage.

Two generators, both pure (numpy Generator seeded from ``seed``):

* :func:`simulate_flat_pairs` - flat-field and dark frame pairs of a linear (or slightly
  nonlinear) sensor following the EMVA 1288 linear model: photons -> electrons (Poisson,
  quantum efficiency, PRNU), dark noise (Gaussian, e-), system gain K (DN/e-), offset,
  rounding to integer codes and clipping at the ADC maximum. The ground truth (gain, dark
  noise, expected mean grey values, saturation point) is returned beside the frames.
* :func:`simulate_bracket` - an exposure bracket of a static scene, encoded with a
  transfer curve (sRGB by default) to 8-bit codes, for response-curve recovery.

These exist to test :mod:`ecl_quant.camera` against known answers; the main recording
simulator is :mod:`ecl_quant.simulate`.

References
----------
EMVA Standard 1288, Release 4.0 Linear (2021), section 2 (the linear camera model,
Eqs. 2-15).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from math import erfc, sqrt

import numpy as np
from numpy.typing import NDArray
from scipy.optimize import brentq

from .transfer import srgb_encode

__all__ = [
    "SensorTruth",
    "FlatPairSimulation",
    "simulate_flat_pairs",
    "expected_mean_dn",
    "simulate_bracket",
    "bracket_scene",
]

#: Fraction of pixels at the maximum code that defines saturation (EMVA 1288 R4: 0.1-0.2 %).
SATURATION_FRACTION = 0.0015


@dataclass(frozen=True)
class SensorTruth:
    """Parameters of a simulated sensor (the known answer).

    Attributes
    ----------
    gain_dn_per_e : float
        System gain K in DN per electron.
    read_noise_e : float
        Temporal dark noise sigma_d in electrons (dark current shot noise excluded).
    full_well_e : float
        Electrons at which the pixel clips.
    eta : float
        Quantum efficiency (0..1).
    dark_offset_dn : float
        Mean dark level in DN.
    max_code : int
        ADC maximum (2**bit_depth - 1).
    prnu : float
        Relative standard deviation of the pixel gain (photo response non-uniformity).
    dsnu_e : float
        Standard deviation of the fixed dark pattern in electrons.
    nonlinearity : float
        Fractional compression of the signal at ADC full scale: DN signal =
        K e (1 - nonlinearity * e / e_fs) with e_fs = (max_code - offset) / K.
    dark_current_e_per_s : float
        Mean dark current in electrons per second.
    photon_flux_per_s : float
        Mean photons per pixel per second of exposure.
    """

    gain_dn_per_e: float
    read_noise_e: float
    full_well_e: float
    eta: float
    dark_offset_dn: float
    max_code: int
    prnu: float
    dsnu_e: float
    nonlinearity: float
    dark_current_e_per_s: float
    photon_flux_per_s: float

    @property
    def e_full_scale(self) -> float:
        """Electrons that fill the ADC range above the dark offset."""
        return (self.max_code - self.dark_offset_dn) / self.gain_dn_per_e


@dataclass(frozen=True, eq=False)
class FlatPairSimulation:
    """Simulated photon-transfer data set.

    Attributes
    ----------
    exposure_s : (n,) ndarray
        Exposure time of each level.
    photons : (n,) ndarray
        Mean photons per pixel mu_p at each level.
    flats : list of list of (H, W) uint16 arrays
        ``flats[i]`` holds the frames at level i (two by default).
    darks : list of list of (H, W) uint16 arrays
        Dark frames at the same exposure times.
    truth : SensorTruth
    expected_mean_dn : (n,) ndarray
        Expected mean grey value of the flats (before clipping), DN.
    expected_dark_dn : (n,) ndarray
        Expected mean grey value of the darks, DN.
    saturation_photons : float
        mu_p at which SATURATION_FRACTION of pixels reach max_code (normal approximation).
    saturation_mean_dn : float
        Expected mean grey value at that point.
    prnu_map, dsnu_map : (H, W) ndarrays
        The realised fixed patterns (relative gain - 1; electrons).
    """

    exposure_s: NDArray[np.float64]
    photons: NDArray[np.float64]
    flats: list[list[NDArray[np.uint16]]]
    darks: list[list[NDArray[np.uint16]]]
    truth: SensorTruth
    expected_mean_dn: NDArray[np.float64]
    expected_dark_dn: NDArray[np.float64]
    saturation_photons: float
    saturation_mean_dn: float
    prnu_map: NDArray[np.float64] = field(repr=False)
    dsnu_map: NDArray[np.float64] = field(repr=False)


def _signal_dn(electrons: NDArray[np.float64], truth: SensorTruth) -> NDArray[np.float64]:
    k = truth.gain_dn_per_e
    if truth.nonlinearity == 0.0:
        return k * electrons
    return k * electrons * (1.0 - truth.nonlinearity * electrons / truth.e_full_scale)


def expected_mean_dn(photons: float, truth: SensorTruth, prnu_map: NDArray[np.float64],
                     *, exposure_s: float = 0.0) -> float:
    """Expected spatial mean grey value (DN) at ``photons`` mean photons per pixel.

    Exact for the quadratic nonlinearity model: E[e] = lam and E[e^2] = lam + lam^2 for
    Poisson counts with mean lam per pixel, averaged over the realised PRNU map.
    Clipping (full well, ADC) is not included.
    """
    lam = truth.eta * photons * (1.0 + prnu_map) + truth.dark_current_e_per_s * exposure_s
    k = truth.gain_dn_per_e
    if truth.nonlinearity == 0.0:
        sig = k * lam
    else:
        sig = k * (lam - truth.nonlinearity * (lam + lam**2) / truth.e_full_scale)
    return float(truth.dark_offset_dn + np.mean(sig))


def _saturation_photons(truth: SensorTruth) -> float:
    """mu_p at which SATURATION_FRACTION of pixels read max_code (normal approximation)."""
    k = truth.gain_dn_per_e

    def frac(mu_p: float) -> float:
        lam = truth.eta * mu_p
        m = truth.dark_offset_dn + float(_signal_dn(np.array(lam), truth))
        # local slope of the signal (the nonlinearity compresses the shot noise and PRNU;
        # the read noise and DSNU are added after it)
        d = 1.0 - 2.0 * truth.nonlinearity * lam / truth.e_full_scale
        s2 = (k * d) ** 2 * (lam + (lam * truth.prnu) ** 2)
        s2 += k**2 * (truth.read_noise_e**2 + truth.dsnu_e**2) + 1.0 / 12.0
        z = (truth.max_code - 0.5 - m) / sqrt(s2)
        return 0.5 * erfc(z / sqrt(2.0)) - SATURATION_FRACTION

    hi = 2.0 * truth.e_full_scale / truth.eta
    return float(brentq(frac, 1.0, hi, xtol=1e-6))


def simulate_flat_pairs(
    *,
    gain_dn_per_e: float = 0.45,
    read_noise_e: float = 2.8,
    full_well_e: float = 12000.0,
    eta: float = 0.6,
    bit_depth: int = 12,
    dark_offset_dn: float = 64.0,
    shape: tuple[int, int] = (128, 128),
    exposure_s: Sequence[float] | None = None,
    photon_flux_per_s: float = 1.0e6,
    prnu: float = 0.0,
    dsnu_e: float = 0.0,
    nonlinearity: float = 0.0,
    dark_current_e_per_s: float = 0.0,
    frames_per_level: int = 2,
    dark_frames_per_level: int = 2,
    seed: int = 0,
) -> FlatPairSimulation:
    """Simulate flat-field and dark frames at stepped exposure times.

    Parameters
    ----------
    gain_dn_per_e : float
        System gain K (DN/e-).
    read_noise_e : float
        Temporal dark noise (e-, Gaussian).
    full_well_e : float
        Electron clip. Keep ``full_well_e * gain + offset`` above the ADC maximum (the ADC
        clips first), so that saturation shows as pixels at the maximum code.
    eta : float
        Quantum efficiency.
    bit_depth : int
        ADC bits; codes are clipped to 0 .. 2**bit_depth - 1 and stored as uint16.
    dark_offset_dn : float
        Dark offset in DN.
    shape : (int, int)
        Frame size (H, W) in pixels.
    exposure_s : sequence of float, optional
        Exposure times; default 40 levels from 0 to 1.15x the saturation exposure.
    photon_flux_per_s : float
        Mean photons per pixel per second.
    prnu, dsnu_e, nonlinearity, dark_current_e_per_s : float
        See :class:`SensorTruth`.
    frames_per_level, dark_frames_per_level : int
        Images per level (2 = a pair; more for nonuniformity stacks).
    seed : int
        Seed of the random generator.

    Returns
    -------
    FlatPairSimulation
    """
    max_code = 2**bit_depth - 1
    truth = SensorTruth(
        gain_dn_per_e=gain_dn_per_e, read_noise_e=read_noise_e, full_well_e=full_well_e,
        eta=eta, dark_offset_dn=dark_offset_dn, max_code=max_code, prnu=prnu, dsnu_e=dsnu_e,
        nonlinearity=nonlinearity, dark_current_e_per_s=dark_current_e_per_s,
        photon_flux_per_s=photon_flux_per_s,
    )
    if full_well_e * gain_dn_per_e + dark_offset_dn < max_code:
        raise ValueError("full well is reached before the ADC maximum; raise full_well_e")
    rng = np.random.default_rng(seed)
    prnu_map = rng.normal(0.0, prnu, shape) if prnu > 0 else np.zeros(shape)
    dsnu_map = rng.normal(0.0, dsnu_e, shape) if dsnu_e > 0 else np.zeros(shape)
    sat_p = _saturation_photons(truth)
    if exposure_s is None:
        exposure_s = np.linspace(0.0, 1.15 * sat_p / photon_flux_per_s, 40)
    t = np.asarray(exposure_s, dtype=np.float64)
    photons = t * photon_flux_per_s

    def frame(mu_p: float, t_s: float) -> NDArray[np.uint16]:
        lam = eta * mu_p * (1.0 + prnu_map) + dark_current_e_per_s * t_s
        e = rng.poisson(np.clip(lam, 0.0, None)).astype(np.float64)
        e = np.minimum(e, full_well_e)
        dark_e = dsnu_map + rng.normal(0.0, read_noise_e, shape)
        dn = _signal_dn(e, truth) + gain_dn_per_e * dark_e + dark_offset_dn
        return np.clip(np.rint(dn), 0, max_code).astype(np.uint16)

    flats = [[frame(p, ti) for _ in range(frames_per_level)] for p, ti in zip(photons, t)]
    darks = [[frame(0.0, ti) for _ in range(dark_frames_per_level)] for ti in t]
    exp_mean = np.array([expected_mean_dn(p, truth, prnu_map, exposure_s=ti)
                         for p, ti in zip(photons, t)])
    exp_dark = np.array([expected_mean_dn(0.0, truth, prnu_map, exposure_s=ti) for ti in t])
    sat_mean = expected_mean_dn(sat_p, truth, prnu_map)
    return FlatPairSimulation(
        exposure_s=t, photons=photons, flats=flats, darks=darks, truth=truth,
        expected_mean_dn=exp_mean, expected_dark_dn=exp_dark, saturation_photons=sat_p,
        saturation_mean_dn=sat_mean, prnu_map=prnu_map, dsnu_map=dsnu_map,
    )


def bracket_scene(shape: tuple[int, int] = (120, 160), *, channels: int = 3,
                  span_stops: float = 9.0) -> NDArray[np.float64]:
    """A static scene of relative radiances spanning ``span_stops`` stops.

    A horizontal log-radiance ramp with a gentle vertical ripple, tinted per channel so
    the three channels are not identical. Values are relative (max about 1).
    """
    h, w = shape
    yy, xx = np.mgrid[0:h, 0:w]
    log2r = -span_stops * (1.0 - xx / (w - 1)) + 0.7 * np.sin(yy / 7.0)
    rad = 2.0**log2r
    if channels == 1:
        return rad
    tint = np.array([0.8, 1.0, 0.6][:channels])
    return rad[..., None] * tint


def simulate_bracket(
    radiance: NDArray[np.floating],
    exposure_s: Sequence[float],
    *,
    encode: Callable[[NDArray[np.float64]], NDArray[np.floating]] = srgb_encode,
    scale: float = 1.0,
    noise_codes: float = 0.5,
    seed: int = 0,
) -> list[NDArray[np.uint8]]:
    """Render an exposure bracket of a static scene as 8-bit codes.

    ``code = round(255 * encode(clip(scale * radiance * t, 0, 1)) + noise)``, clipped to
    0..255, one image per exposure time.

    Parameters
    ----------
    radiance : (H, W) or (H, W, C) ndarray
        Relative scene radiance (linear).
    exposure_s : sequence of float
        Exposure times in seconds.
    encode : callable
        Transfer function linear -> encoded 0..1 (default sRGB, IEC 61966-2-1).
    scale : float
        Linear full-scale units per (radiance x second).
    noise_codes : float
        Standard deviation of Gaussian noise added before rounding, in codes.
    seed : int
    """
    rng = np.random.default_rng(seed)
    out: list[NDArray[np.uint8]] = []
    for t in exposure_s:
        lin = np.clip(np.asarray(radiance, dtype=np.float64) * scale * float(t), 0.0, 1.0)
        v = np.asarray(encode(lin), dtype=np.float64) * 255.0
        if noise_codes > 0:
            v = v + rng.normal(0.0, noise_codes, v.shape)
        out.append(np.clip(np.rint(v), 0, 255).astype(np.uint8))
    return out
