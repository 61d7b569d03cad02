"""Deviations of traced ridges from the background disk (the kinks).

For a point traced at ``x_i`` in channel ``v_i`` the signed distance from the
background iso-velocity curve ``V_bg = v_i``, measured along ``grad V_bg``
(positive where ``V_bg > v_i``), is to first order
``d_i = (V_bg(x_i) - v_i) / |grad V_bg|`` (PHYSICS.md section 7).  Where
``|d_i|`` exceeds ``newton_threshold`` beams, the foot of the perpendicular on
the curve is found by Newton steps along the gradient,
``f <- f - (V_bg(f) - v) grad V / |grad V|^2``, alternated with slides along
the curve's tangent, and the geometric distance ``|x_i - f|`` is recorded as
``distance_arcsec``.  ``offset_arcsec`` stays the first-order value, which
is what the planet model predicts exactly (see :func:`measure_deviations`).

A planet (or any velocity perturbation) seen with line-of-sight excess
``dv_los = a_r dv_r + a_phi dv_phi`` shifts the emission to where
``V_bg + dv_los = v``, i.e. by ``offset = -dv_los / |grad V_bg|``
(``DEVELOPERS.md``).

Beam smearing moves traced ridges off the true curves even without a
planet (curvature of the ridge within the beam, brightness gradients across
it, blending with the other surface).  :func:`estimate_smearing_bias`
measures this by tracing a noise-free model cube of the background disk
with the same beam, channels, pixel grid, cuts, filter widths and windows as
the data; the model's offsets are the bias, subtracted point by point.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field, replace

import numpy as np

from .errors import KinkfitError

__all__ = ["Deviations", "measure_deviations", "keep_measurable", "SmearingBias",
           "estimate_smearing_bias", "estimate_emission", "model_cube",
           "signed_offsets"]

log = logging.getLogger(__name__)

_SURF = {0: "front", 1: "back"}

_DEV_FIELDS = ("r_au", "phi_rad", "z_au", "a_r", "a_phi",
               "grad_kms_per_arcsec", "offset_arcsec", "offset_raw_arcsec",
               "bias_arcsec", "sigma_arcsec", "distance_arcsec")


def _ro(a):
    a = np.array(a, dtype=float, copy=True)
    a.setflags(write=False)
    return a


@dataclass(frozen=True)
class Deviations:
    """Ridge points measured against the background disk (arrays shape (n,)).

    Attributes
    ----------
    ridges : kinkfit.trace.Ridges
        The traced points (positions, channel, velocity, surface, snr...).
    r_au, phi_rad, z_au : ndarray
        Disk position of each point on its surface (``sky_to_disk``).
    a_r, a_phi : ndarray
        Projection coefficients, ``dv_los = a_r dv_r + a_phi dv_phi``.
    grad_kms_per_arcsec : ndarray
        ``|grad V_bg|`` at the point, km/s per arcsec.
    offset_arcsec : ndarray
        Signed distance from the background iso-velocity curve along
        ``grad V_bg``, minus the beam-smearing bias, arcsec.
    offset_raw_arcsec : ndarray
        The same before the bias correction.
    bias_arcsec : ndarray
        Subtracted bias (0 where none was applied).
    sigma_arcsec : ndarray
        1-sigma error of the offset, arcsec.
    distance_arcsec : ndarray
        Geometric signed distance from the curve (Newton-refined where the
        first-order offset exceeds ``newton_threshold_beams``), minus the
        bias; equals ``offset_arcsec`` to first order.
    meta : dict
    """

    ridges: object
    r_au: np.ndarray
    phi_rad: np.ndarray
    z_au: np.ndarray
    a_r: np.ndarray
    a_phi: np.ndarray
    grad_kms_per_arcsec: np.ndarray
    offset_arcsec: np.ndarray
    offset_raw_arcsec: np.ndarray
    bias_arcsec: np.ndarray
    sigma_arcsec: np.ndarray
    distance_arcsec: np.ndarray = None
    meta: dict = field(default_factory=dict, compare=False)

    def __post_init__(self):
        n = len(self.ridges)
        if self.distance_arcsec is None:
            object.__setattr__(self, "distance_arcsec", self.offset_arcsec)
        for name in _DEV_FIELDS:
            a = _ro(getattr(self, name))
            if a.shape != (n,):
                raise ValueError(f"Deviations.{name} has shape {a.shape}, "
                                 f"expected ({n},)")
            object.__setattr__(self, name, a)

    def __len__(self) -> int:
        return len(self.ridges)

    # pass-through of the ridge data, as the contract lists them
    def __getattr__(self, name):
        if name in ("x_arcsec", "y_arcsec", "channel", "velocity_kms",
                    "surface", "snr"):
            return getattr(self.ridges, name)
        raise AttributeError(name)

    @property
    def grad_v_kms_per_arcsec(self):
        """Alias of :attr:`grad_kms_per_arcsec` (DEVELOPERS.md name)."""
        return self.grad_kms_per_arcsec

    @property
    def offset_beams(self) -> np.ndarray:
        """Offset in units of the channel's beam FWHM."""
        return self.offset_arcsec / self.ridges.beam_fwhm_arcsec

    def select(self, mask) -> "Deviations":
        """Subset by boolean mask or index array."""
        return Deviations(self.ridges.select(mask),
                          **{k: getattr(self, k)[mask] for k in _DEV_FIELDS},
                          meta=dict(self.meta))

    def as_dict(self) -> dict:
        """Per-point arrays: ridge data plus the deviation columns."""
        out = self.ridges.as_dict()
        out.update({k: np.asarray(getattr(self, k)) for k in _DEV_FIELDS})
        return out

    @classmethod
    def from_dict(cls, arrays: dict, meta=None) -> "Deviations":
        from .trace import Ridges
        return cls(Ridges.from_dict(arrays),
                   **{k: np.asarray(arrays[k]) for k in _DEV_FIELDS
                      if k in arrays},
                   meta=dict(meta or {}))


