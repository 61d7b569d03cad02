"""Observation forecasts: how large a planet's kink will look, and the smallest
mass that a given beam, channel width and SNR can show.

What is forecast
----------------
For a channel at velocity ``v_ch`` the Keplerian iso-velocity curve is
``V_bg(x, y) = v_ch`` (front emitting layer).  A planet's wake adds a
line-of-sight velocity ``dv(x, y) = a_r dv_r + a_phi dv_phi``
(:func:`kinkfit.geometry.projection_coefficients`), which moves the curve,
to first order, by ::

    delta(x, y) = -dv(x, y) / |grad V_bg|            (arcsec, along grad V_bg)

(PHYSICS.md section 7; the sign convention of ``kinkfit.deviations``).  The
*kink amplitude* of a channel is the largest ``|delta|`` along its curve, in
arcsec and in beam FWHM.  Channels are labelled by their offset
``v_ch - v_p`` from the planet's own line-of-sight velocity ``v_p``.

What an observation measures (derivation)
-----------------------------------------
Write ``n`` for the coordinate along ``grad V_bg`` (across the ridge) and
``s`` along the curve, ``g = |grad V_bg|``.  In a channel of width ``Dv`` the
line profile of dispersion ``sigma_v`` gives emission
``E(s, n) = I(s, n) phi(g n + dv(s, n) - v_ch)`` where ``phi`` is the line
averaged over the channel (a Gaussian of ``sigma_v`` convolved with a boxcar
of ``Dv``, variance ``sigma_v^2 + Dv^2 / 12``).  Linearising in ``dv``, the
centroid of ``E`` across the ridge at fixed ``s`` moves by ::

    delta_E(s) = -<dv>_phi(s) / g,      <f>_phi = int f phi dn / int phi dn

i.e. the displacement field is averaged along ``grad V`` over the ridge's
intrinsic width ``w_n = sqrt(sigma_v^2 + Dv^2/12) / g``: the channel (and
the line) integrates over the iso-velocity curves of the velocities it
contains.  The beam ``B`` then smooths the channel map.  The centroid
across ``n`` of ``B * E`` is ``int B_s(s - s') delta_E(s') I(s') ds' /
int B_s I ds'``: along the ridge the displacement is averaged over the beam
profile ``B_s`` (Gaussian, the beam's sigma along the curve).  Across the
ridge the beam does not move a centroid, but a peak finder (the matched
filter of :mod:`kinkfit.trace`) weights the profile over the combined width;
the option ``beam_across`` (default on) adds the beam's sigma across the
ridge to ``w_n`` in quadrature.  Against tracing of noiseless synthetic
cubes (``tests/test_forecast.py``) both choices did equally well (fast /
traced per channel 0.55-1.45 with, 0.6-1.45 without, medians 0.95-1.0;
they differ from each other by < 15 %); the wider one is kept as the
cautious default.  So the fast estimate is
the displacement field averaged with a locally oriented 2-D Gaussian of
sigmas ::

    sigma_s = sigma_beam(along the curve)
    sigma_n = sqrt(w_n^2 + sigma_beam(across)^2)

weighted by the layer brightness ``I``.  It is linear in ``dv`` (first
order in ``delta / sigma_n``); kinks comparable to the beam are
underestimated by it (measured in the tests).

Positional uncertainty and the threshold
----------------------------------------
A ridge point's 1-sigma position error is
:func:`kinkfit.trace.position_sigma` with the noise ``peak_brightness /
peak_snr`` (the synthetic-cube definition of SNR), the convolved ridge
amplitude ``A = I phi_peak w_n / sqrt(w_n^2 + s_b^2)`` (1-D Gaussian
dilution across the ridge; ``phi_peak`` the line centred in the channel),
the convolved ridge width ``W = sqrt(w_n^2 + s_b^2)`` as both profile and
matched-filter width (the tracer's second pass) and ``s_b`` the beam sigma
across the ridge.  A kink is *detectable* when its amplitude exceeds
``threshold`` times the error of one ridge point at the kink's position
(a per-point criterion: a kink spanning several independent points is
more significant than this, so the minimum mass is conservative).

The wake is evaluated once per mass on the sky grid; every beam and channel
width then costs one sparse-matrix product per channel (the quadrature
weights do not depend on the mass).
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field

import numpy as np
from scipy import sparse

from .errors import ConfigError

__all__ = ["SkyField", "ForecastResult", "sky_field", "los_perturbation",
           "channel_points", "smoothing_operator", "ridge_position_sigma",
           "kink_amplitude", "planet_los_velocity", "minimum_mass",
           "run_forecast", "forecast_from_config", "amplitude_table",
           "minimum_mass_table", "write_forecast_tables",
           "traced_kinks", "save_forecast_products", "DEFAULT_OFFSETS_KMS", "DEFAULT_MASSES_MJUP"]

log = logging.getLogger(__name__)

FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))
#: channel offsets from the planet's velocity, km/s
DEFAULT_OFFSETS_KMS = (0.0, 0.1, 0.2, 0.4, 0.8)
#: planet masses of the sweep, Jupiter masses
DEFAULT_MASSES_MJUP = tuple(np.round(np.geomspace(0.1, 10.0, 11), 4))


@dataclass(frozen=True)
class SkyField:
    """Background disk on a regular sky grid (front emitting layer).

    Attributes
    ----------
    x_arcsec : ndarray, shape (nx,)
        East offsets of the columns, arcsec (increasing with index).
    y_arcsec : ndarray, shape (ny,)
        North offsets of the rows, arcsec (increasing).
    pixel_arcsec : float
    r_au, phi_rad, z_au : ndarray, shape (ny, nx)
        Disk coordinates of the layer (NaN off the layer).
    v_kms : ndarray, shape (ny, nx)
        Keplerian line-of-sight velocity, km/s (0 off the layer).
    gx, gy : ndarray, shape (ny, nx)
        Its gradient, km/s per arcsec east / north (0 off the layer).
    brightness : ndarray, shape (ny, nx)
        Line-peak brightness of the layer, Jy/beam (0 off the layer).
    line_sigma_kms : ndarray, shape (ny, nx)
        Line dispersion, km/s.
    inside : ndarray of bool, shape (ny, nx)
        On the emitting layer.
    """

    x_arcsec: np.ndarray
    y_arcsec: np.ndarray
    pixel_arcsec: float
    r_au: np.ndarray
    phi_rad: np.ndarray
    z_au: np.ndarray
    v_kms: np.ndarray
    gx: np.ndarray
    gy: np.ndarray
    brightness: np.ndarray
    line_sigma_kms: np.ndarray
    inside: np.ndarray

    @property
    def shape(self):
        return self.v_kms.shape


def sky_field(geom, emission, *, pixel_arcsec: float,
              extent_arcsec: float | None = None) -> SkyField:
    """Sample the front layer of a disk on a square sky grid.

    Parameters
    ----------
    geom : kinkfit.geometry.DiskGeometry
    emission : kinkfit.synth.LineEmission
    pixel_arcsec : float
        Grid step, arcsec (resolve the wake: a fraction of ``h_p r_p``).
    extent_arcsec : float, optional
        Half width of the grid, arcsec; default the projected outer radius
        (``r_max_au`` or the emission's ``r_out_au``) plus 5 %.

    Returns
    -------
    SkyField
    """
    from .geometry import sky_to_disk, los_velocity, velocity_gradient
    if not (pixel_arcsec > 0 and math.isfinite(pixel_arcsec)):
        raise ConfigError(f"forecast pixel size {pixel_arcsec!r} arcsec must "
                          "be > 0", key="pixel_arcsec", value=pixel_arcsec)
    if extent_arcsec is None:
        rmax = min(geom.r_max_au, emission.r_out_au)
        extent_arcsec = 1.05 * rmax / geom.au_per_arcsec + max(
            abs(geom.x0_arcsec), abs(geom.y0_arcsec))
    n = int(math.ceil(extent_arcsec / pixel_arcsec))
    axis = np.arange(-n, n + 1) * pixel_arcsec
    X, Y = np.meshgrid(axis, axis)
    r, phi, z = sky_to_disk(geom, X, Y, "front")
    inside = np.isfinite(r) & (r <= emission.r_out_au)
    v = np.where(inside, los_velocity(geom, r, phi, z), 0.0)
    gx, gy = velocity_gradient(geom, X, Y, "front")
    gx = np.where(inside & np.isfinite(gx), gx, 0.0)
    gy = np.where(inside & np.isfinite(gy), gy, 0.0)
    rr = np.where(inside, r, 1.0)
    bright = np.where(inside, emission.brightness_jy_beam(rr, "front"), 0.0)
    sig = np.where(inside, emission.line_sigma_kms(rr), np.nan)
    return SkyField(axis, axis.copy(), float(pixel_arcsec), r, phi, z, v, gx, gy,
                    bright, sig, inside)


def los_perturbation(field: SkyField, geom, planet, disk, damping) -> np.ndarray:
    """Line-of-sight velocity of the wake on the sky grid, km/s.

    ``a_r dv_r + a_phi dv_phi`` of :func:`kinkfit.wake.model.wake_perturbations`
    on the layer (0 off it and outside the wake disk).

    Returns
    -------
    ndarray, shape (ny, nx)
    """
    from .geometry import projection_coefficients
    from .wake.model import wake_perturbations
    out = np.zeros(field.shape)
    ok = field.inside & (field.r_au > disk.r_in_au) & (field.r_au < disk.r_out_au)
    if not np.any(ok):
        return out
    r, phi = field.r_au[ok], field.phi_rad[ok]
    dv_r, dv_phi, _ = wake_perturbations(r, phi, planet, disk, damping)
    a_r, a_phi, _ = projection_coefficients(geom, phi)
    out[ok] = a_r * dv_r + a_phi * dv_phi
    return out


def planet_los_velocity(geom, r_au: float, phi_rad: float) -> float:
    """Keplerian line-of-sight velocity of the front layer above the planet, km/s."""
    from .geometry import los_velocity, surface_point
    z = surface_point(geom, r_au, phi_rad, "front")
    return float(los_velocity(geom, r_au, phi_rad, z))


def _beam_sigma_along(beam, ux, uy):
    """Gaussian sigma (arcsec) of beam ``(bmaj, bmin, bpa_deg)`` along (ux, uy)."""
    bmaj, bmin, bpa = beam
    pa = math.radians(bpa)
    cm = ux * math.sin(pa) + uy * math.cos(pa)
    smaj, smin = bmaj / FWHM_PER_SIGMA, bmin / FWHM_PER_SIGMA
    return np.sqrt(smaj ** 2 * cm ** 2 + smin ** 2 * np.clip(1.0 - cm ** 2, 0, 1))


def channel_points(field: SkyField, v_kms: float, spacing_arcsec: float):
    """Points on the iso-velocity curve ``V_bg = v_kms``, thinned.

    Grid pixels within half a pixel of the curve are moved onto it along the
    gradient (``x - (V - v) / g u``) and thinned to one per cell of
    ``spacing_arcsec``.

    Returns
    -------
    x, y : ndarray, shape (m,)
        Points, arcsec.
    ux, uy : ndarray, shape (m,)
        Unit gradient directions.
    g : ndarray, shape (m,)
        ``|grad V_bg|``, km/s per arcsec.
    """
    g = np.hypot(field.gx, field.gy)
    pix = field.pixel_arcsec
    with np.errstate(invalid="ignore", divide="ignore"):
        dvv = field.v_kms - v_kms
        near = field.inside & (g > 0) & (
            np.abs(dvv) <= 0.5 * pix * np.maximum(np.abs(field.gx), np.abs(field.gy)))
    jj, ii = np.nonzero(near)
    if jj.size == 0:
        e = np.zeros(0)
        return e, e, e, e, e
    gg = g[jj, ii]
    ux, uy = field.gx[jj, ii] / gg, field.gy[jj, ii] / gg
    off = dvv[jj, ii] / gg
    x = field.x_arcsec[ii] - off * ux
    y = field.y_arcsec[jj] - off * uy
    cell = np.floor(np.column_stack([x, y]) / max(spacing_arcsec, 1e-12)).astype(np.int64)
    order = np.argsort(np.abs(off), kind="stable")
    _, first = np.unique(cell[order], axis=0, return_index=True)
    keep = np.sort(order[first])
    return x[keep], y[keep], ux[keep], uy[keep], gg[keep]


def _bilinear(field: SkyField, xs, ys):
    """Rows/cols/weights of bilinear interpolation at points (flattened)."""
    ny, nx = field.shape
    fc = (xs - field.x_arcsec[0]) / field.pixel_arcsec
    fr = (ys - field.y_arcsec[0]) / field.pixel_arcsec
    c0 = np.floor(fc).astype(np.int64)
    r0 = np.floor(fr).astype(np.int64)
    tc, tr = fc - c0, fr - r0
    idx, wts = [], []
    for dr, dc, w in ((0, 0, (1 - tr) * (1 - tc)), (0, 1, (1 - tr) * tc),
                      (1, 0, tr * (1 - tc)), (1, 1, tr * tc)):
        rr, cc = r0 + dr, c0 + dc
        ok = (rr >= 0) & (rr < ny) & (cc >= 0) & (cc < nx)
        idx.append(np.where(ok, rr * nx + cc, 0))
        wts.append(np.where(ok, w, 0.0))
    return np.stack(idx), np.stack(wts)


def smoothing_operator(field: SkyField, x, y, ux, uy, g, *, beam,
                       channel_width_kms: float, beam_across: bool = True,
                       nodes: int = 15, extent_sigma: float = 3.0):
    """Sparse operator averaging a sky map as an observation measures it.

    Row ``k`` holds the weights of a locally oriented 2-D Gaussian centred on
    point ``k`` (sigma ``sigma_s`` along the curve, ``sigma_n`` along the
    gradient; module docstring), times the layer brightness, normalised to
    unit sum; the quadrature is a ``nodes x nodes`` trapezoid over
    ``+-extent_sigma`` sigmas with bilinear interpolation of the map.

    Parameters
    ----------
    field : SkyField
    x, y, ux, uy, g : ndarray, shape (m,)
        Points, gradient directions, gradient magnitudes
        (:func:`channel_points`).
    beam : tuple (bmaj_arcsec, bmin_arcsec, bpa_deg)
    channel_width_kms : float
    beam_across : bool
        Add the beam's sigma across the ridge to the ridge width.
    nodes : int
        Quadrature nodes per direction (odd).
    extent_sigma : float

    Returns
    -------
    op : scipy.sparse.csr_matrix, shape (m, ny * nx)
    sigma_s, sigma_n, w_n : ndarray, shape (m,)
        Smoothing sigmas along / across the ridge and the intrinsic ridge
        width, arcsec.
    """
    m = x.size
    tx, ty = -uy, ux
    sb_s = _beam_sigma_along(beam, tx, ty)
    sb_n = _beam_sigma_along(beam, ux, uy)
    ls = _interp_map(field, field.line_sigma_kms, x, y)
    w_n = np.sqrt(ls ** 2 + channel_width_kms ** 2 / 12.0) / g
    sig_n = np.sqrt(w_n ** 2 + (sb_n ** 2 if beam_across else 0.0))
    xi = np.linspace(-extent_sigma, extent_sigma, int(nodes))
    gw = np.exp(-0.5 * xi ** 2)
    A, B = np.meshgrid(xi, xi, indexing="ij")
    W0 = np.outer(gw, gw).ravel()
    a = A.ravel()[None, :] * sb_s[:, None]
    b = B.ravel()[None, :] * sig_n[:, None]
    xs = x[:, None] + a * tx[:, None] + b * ux[:, None]
    ys = y[:, None] + a * ty[:, None] + b * uy[:, None]
    idx, wts = _bilinear(field, xs.ravel(), ys.ravel())
    bright = field.brightness.ravel()
    # weight of a node = Gaussian x brightness (interpolated)
    node_b = np.sum(wts * bright[idx], axis=0)
    node_w = np.repeat(W0[None, :], m, axis=0).ravel() * node_b
    rows = np.repeat(np.arange(m), W0.size)
    total = np.bincount(rows, weights=node_w, minlength=m)
    scale = np.where(total > 0, 1.0 / np.where(total > 0, total, 1.0), 0.0)
    vals = (wts * (node_w * scale[rows])[None, :]).ravel()
    op = sparse.csr_matrix((vals, (np.tile(rows, 4), idx.ravel())),
                           shape=(m, bright.size))
    return op, sb_s, sig_n, w_n


def _interp_map(field: SkyField, img, x, y):
    idx, wts = _bilinear(field, np.asarray(x, float), np.asarray(y, float))
    flat = np.nan_to_num(np.asarray(img, float).ravel())
    return np.sum(wts * flat[idx], axis=0)


def ridge_position_sigma(field: SkyField, x, y, ux, uy, g, *, beam,
                         channel_width_kms: float, noise_jy_beam: float):
    """1-sigma position error of a ridge point (module docstring), arcsec.

    Returns
    -------
    sigma : ndarray, shape (m,)
    amplitude : ndarray, shape (m,)
        Convolved ridge peak brightness, Jy/beam.
    """
    from .synth import channel_profile
    from .trace import position_sigma
    sb = _beam_sigma_along(beam, ux, uy)
    ls = _interp_map(field, field.line_sigma_kms, x, y)
    bright = _interp_map(field, field.brightness, x, y)
    w_n = np.sqrt(ls ** 2 + channel_width_kms ** 2 / 12.0) / g
    peak = channel_profile(0.0, ls, -0.5 * channel_width_kms, 0.5 * channel_width_kms)
    W = np.sqrt(w_n ** 2 + sb ** 2)
    amp = bright * peak * w_n / W
    with np.errstate(divide="ignore", invalid="ignore"):
        sig = position_sigma(noise_jy_beam, amp, W, W, sb)
    return np.where(amp > 0, sig, np.inf), amp


def kink_amplitude(field: SkyField, dv_stack, v_kms: float, *, beam,
                   channel_width_kms: float, noise_jy_beam: float,
                   beam_across: bool = True, nodes: int = 15,
                   smooth: bool = True):
    """Kink amplitude of one channel for a stack of wake fields.

    Parameters
    ----------
    field : SkyField
    dv_stack : ndarray, shape (nm, ny, nx)
        Line-of-sight wake velocities (one per mass), km/s.
    v_kms : float
        Channel velocity, km/s.
    beam, channel_width_kms, noise_jy_beam, beam_across, nodes
        See :func:`smoothing_operator`, :func:`ridge_position_sigma`.
    smooth : bool
        False: the intrinsic displacement ``-dv / g`` on the curve (no beam,
        no channel averaging).

    Returns
    -------
    dict
        ``amplitude_arcsec (nm,)`` largest ``|delta|`` on the curve,
        ``sigma_arcsec (nm,)`` position error at that point,
        ``x_arcsec, y_arcsec (nm,)`` where it is, ``npoints``.
    """
    nm = dv_stack.shape[0]
    fwhm = math.sqrt(beam[0] * beam[1])
    spacing = max(0.25 * fwhm, field.pixel_arcsec) if smooth else field.pixel_arcsec
    x, y, ux, uy, g = channel_points(field, v_kms, spacing)
    nan = np.full(nm, np.nan)
    if x.size == 0:
        return {"amplitude_arcsec": nan, "sigma_arcsec": nan, "x_arcsec": nan,
                "y_arcsec": nan, "npoints": 0}
    flat = dv_stack.reshape(nm, -1).T                     # (npix, nm)
    if smooth:
        op, *_ = smoothing_operator(field, x, y, ux, uy, g, beam=beam,
                                    channel_width_kms=channel_width_kms,
                                    beam_across=beam_across, nodes=nodes)
        dv = np.asarray(op @ flat)                        # (m, nm)
    else:
        idx, wts = _bilinear(field, x, y)
        dv = np.einsum("km,kmn->mn", wts, flat[idx])
    delta = -dv / g[:, None]
    k = np.argmax(np.abs(delta), axis=0)
    sig, _ = ridge_position_sigma(field, x, y, ux, uy, g, beam=beam,
                                  channel_width_kms=channel_width_kms,
                                  noise_jy_beam=noise_jy_beam)
    amp = np.abs(delta[k, np.arange(nm)])
    return {"amplitude_arcsec": amp, "sigma_arcsec": sig[k], "x_arcsec": x[k],
            "y_arcsec": y[k], "npoints": int(x.size)}


def minimum_mass(masses_mjup, ratio, threshold: float) -> float:
    """Smallest mass with ``ratio >= threshold``, log-log interpolated.

    Parameters
    ----------
    masses_mjup : ndarray, shape (nm,)
        Increasing masses.
    ratio : ndarray, shape (nm,)
        Kink amplitude over its position error.
    threshold : float

    Returns
    -------
    float
        Jupiter masses; NaN if never reached, the first mass if already
        reached there.
    """
    m = np.asarray(masses_mjup, float)
    r = np.asarray(ratio, float)
    above = np.isfinite(r) & (r >= threshold)
    if not np.any(above):
        return float("nan")
    j = int(np.argmax(above))
    if j == 0:
        return float(m[0])
    r0, r1 = r[j - 1], r[j]
    if not (np.isfinite(r0) and r0 > 0):
        return float(m[j])
    t = (math.log(threshold) - math.log(r0)) / (math.log(r1) - math.log(r0))
    return float(math.exp(math.log(m[j - 1]) + t * (math.log(m[j]) - math.log(m[j - 1]))))


@dataclass
class ForecastResult:
    """Kink amplitudes over masses, channel offsets, beams and channel widths.

    Arrays are indexed ``[beam, channel_width, offset, mass]``.
    """

    masses_mjup: np.ndarray
    offsets_kms: np.ndarray
    beams: np.ndarray                     # (nb, 3) bmaj, bmin arcsec, bpa deg
    channel_widths_kms: np.ndarray
    amplitude_arcsec: np.ndarray
    sigma_arcsec: np.ndarray
    threshold: float
    peak_snr: float
    planet_velocity_kms: float
    planet: dict = field(default_factory=dict)
    meta: dict = field(default_factory=dict)

    @property
    def beam_fwhm_arcsec(self) -> np.ndarray:
        return np.sqrt(self.beams[:, 0] * self.beams[:, 1])

    @property
    def amplitude_beams(self) -> np.ndarray:
        return self.amplitude_arcsec / self.beam_fwhm_arcsec[:, None, None, None]

    @property
    def ratio(self) -> np.ndarray:
        with np.errstate(divide="ignore", invalid="ignore"):
            return self.amplitude_arcsec / self.sigma_arcsec

    def min_mass(self) -> np.ndarray:
        """Minimum detectable mass ``[beam, channel_width, offset]``, Mjup."""
        nb, nc, no, _ = self.amplitude_arcsec.shape
        out = np.full((nb, nc, no), np.nan)
        for i in range(nb):
            for j in range(nc):
                for k in range(no):
                    out[i, j, k] = minimum_mass(self.masses_mjup, self.ratio[i, j, k],
                                                self.threshold)
        return out

    def min_mass_any(self) -> np.ndarray:
        """Minimum over channel offsets ``[beam, channel_width]``, Mjup."""
        mm = self.min_mass()
        with np.errstate(all="ignore"):
            out = np.nanmin(np.where(np.isfinite(mm), mm, np.inf), axis=2)
        return np.where(np.isfinite(out), out, np.nan)


def run_forecast(geom, emission, disk, damping, *, planet_r_au: float,
                 planet_phi_rad: float, masses_mjup=DEFAULT_MASSES_MJUP,
                 offsets_kms=DEFAULT_OFFSETS_KMS, beams=((0.1, 0.1, 0.0),),
                 channel_widths_kms=(0.2,), peak_snr: float = 20.0,
                 threshold: float = 3.0, beam_across: bool = True,
                 pixel_arcsec: float | None = None, nodes: int = 15,
                 smooth: bool = True) -> ForecastResult:
    """Kink amplitudes for a grid of masses, offsets, beams and channel widths.

    Parameters
    ----------
    geom : DiskGeometry
    emission : kinkfit.synth.LineEmission
    disk : kinkfit.wake.model.WakeDisk
    damping : kinkfit.wake.model.Damping
    planet_r_au, planet_phi_rad : float
        Planet position (disk frame).
    masses_mjup : sequence of float
    offsets_kms : sequence of float
        Channel velocities relative to the planet's line-of-sight velocity.
    beams : sequence of (bmaj_arcsec, bmin_arcsec, bpa_deg)
    channel_widths_kms : sequence of float
    peak_snr : float
        ``emission.peak_jy_beam`` over the noise rms.
    threshold : float
        Detection multiple of the ridge-point position error.
    beam_across, nodes, smooth
        See :func:`kink_amplitude`.
    pixel_arcsec : float, optional
        Sky grid step; default ``min(0.3 h_p r_p, smallest beam FWHM / 4)``
        in arcsec.

    Returns
    -------
    ForecastResult
    """
    from .wake.model import Planet
    masses = np.asarray(sorted(float(m) for m in masses_mjup))
    if masses.size == 0 or masses[0] <= 0:
        raise ConfigError("forecast masses must be > 0 Jupiter masses",
                          key="masses", value=list(masses_mjup))
    offsets = np.asarray([float(o) for o in offsets_kms])
    beams = np.asarray([tuple(map(float, b)) for b in beams], float).reshape(-1, 3)
    if np.any(beams[:, :2] <= 0) or np.any(beams[:, 1] > beams[:, 0]):
        raise ConfigError("forecast beams need 0 < minor <= major FWHM",
                          key="beams", value=beams.tolist())
    cws = np.asarray([float(c) for c in channel_widths_kms])
    if cws.size == 0 or np.any(cws <= 0):
        raise ConfigError("forecast channel widths must be > 0 km/s",
                          key="channel_widths", value=cws.tolist())
    if not (peak_snr > 0 and threshold > 0):
        raise ConfigError("peak_snr and threshold must be > 0", key="threshold",
                          value=threshold)
    if pixel_arcsec is None:
        h_arcsec = disk.aspect_p * planet_r_au / geom.au_per_arcsec
        pixel_arcsec = min(0.3 * h_arcsec, float(np.min(np.sqrt(beams[:, 0] * beams[:, 1]))) / 4)
    field_ = sky_field(geom, emission, pixel_arcsec=pixel_arcsec)
    dv = np.stack([los_perturbation(field_, geom, Planet(m, planet_r_au, planet_phi_rad),
                                    disk, damping) for m in masses])
    v_p = planet_los_velocity(geom, planet_r_au, planet_phi_rad)
    noise = emission.peak_jy_beam / peak_snr
    shape = (beams.shape[0], cws.size, offsets.size, masses.size)
    amp = np.full(shape, np.nan)
    sig = np.full(shape, np.nan)
    for i, beam in enumerate(beams):
        for j, cw in enumerate(cws):
            for k, off in enumerate(offsets):
                out = kink_amplitude(field_, dv, v_p + off, beam=tuple(beam),
                                     channel_width_kms=cw, noise_jy_beam=noise,
                                     beam_across=beam_across, nodes=nodes,
                                     smooth=smooth)
                amp[i, j, k] = out["amplitude_arcsec"]
                sig[i, j, k] = out["sigma_arcsec"]
    return ForecastResult(masses, offsets, beams, cws, amp, sig, float(threshold),
                          float(peak_snr), v_p,
                          planet={"r_au": planet_r_au, "phi_deg": math.degrees(planet_phi_rad),
                                  "damping": damping.kind, "alpha": damping.alpha,
                                  "efold_rp": damping.efold_rp},
                          meta={"pixel_arcsec": pixel_arcsec, "beam_across": beam_across,
                                "nodes": nodes, "smooth": smooth,
                                "grid_shape": list(field_.shape)})


def forecast_from_config(cfg, *, masses_mjup=DEFAULT_MASSES_MJUP,
                         offsets_kms=DEFAULT_OFFSETS_KMS, beams_arcsec=None,
                         channel_widths_kms=None, threshold: float = 3.0,
                         truth=None, **kwargs) -> ForecastResult:
    """:func:`run_forecast` for the disk and ``[synth]`` setup of a config.

    Parameters
    ----------
    cfg : KinkfitConfig
        Needs ``[synth]``; the planet position and damping are those of
        ``[synth.truth]`` (or ``truth``).
    beams_arcsec : sequence of float, optional
        Circular beam FWHMs, arcsec; default the config's elliptical beam.
    channel_widths_kms : sequence of float, optional
        Default the config's channel width.
    """
    from . import scenario
    s = scenario._need_synth(cfg)
    truth = s.truth if truth is None else truth
    if truth is None:
        raise ConfigError("forecast needs a planet position: add [synth.truth]",
                          file=cfg.path, key="synth.truth")
    if beams_arcsec is None:
        beams = [(s.beam_major_arcsec, s.beam_minor_arcsec, s.beam_pa_deg)]
    else:
        beams = [(float(b), float(b), 0.0) for b in beams_arcsec]
    cws = [s.channel_width_kms] if channel_widths_kms is None else list(channel_widths_kms)
    disk = scenario.wake_disk(cfg)
    damping = scenario.damping_of(truth.damping, truth.alpha, truth.efold)
    res = run_forecast(cfg.geometry(), scenario.line_emission(cfg), disk, damping,
                       planet_r_au=truth.radius_au,
                       planet_phi_rad=math.radians(truth.azimuth_deg),
                       masses_mjup=masses_mjup, offsets_kms=offsets_kms, beams=beams,
                       channel_widths_kms=cws, peak_snr=s.peak_snr,
                       threshold=threshold, **kwargs)
    res.meta["title"] = cfg.title
    return res


# ------------------------------------------------------------------ tables ---
def amplitude_table(res: ForecastResult, beam_index: int = 0, cw_index: int = 0):
    """Kink amplitude per mass and channel offset (one beam, one width).

    Returns
    -------
    astropy.table.Table
        Columns ``mass`` (Mjup), then per offset ``amp_<o>`` (arcsec),
        ``beams_<o>`` (beam FWHM) and ``ratio_<o>`` (amplitude / position
        error).
    """
    from astropy import units as u
    from astropy.table import Table
    t = Table()
    t["mass"] = res.masses_mjup * u.M_jup
    for k, off in enumerate(res.offsets_kms):
        tag = f"{off:+.3g}"
        t[f"amp_{tag}"] = res.amplitude_arcsec[beam_index, cw_index, k] * u.arcsec
        t[f"beams_{tag}"] = res.amplitude_beams[beam_index, cw_index, k]
        t[f"ratio_{tag}"] = res.ratio[beam_index, cw_index, k]
        for c in (f"amp_{tag}", f"beams_{tag}", f"ratio_{tag}"):
            t[c].format = ".4g"
    b = res.beams[beam_index]
    t.meta.update({"beam_arcsec": [float(b[0]), float(b[1])], "beam_pa_deg": float(b[2]),
                   "channel_width_kms": float(res.channel_widths_kms[cw_index]),
                   "peak_snr": res.peak_snr, "threshold": res.threshold,
                   "planet_velocity_kms": res.planet_velocity_kms,
                   "note": "offsets are channel velocity minus the planet's "
                           "line-of-sight velocity, km/s"})
    return t


def minimum_mass_table(res: ForecastResult):
    """Minimum detectable mass per beam and channel width (best offset)."""
    from astropy import units as u
    from astropy.table import Table
    mm = res.min_mass()
    best = res.min_mass_any()
    rows = []
    for i, b in enumerate(res.beams):
        for j, cw in enumerate(res.channel_widths_kms):
            rows.append((b[0], b[1], cw, best[i, j], *mm[i, j]))
    names = ["beam_major", "beam_minor", "channel_width", "min_mass"] + [
        f"min_mass_{o:+.3g}" for o in res.offsets_kms]
    t = Table(rows=rows, names=names)
    t["beam_major"].unit = u.arcsec
    t["beam_minor"].unit = u.arcsec
    t["channel_width"].unit = u.km / u.s
    for n in names[3:]:
        t[n].unit = u.M_jup
        t[n].format = ".3g"
    t.meta.update({"threshold": res.threshold, "peak_snr": res.peak_snr,
                   "masses_mjup": [float(m) for m in res.masses_mjup],
                   "note": "min_mass: smallest swept mass whose kink exceeds "
                           "threshold x the position error of a ridge point "
                           "(NaN: none in the swept range); conditional on "
                           "the wake model and its damping assumption"})
    return t


def _markdown(t) -> str:
    def cell(v, col):
        fmt = t[col].format
        if isinstance(v, (float, np.floating)):
            return "nan" if not np.isfinite(v) else (format(v, fmt.lstrip("{:").rstrip("}"))
                                                     if fmt else f"{v:.4g}")
        return str(v)
    heads = [f"{c} [{t[c].unit}]" if t[c].unit else c for c in t.colnames]
    lines = ["| " + " | ".join(heads) + " |", "|" + "---|" * len(heads)]
    for row in t:
        lines.append("| " + " | ".join(cell(row[c], c) for c in t.colnames) + " |")
    note = t.meta.get("note")
    caution = ("Kinks can also come from other processes (instabilities, winds, "
               "warps, surface asymmetries); these forecasts assume the kink is a "
               "planet wake of the stated damping.")
    return "\n".join(lines) + "\n" + (f"\n{note}.\n" if note else "") + f"\n{caution}\n"


def write_forecast_tables(res: ForecastResult, folder) -> list:
    """Write ``forecast_amplitude`` and ``forecast_min_mass`` as ECSV, CSV, Markdown.

    The amplitude table is written for the first beam and channel width.

    Returns
    -------
    list of pathlib.Path
    """
    from pathlib import Path
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    out = []
    for stem, t in (("forecast_amplitude", amplitude_table(res)),
                    ("forecast_min_mass", minimum_mass_table(res))):
        for ext, fmt in (("ecsv", "ascii.ecsv"), ("csv", "ascii.csv")):
            p = folder / f"{stem}.{ext}"
            t.write(p, format=fmt, overwrite=True)
            out.append(p)
        p = folder / f"{stem}.md"
        p.write_text(_markdown(t), encoding="utf-8")
        out.append(p)
    return out


# -------------------------------------------------------------- validation ---
def traced_kinks(geom, setup, emission, perturbation, *, min_snr: float = 3.0,
                 points_per_beam: float = 2.0):
    """Kink amplitudes measured by tracing noiseless synthetic cubes.

    Two cubes are made with :func:`kinkfit.synth.make_cube` (no noise), with
    and without the perturbation.  The unperturbed cube is traced
    (:func:`kinkfit.trace.trace_ridges`, front layer, true geometry); both
    cubes are then traced again at exactly those cuts, so the difference of
    the peak positions along each cut is the displacement caused by the
    wake, free of the beam-smearing bias both cubes share.

    Parameters
    ----------
    geom, setup, emission
        The observation (:mod:`kinkfit.synth`).
    perturbation : callable
        ``f(r_au, phi_rad, z_au) -> (dv_r, dv_phi, dv_z)``, km/s.
    min_snr, points_per_beam : float
        Tracing settings.

    Returns
    -------
    dict
        ``velocity_kms (nchan,)``, ``amplitude_arcsec (nchan,)`` largest
        ``|displacement|`` per channel (NaN: nothing traced),
        ``x_arcsec, y_arcsec (nchan,)`` where, ``displacement`` per point and
        the point ``channel``.
    """
    from .config import TraceSettings
    from .cube import Cube
    from .synth import make_cube
    from .trace import trace_ridges
    settings = TraceSettings(("front",), float(min_snr), float(points_per_beam), False)
    noise = emission.peak_jy_beam / setup.peak_snr

    def as_cube(data, vel):
        n = setup.npix
        x = -(np.arange(n) - n // 2) * setup.pixel_arcsec
        y = (np.arange(n) - n // 2) * setup.pixel_arcsec
        k = vel.size
        return Cube(data=data, velocity_kms=vel, x_arcsec=x, y_arcsec=y,
                    pixel_arcsec=setup.pixel_arcsec,
                    beam_major_arcsec=np.full(k, setup.beam_major_arcsec),
                    beam_minor_arcsec=np.full(k, setup.beam_minor_arcsec),
                    beam_pa_deg=np.full(k, setup.beam_pa_deg),
                    noise_per_channel=np.full(k, noise), noise=noise,
                    bunit="Jy/beam", bunit_raw="Jy/beam",
                    rest_frequency_hz=setup.rest_frequency_hz,
                    channel_width_kms=setup.channel_width_kms,
                    centre_ra_deg=setup.ra_deg, centre_dec_deg=setup.dec_deg)

    base, vel = make_cube(geom, setup, emission, noise=False)
    pert, _ = make_cube(geom, setup, emission, perturbation=perturbation, noise=False)
    c0, c1 = as_cube(base, vel), as_cube(pert, vel)
    ridges = trace_ridges(c0, geom, settings)
    log.info("validation trace: %d points, rejected %s", len(ridges), ridges.meta["rejected"])
    cuts = ridges.cuts(with_peaks=False)
    r0 = trace_ridges(c0, geom, settings, cuts=cuts)
    r1 = trace_ridges(c1, geom, settings, cuts=cuts)
    i0 = {int(i): j for j, i in enumerate(r0.meta["index"])}
    pairs = [(i0[int(i)], j) for j, i in enumerate(r1.meta["index"]) if int(i) in i0]
    a = np.array([p[0] for p in pairs], dtype=int)
    b = np.array([p[1] for p in pairs], dtype=int)
    disp = ((r1.x_arcsec[b] - r0.x_arcsec[a]) * r0.dir_x[a]
            + (r1.y_arcsec[b] - r0.y_arcsec[a]) * r0.dir_y[a])
    chan = r0.channel[a]
    amp = np.full(vel.size, np.nan)
    xs = np.full(vel.size, np.nan)
    ys = np.full(vel.size, np.nan)
    for k in range(vel.size):
        m = chan == k
        if np.any(m):
            j = np.argmax(np.abs(disp[m]))
            amp[k] = abs(disp[m][j])
            xs[k] = r0.x_arcsec[a][m][j]
            ys[k] = r0.y_arcsec[a][m][j]
    return {"velocity_kms": vel, "amplitude_arcsec": amp, "x_arcsec": xs,
            "y_arcsec": ys, "displacement": disp, "channel": chan}


def save_forecast_products(res: ForecastResult, folder) -> list:
    """Tables (:func:`write_forecast_tables`) and figures of a forecast.

    Figures: ``forecast_amplitude.png`` (arcsec), ``forecast_amplitude_beams.png``
    (beam FWHM), ``forecast_min_mass.png``.

    Returns
    -------
    list of pathlib.Path
    """
    from pathlib import Path
    from .plots.forecast import amplitude_figure, minimum_mass_figure
    folder = Path(folder)
    out = write_forecast_tables(res, folder)
    for name, fig in (("forecast_amplitude.png", amplitude_figure(res)),
                      ("forecast_amplitude_beams.png", amplitude_figure(res, in_beams=True)),
                      ("forecast_min_mass.png", minimum_mass_figure(res))):
        fig.savefig(folder / name, dpi=110)
        out.append(folder / name)
    return out