def _geometry_of(fit_or_geom):
    return getattr(fit_or_geom, "geometry", fit_or_geom)


def signed_offsets(geom, x, y, v, surface, *, newton_threshold_arcsec=None,
                   newton_steps: int = 4):
    """Signed distance of points from the iso-velocity curves ``V_bg = v``.

    Parameters
    ----------
    geom : kinkfit.geometry.DiskGeometry
    x, y : ndarray, shape (n,)
        Sky positions, arcsec.
    v : ndarray, shape (n,)
        Channel velocities, km/s.
    surface : ndarray of int, shape (n,)
        0 front / 1 back.
    newton_threshold_arcsec : float or ndarray, optional
        Refine by Newton steps where the first-order offset exceeds this
        (default: never).
    newton_steps : int

    Returns
    -------
    offset_arcsec : ndarray
        Positive along ``grad V_bg``.
    grad : ndarray
        ``|grad V_bg|`` at the points, km/s per arcsec.
    """
    from .geometry import background_velocity, velocity_gradient
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    v = np.asarray(v, float)
    surface = np.asarray(surface)
    off = np.full(x.shape, np.nan)
    grad = np.full(x.shape, np.nan)
    for code, name in _SURF.items():
        m = surface == code
        if not np.any(m):
            continue
        V = background_velocity(geom, x[m], y[m], name)
        gx, gy = velocity_gradient(geom, x[m], y[m], name)
        g = np.hypot(gx, gy)
        d = (V - v[m]) / g
        if newton_threshold_arcsec is not None:
            thr = np.broadcast_to(np.asarray(newton_threshold_arcsec, float),
                                  x.shape)[m]
            big = np.flatnonzero(np.abs(d) > thr)
            if big.size:
                px, py = x[m][big], y[m][big]
                vv = v[m][big]
                fx, fy = px.copy(), py.copy()

                def onto_curve(fx, fy):
                    for _ in range(int(newton_steps)):
                        Vf = background_velocity(geom, fx, fy, name)
                        gfx, gfy = velocity_gradient(geom, fx, fy, name)
                        step = (Vf - vv) / (gfx ** 2 + gfy ** 2)
                        ok = np.isfinite(step)
                        fx = np.where(ok, fx - step * gfx, fx)
                        fy = np.where(ok, fy - step * gfy, fy)
                    return fx, fy, gfx, gfy

                # Newton onto the curve, then slide along its tangent to the
                # foot of the perpendicular and return onto the curve
                fx, fy, gfx, gfy = onto_curve(fx, fy)
                for _ in range(3):
                    gn = np.hypot(gfx, gfy)
                    tx, ty = -gfy / gn, gfx / gn
                    along = (px - fx) * tx + (py - fy) * ty
                    along = np.where(np.isfinite(along), along, 0.0)
                    fx, fy, gfx, gfy = onto_curve(fx + along * tx, fy + along * ty)
                dist = np.hypot(px - fx, py - fy)
                refined = np.sign(d[big]) * dist
                dd = d.copy()
                dd[big] = np.where(np.isfinite(refined), refined, d[big])
                d = dd
        off[m] = d
        grad[m] = g
    return off, grad


def measure_deviations(ridges, fit_or_geom, *, bias=None,
                       newton_threshold_beams: float = 0.3) -> Deviations:
    """Offsets of the traced points from the background disk.

    ``offset_arcsec`` is the first-order offset ``(V_bg(x_i) - v_i) /
    |grad V_bg(x_i)|`` minus the bias.  This is the quantity the planet
    model predicts exactly: a perturbation moves the emission to where
    ``V_bg + dv_los = v``, so at the traced point ``(V_bg - v) / |grad V| =
    -dv_los / |grad V|`` holds without a small-offset approximation.  The
    Newton-refined geometric distance to the curve (where the first-order
    value exceeds ``newton_threshold_beams``) is kept as
    ``distance_arcsec`` for display and diagnostics.

    Parameters
    ----------
    ridges : kinkfit.trace.Ridges
    fit_or_geom : kinkfit.diskfit.BackgroundFit or kinkfit.geometry.DiskGeometry
        The background disk.
    bias : SmearingBias or ndarray, shape (n,), optional
        Beam-smearing bias of each point, arcsec along the gradient;
        subtracted.  A :class:`SmearingBias` must have been estimated for
        these ridges.
    newton_threshold_beams : float
        First-order offsets larger than this (beam FWHM) get a refined
        ``distance_arcsec``.

    Returns
    -------
    Deviations
    """
    from .geometry import projection_coefficients, sky_to_disk
    geom = _geometry_of(fit_or_geom)
    n = len(ridges)
    x, y = ridges.x_arcsec, ridges.y_arcsec
    off, grad = signed_offsets(geom, x, y, ridges.velocity_kms, ridges.surface)
    dist, _ = signed_offsets(
        geom, x, y, ridges.velocity_kms, ridges.surface,
        newton_threshold_arcsec=newton_threshold_beams * ridges.beam_fwhm_arcsec)
    r = np.full(n, np.nan)
    phi = np.full(n, np.nan)
    z = np.full(n, np.nan)
    for code, name in _SURF.items():
        m = ridges.surface == code
        if np.any(m):
            r[m], phi[m], z[m] = sky_to_disk(geom, x[m], y[m], name)
    a_r, a_phi, _ = projection_coefficients(geom, phi)
    if bias is None:
        b = np.zeros(n)
    else:
        b = np.asarray(getattr(bias, "offset_arcsec", bias), float)
        if b.shape != (n,):
            raise KinkfitError(f"bias has {b.size} entries for {n} ridge points")
        b = np.nan_to_num(b)
    meta = {"newton_threshold_beams": newton_threshold_beams,
            "debiased": bias is not None}
    if bias is not None and hasattr(bias, "meta"):
        meta["bias"] = dict(bias.meta)
    return Deviations(ridges, r, phi, z, a_r, a_phi, grad, off - b, off, b,
                      ridges.sigma_arcsec, dist - b, meta=meta)


def keep_measurable(dev: Deviations) -> tuple[Deviations, np.ndarray]:
    """Drop the points the background disk cannot place (logged).

    A point traced at one geometry can fall outside the fitted one: off a
    steep or strongly flared emitting surface no disk radius projects onto
    it (``r_au``/``phi_rad`` NaN), or its velocity gradient vanishes.  Such
    points carry no kink measurement and are removed, with a warning that
    counts them.

    Parameters
    ----------
    dev : Deviations

    Returns
    -------
    kept : Deviations
        The measurable points (``dev`` itself when all are).
    mask : ndarray of bool, shape (n,)
        Which of ``dev``'s points were kept.
    """
    mask = np.ones(len(dev), bool)
    for name in ("r_au", "phi_rad", "a_r", "a_phi", "grad_kms_per_arcsec",
                 "offset_arcsec", "sigma_arcsec"):
        mask &= np.isfinite(getattr(dev, name))
    mask &= np.asarray(dev.grad_kms_per_arcsec) > 0
    if mask.all():
        return dev, mask
    log.warning("%d of %d traced points cannot be placed on the fitted "
                "background disk (no deprojected radius or velocity "
                "gradient) and are dropped", int((~mask).sum()), mask.size)
    return dev.select(mask), mask


# ---------------------------------------------------------------------------
# beam-smearing bias
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class SmearingBias:
    """Per-point beam-smearing bias (arcsec along the gradient).

    Attributes
    ----------
    offset_arcsec : ndarray, shape (n,)
        Offset of the noise-free model's ridge at each data point's cut.
    measured : ndarray of bool, shape (n,)
        True where the model was traced at the point's own cut; False where
        the value was interpolated from neighbouring points of the same
        channel and surface (or set to 0 when there were none).
    emission : kinkfit.synth.LineEmission
        Emission profile of the model cube.
    meta : dict
    """

    offset_arcsec: np.ndarray
    measured: np.ndarray
    emission: object = None
    meta: dict = field(default_factory=dict, compare=False)


def estimate_emission(ridges, geom, cube=None):
    """Brightness and line width of the emitting layers, from traced points.

    A documented, deliberately simple estimate (the bias depends on the
    shape of the profiles, not on their scale):

    * front brightness ``ln A = a - gamma ln r - r^2 / r_char^2`` fitted by
      linear least squares to the traced ridge amplitudes ``A_i`` (front
      points), with ``gamma`` clipped to [0, 3];
    * back / front ratio: median of ``A_back / A_front(r)``, clipped to
      [0, 1];
    * line dispersion from the ridge widths:
      ``sigma_v^2 = median((w^2 - s_b^2) g^2) - dv^2 / 12`` (``w`` ridge
      width, ``s_b`` beam sigma along the cut, ``g`` gradient, ``dv``
      channel width), at least 0.02 km/s, taken radius-independent (put in
      ``v_turb_kms`` with a negligible thermal part).

    Parameters
    ----------
    ridges : kinkfit.trace.Ridges
    geom : kinkfit.geometry.DiskGeometry
    cube : kinkfit.cube.Cube, optional
        For the channel width (default: median spacing of the ridge
        velocities).

    Returns
    -------
    kinkfit.synth.LineEmission
    """
    from .synth import LineEmission
    from .geometry import sky_to_disk
    amp = np.asarray(ridges.amplitude, float)
    r = np.full(len(ridges), np.nan)
    for code, name in _SURF.items():
        m = ridges.surface == code
        if np.any(m):
            r[m] = sky_to_disk(geom, ridges.x_arcsec[m], ridges.y_arcsec[m], name)[0]
    front = (ridges.surface == 0) & np.isfinite(r) & (amp > 0) & (r > 0)
    peak, gamma, r_char = (float(np.nanmax(amp)) if amp.size else 1.0), 0.0, 1e6
    if np.sum(front) >= 5:
        A = np.column_stack([np.ones(front.sum()), -np.log(r[front]), -r[front] ** 2])
        coef, *_ = np.linalg.lstsq(A, np.log(amp[front]), rcond=None)
        gamma = float(np.clip(coef[1], 0.0, 3.0))
        inv = max(float(coef[2]), 1e-12)
        r_char = float(min(1.0 / math.sqrt(inv), 1e6))
        peak = float(np.exp(coef[0]))
    r_core = max(1.0, float(geom.r_min_au))

    def fprof(rr):
        return (np.minimum(1.0, (rr / r_core) ** (-gamma))
                * np.exp(-(rr / r_char) ** 2))

    back = (ridges.surface == 1) & np.isfinite(r) & (amp > 0)
    ratio = 0.5
    if np.sum(back) >= 3 and np.sum(front) >= 5:
        scale = np.median(amp[front] / fprof(r[front]))
        ratio = float(np.clip(np.median(amp[back] / (scale * fprof(r[back]))), 0.0, 1.0))
    # line width from the ridge widths
    from .diskfit import _gradient
    g = _gradient(geom, ridges.x_arcsec, ridges.y_arcsec, ridges.surface)
    if cube is not None:
        dv = float(cube.channel_width_kms)
    else:
        vv = np.unique(ridges.velocity_kms)
        dv = float(np.median(np.diff(vv))) if vv.size > 1 else 0.1
    sv2 = (ridges.width_arcsec ** 2 - ridges.beam_sigma_cut_arcsec ** 2) * g ** 2
    sv2 = sv2[np.isfinite(sv2)]
    sig_v = 0.1
    if sv2.size:
        sig_v = float(math.sqrt(max(np.median(sv2) - dv ** 2 / 12.0, 0.02 ** 2)))
    r_out = float(geom.r_max_au) if math.isfinite(geom.r_max_au) else float(
        np.nanmax(r) * 1.05 if np.any(np.isfinite(r)) else 1e4)
    return LineEmission(peak_jy_beam=max(peak, 1e-30), r_char_au=r_char,
                        gamma=gamma, r_core_au=r_core, r_out_au=r_out,
                        back_ratio=ratio, t_ref_k=1e-3, v_turb_kms=sig_v)


def model_cube(cube, geom, emission, *, oversample: int = 3):
    """Noise-free background-disk cube on the data's grid, channels and beams.

    The model is made by :func:`kinkfit.synth.make_cube` on a square grid
    whose pixels coincide with the cube's (the disk centre is shifted by the
    grid offset), each channel convolved with its own beam.

    Parameters
    ----------
    cube : kinkfit.cube.Cube
    geom : kinkfit.geometry.DiskGeometry
    emission : kinkfit.synth.LineEmission
    oversample : int

    Returns
    -------
    kinkfit.cube.Cube
        Same grid and metadata as ``cube``; ``data`` replaced.
    """
    from scipy.signal import fftconvolve
    from .synth import ObservingSetup, beam_kernel, make_cube, sky_grid
    import dataclasses
    p = float(cube.pixel_arcsec)
    x = np.asarray(cube.x_arcsec, float)
    y = np.asarray(cube.y_arcsec, float)
    flip_x = x.size > 1 and x[1] > x[0]
    flip_y = y.size > 1 and y[1] < y[0]
    xs = x[::-1] if flip_x else x
    ys = y[::-1] if flip_y else y
    n = int(max(x.size, y.size))
    vel = np.asarray(cube.velocity_kms, float)
    nchan = vel.size
    dv = float(cube.channel_width_kms)
    ascending_v = nchan < 2 or vel[-1] > vel[0]
    base = ObservingSetup(npix=n, pixel_arcsec=p, nchan=nchan,
                          channel_width_kms=dv,
                          velocity_centre_kms=float(0.5 * (vel[0] + vel[-1])),
                          beam_major_arcsec=float(cube.beam_major_arcsec[0]),
                          beam_minor_arcsec=float(cube.beam_minor_arcsec[0]),
                          beam_pa_deg=float(cube.beam_pa_deg[0]),
                          frequency_ascending=not ascending_v,
                          oversample=int(oversample))
    from .synth import channel_velocities
    vmod = channel_velocities(base, geom)
    if not np.allclose(vmod, vel, atol=1e-3 * dv):
        raise KinkfitError("channels are not evenly spaced; the beam-smearing "
                           "model needs a regular spectral axis",
                           file=cube.provenance.get("path"))
    gx, gy = sky_grid(base)
    shift_x = xs[0] - gx[0]
    shift_y = ys[0] - gy[0]
    gshift = replace(geom, x0_arcsec=geom.x0_arcsec - shift_x,
                     y0_arcsec=geom.y0_arcsec - shift_y)
    raw, _ = make_cube(gshift, base, emission, noise=False, convolve=False)
    out = np.empty((nchan, y.size, x.size))
    kern_cache = {}
    for k in range(nchan):
        key = (float(cube.beam_major_arcsec[k]), float(cube.beam_minor_arcsec[k]),
               float(cube.beam_pa_deg[k]))
        if key not in kern_cache:
            s = ObservingSetup(npix=n, pixel_arcsec=p, nchan=1,
                               channel_width_kms=dv, beam_major_arcsec=key[0],
                               beam_minor_arcsec=key[1], beam_pa_deg=key[2])
            kern_cache[key] = beam_kernel(s)
        img = fftconvolve(raw[k], kern_cache[key], mode="same")[:ys.size, :xs.size]
        if flip_y:
            img = img[::-1]
        if flip_x:
            img = img[:, ::-1]
        out[k] = img
    return dataclasses.replace(cube, data=out)



def _brightness_correction(ridges, traced, idx, geom, emission):
    """Update gamma, r_char and back_ratio from data / model amplitudes.

    ``ln(A_data / A_model) = c - d_gamma ln r - d_inv r^2`` (front points,
    linear least squares) and the median back-to-front ratio of
    ``A_data / A_model``.
    """
    from .geometry import sky_to_disk
    a_d = ridges.amplitude[idx]
    a_m = traced.amplitude
    surf = ridges.surface[idx]
    r = np.full(idx.size, np.nan)
    for code, name in _SURF.items():
        m = surf == code
        if np.any(m):
            r[m] = sky_to_disk(geom, ridges.x_arcsec[idx][m],
                               ridges.y_arcsec[idx][m], name)[0]
    with np.errstate(divide="ignore", invalid="ignore"):
        q = np.log(a_d / a_m)
    out = {}
    f = (surf == 0) & np.isfinite(q) & np.isfinite(r) & (r > 0)
    if np.sum(f) >= 20:
        A = np.column_stack([np.ones(f.sum()), -np.log(r[f]), -r[f] ** 2])
        coef, *_ = np.linalg.lstsq(A, q[f], rcond=None)
        gamma = float(np.clip(emission.gamma + coef[1], 0.0, 3.0))
        inv = float(emission.r_char_au) ** -2 + float(coef[2])
        r_char = float(min(1.0 / math.sqrt(inv), 1e6)) if inv > 1e-12 else 1e6
        out.update(gamma=gamma, r_char_au=r_char)
        b = (surf == 1) & np.isfinite(q)
        if np.sum(b) >= 10:
            rb = float(np.exp(np.median(q[b]) - np.median(q[f])))
            out["back_ratio"] = float(np.clip(emission.back_ratio * rb, 0.0, 1.0))
    return out


def estimate_smearing_bias(cube, ridges, fit_or_geom, settings, *,
                           emission=None, model=None, trace_kw=None,
                           width_iterations: int = 2,
                           match_brightness: bool = True) -> SmearingBias:
    """Beam-smearing bias of each traced point, from a noise-free model.

    A noise-free cube of the background disk (``fit_or_geom``) is made on
    the data's pixel grid, channels and beams (:func:`model_cube`, emission
    from :func:`estimate_emission` unless given) and traced at exactly the
    data's cuts, with the same filter widths and windows, taking the local
    maximum nearest to the data's peak (so a point that locked onto a
    blended neighbour gets the bias of that blend).  The model's
    offsets from its own iso-velocity curves would be zero without beam
    smearing; they are the bias.  Points whose model cut fails get the
    inverse-distance mean of the three nearest measured points of the same
    channel and surface within 2 beams (else 0); ``measured`` flags them.

    Parameters
    ----------
    cube : kinkfit.cube.Cube
    ridges : kinkfit.trace.Ridges
    fit_or_geom : BackgroundFit or DiskGeometry
    settings : kinkfit.config.TraceSettings
    emission : kinkfit.synth.LineEmission, optional
    model : kinkfit.cube.Cube, optional
        A ready noise-free model cube (skips :func:`model_cube`).
    trace_kw : dict, optional
        Extra keywords of :func:`kinkfit.trace.trace_ridges`.
    width_iterations : int
        When the emission is estimated, the model's line width is corrected
        this many times by matching the median ridge width of model and data
        (``sigma_v^2 += median((w_data^2 - w_model^2) g^2)``), one model
        cube per iteration.
    match_brightness : bool
        In the same iterations, also correct the brightness profile
        (``gamma``, ``r_char``) and the back/front ratio so that the model's
        ridge amplitudes match the data's (log-ratio fitted by linear least
        squares in ``ln r`` and ``r^2``).

    Returns
    -------
    SmearingBias
    """
    from .trace import trace_ridges
    geom = _geometry_of(fit_or_geom)
    n = len(ridges)
    if n == 0:
        return SmearingBias(np.zeros(0), np.zeros(0, bool), emission)
    refine = emission is None and model is None
    if refine:
        emission = estimate_emission(ridges, geom, cube)
    cuts = ridges.cuts()
    # noise-free: no SNR or precision cut
    quiet = replace(settings, min_snr=0.0) if hasattr(settings, "__dataclass_fields__") \
        else settings
    kw = dict(trace_kw or {})
    kw["max_sigma_beams"] = np.inf
    widths = []
    for it in range(width_iterations + 1 if refine else 1):
        mod = model if model is not None else model_cube(cube, geom, emission)
        traced = trace_ridges(mod, geom, quiet, cuts=cuts, **kw)
        idx = np.asarray(traced.meta.get("index", np.zeros(0, int)), int)
        if not refine or it == width_iterations or idx.size < 5:
            break
        # match the model's ridge widths to the data's: adjust sigma_v
        from .diskfit import _gradient
        g = _gradient(geom, ridges.x_arcsec[idx], ridges.y_arcsec[idx],
                      ridges.surface[idx])
        dw2 = (ridges.width_arcsec[idx] ** 2 - traced.width_arcsec ** 2) * g ** 2
        dw2 = dw2[np.isfinite(dw2)]
        if dw2.size == 0:
            break
        sv2 = emission.v_turb_kms ** 2 + float(np.median(dw2))
        new_sv = float(np.sqrt(max(sv2, 0.02 ** 2)))
        widths.append(new_sv)
        upd = {"v_turb_kms": new_sv}
        if match_brightness:
            upd.update(_brightness_correction(ridges, traced, idx, geom, emission))
        emission = replace(emission, **upd)
    meta_w = {"line_sigma_iterations_kms": widths}
    off = np.full(n, np.nan)
    if idx.size:
        o, _ = signed_offsets(geom, traced.x_arcsec, traced.y_arcsec,
                              traced.velocity_kms, traced.surface)
        off[idx] = o
    measured = np.isfinite(off)
    missing = np.flatnonzero(~measured)
    for i in missing:
        same = measured & (ridges.channel == ridges.channel[i]) & \
            (ridges.surface == ridges.surface[i])
        j = np.flatnonzero(same)
        if j.size == 0:
            off[i] = 0.0
            continue
        d = np.hypot(ridges.x_arcsec[j] - ridges.x_arcsec[i],
                     ridges.y_arcsec[j] - ridges.y_arcsec[i])
        near = np.argsort(d)[:3]
        near = near[d[near] < 2.0 * ridges.beam_fwhm_arcsec[i]]
        if near.size == 0:
            off[i] = 0.0
        else:
            wgt = 1.0 / np.maximum(d[near], 1e-6)
            off[i] = float(np.sum(wgt * off[j[near]]) / np.sum(wgt))
    meta = {"n_measured": int(measured.sum()), "n_filled": int((~measured).sum()),
            **meta_w,
            "rms_bias_arcsec": float(np.sqrt(np.mean(off ** 2))),
            "emission": None if emission is None else {
                k: float(getattr(emission, k)) for k in
                ("peak_jy_beam", "r_char_au", "gamma", "r_core_au", "r_out_au",
                 "back_ratio", "t_ref_k", "r_t_ref_au", "temperature_index",
                 "molecule_amu", "v_turb_kms")}}
    log.info("beam-smearing bias: rms %.4f arcsec over %d points (%d filled)",
             meta["rms_bias_arcsec"], n, meta["n_filled"])
    return SmearingBias(off, measured, emission, meta)


#: free parameters of :func:`fit_emission` (name, lower, upper bound)
_EMISSION_FREE = (("log_peak", -np.inf, np.inf), ("gamma", 0.0, 3.0),
                  ("log_r_char", math.log(5.0), math.log(1e4)),
                  ("back_ratio", 0.0, 1.0),
                  ("log_t_ref", math.log(0.5), math.log(2e3)),
                  ("temperature_index", -0.5, 1.5))

#: turbulent width kept fixed (and negligible) by :func:`fit_emission`,
#: which fits the line width as one power law in radius, km/s
_FIT_V_TURB = 1e-3


def fit_emission(cube, geom, start, *, oversample: int = 2, stride: int = 2,
                 max_nfev: int = 20):
    """Fit the emission profile of the background model to the cube.

    The beam-smearing bias and the tracer response
    (:mod:`kinkfit.response`) depend on the *shape* of the channel
    emission -- line width, brightness profile, back/front ratio -- more
    than on the geometry.  Ridge widths and amplitudes
    (:func:`estimate_emission`) constrain them poorly (no back-surface
    points when only the front is traced; widths of blended ridges), so the
    noise-free model cube (:func:`model_cube`) is fitted to the data by
    least squares over every ``stride``-th pixel of every channel, with the
    geometry held fixed: ``ln peak, gamma, ln r_char, back_ratio`` and the
    line width as one power law ``sigma_v = sqrt(k T(r) / m)``, ``T(r) =
    T_ref (r / 100 au)^-index`` (free ``ln T_ref, index``; thermal and
    turbulent widths are degenerate in a cube, so the turbulent part is
    held at a negligible ``_FIT_V_TURB``).  ``scipy.optimize.
    least_squares``, bounded trust region.  A planet's kinks are local and
    change few pixels, so they hardly pull this fit.

    Parameters
    ----------
    cube : kinkfit.cube.Cube
    geom : kinkfit.geometry.DiskGeometry
    start : kinkfit.synth.LineEmission
        Starting profile (e.g. :func:`estimate_emission`).
    oversample : int
        Sub-pixels per axis of the model during the fit.
    stride : int
        Pixel stride of the residual sample.
    max_nfev : int
        Model-cube evaluations allowed.

    Returns
    -------
    kinkfit.synth.LineEmission
    """
    from scipy.optimize import least_squares
    data = np.asarray(cube.data, float)[:, ::stride, ::stride]
    noise = np.asarray(cube.noise_per_channel, float)
    noise = np.where(np.isfinite(noise) & (noise > 0), noise,
                     float(np.nanmedian(noise)) if np.any(np.isfinite(noise))
                     else 1.0)[:, None, None]
    good = np.isfinite(data)
    from .synth import LineEmission
    # start: the whole width of the starting profile at 100 au as thermal
    sig100 = float(start.line_sigma_kms(100.0))
    kt = float(LineEmission(t_ref_k=1.0, v_turb_kms=0.0).line_sigma_kms(
        100.0)) ** 2
    t_ref = sig100 ** 2 / kt
    x0 = np.array([math.log(max(start.peak_jy_beam, 1e-30)),
                   float(np.clip(start.gamma, 0.0, 3.0)),
                   math.log(float(np.clip(start.r_char_au, 6.0, 9e3))),
                   float(np.clip(start.back_ratio, 0.05, 0.95)),
                   math.log(float(np.clip(t_ref, 1.0, 1.5e3))), 0.4])
    lo = np.array([b[1] for b in _EMISSION_FREE])
    hi = np.array([b[2] for b in _EMISSION_FREE])
    x0 = np.clip(x0, lo + 1e-9, hi - 1e-9)

    def emission_of(p):
        return replace(start, peak_jy_beam=math.exp(p[0]), gamma=float(p[1]),
                       r_char_au=math.exp(p[2]), back_ratio=float(p[3]),
                       t_ref_k=math.exp(p[4]), r_t_ref_au=100.0,
                       temperature_index=float(p[5]),
                       v_turb_kms=_FIT_V_TURB)

    def resid(p):
        mod = model_cube(cube, geom, emission_of(p), oversample=oversample)
        r = (mod.data[:, ::stride, ::stride] - data) / noise
        return r[good]

    # a better start where the ridge-based one is far off (a quality cut
    # on the traced points can leave few, bright, narrow ones: peak and
    # line width off by x100 and x3 on a test cube): the model is linear in
    # the peak brightness, so for a few line widths around the start the
    # best peak is one projection; keep the best of them
    best = None
    d = np.where(good, data, 0.0) / noise
    for factor in (0.3, 0.45, 0.65, 1.0, 1.5):
        xc = x0.copy()
        xc[4] = float(np.clip(x0[4] + 2.0 * math.log(factor), lo[4] + 1e-9,
                              hi[4] - 1e-9))
        m = model_cube(cube, geom, emission_of(xc),
                       oversample=oversample).data[:, ::stride, ::stride]
        m = np.where(good, m, 0.0) / noise
        mm = float(np.sum(m * m))
        if not mm > 0:
            continue
        a = float(np.sum(m * d)) / mm
        if not a > 0:
            continue
        xc[0] = float(np.clip(xc[0] + math.log(a), lo[0] + 1e-9, hi[0] - 1e-9))
        chi2 = float(np.sum((a * m - d) ** 2))
        if best is None or chi2 < best[0]:
            best = (chi2, xc)
    if best is not None:
        x0 = best[1]
    res = least_squares(resid, x0, bounds=(lo, hi), x_scale="jac",
                        max_nfev=max_nfev, diff_step=1e-3)
    out = emission_of(res.x)
    chi2 = float(np.sum(res.fun ** 2) / max(res.fun.size - res.x.size, 1))
    log.info("emission fit: %s (reduced chi2 %.3f, %d evaluations)",
             {k: round(float(getattr(out, k)), 4) for k in
              ("peak_jy_beam", "gamma", "r_char_au", "back_ratio", "t_ref_k",
               "temperature_index", "v_turb_kms")}, chi2, res.nfev)
    return out
