"""Ridge tracing: where each channel's emission actually sits on the sky.

For every channel and emitting surface the iso-velocity curve of a background
disk model (``V_bg(x, y) = v_ch``) is sampled, thinned to about
``points_per_beam`` samples per beam FWHM, and a one-dimensional cut through
the channel map is taken at each sample along the local velocity gradient.
The emission peak along the cut is located with a matched filter (the cut
smoothed by a Gaussian of the beam's width along the cut) and refined to
sub-sample precision with a parabola through the three highest samples of the
smoothed profile.  The method, the uncertainty model and its derivation are
written out in ``docs/physics/tracing.md``.

Positional uncertainty (derived in the docs): for a ridge profile of Gaussian
width ``w`` along the cut, noise of rms ``sigma_n`` correlated by a Gaussian
beam of width ``s_b`` along the cut, and a Gaussian template of width ``t``,
the matched-filter peak has variance::

    var = (sigma_n / A)^2 * s_b * (t^2 + w^2)^3 / (2 w^2 (t^2 + s_b^2)^(3/2))

where ``A`` is the peak brightness of the ridge.  With ``t = s_b`` and an
unresolved ridge (``w = s_b``) this is ``2**0.25 s_b / SNR``
(about 0.5 FWHM / SNR).

Points are rejected (and counted by reason in ``Ridges.meta['rejected']``)
when the cut leaves the cube or touches blanked pixels, leaves the emitting
layer, crosses its own iso-velocity curve more than once, comes within a beam
of the other surface's iso-velocity curve, peaks at the edge of the window,
peaks below ``min_snr``, or is located less precisely than
``max_sigma_beams`` beam FWHM (config ``trace.max_sigma_beams``, default
0.15; the reasoning is in the docs).

Points kept about one beam FWHM apart along a ridge are treated as
independent downstream; their noise correlation is ``exp(-d^2 / (4 s_b^2))``
(0.25 at d = 1 FWHM), which is neglected.
"""

from __future__ import annotations

import dataclasses
import logging
import math
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage
from scipy.spatial import cKDTree

from .errors import ConfigError, KinkfitError

__all__ = ["Ridges", "trace_ridges", "peak_along_cuts", "background_maps",
           "position_sigma", "run_trace", "load_cube", "write_trace_file",
           "read_trace_file", "geometry_from_dict", "SURFACE_CODES",
           "FWHM_PER_SIGMA", "TRACE_FILE_NAME", "TRACE_SCHEMA_VERSION"]

log = logging.getLogger(__name__)

#: Gaussian FWHM / sigma = 2 sqrt(2 ln 2) (PHYSICS.md section 2)
FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))

#: default largest position error of a kept point, beam FWHM (the
#: ``trace.max_sigma_beams`` default of :class:`kinkfit.config.TraceSettings`)
_DEFAULT_MAX_SIGMA_BEAMS = 0.15

#: integer code of each surface in :attr:`Ridges.surface`
SURFACE_CODES = {"front": 0, "back": 1}
_SURFACE_NAMES = {v: k for k, v in SURFACE_CODES.items()}

_FIELDS = ("x_arcsec", "y_arcsec", "channel", "velocity_kms", "sigma_arcsec",
           "surface", "snr", "amplitude", "width_arcsec", "dir_x", "dir_y",
           "beam_fwhm_arcsec", "beam_sigma_cut_arcsec", "template_arcsec",
           "half_window_arcsec", "cut_x_arcsec", "cut_y_arcsec",
           "grad_cut_kms_per_arcsec")


def _ro(a, dtype=float):
    a = np.array(a, dtype=dtype, copy=True)
    a.setflags(write=False)
    return a


@dataclass(frozen=True)
class Ridges:
    """Traced ridge points (one entry per point; all arrays shape (n,)).

    Attributes
    ----------
    x_arcsec, y_arcsec : ndarray
        Sky position of the emission peak, arcsec east / north of the image
        centre.
    channel : ndarray of int
        Channel index in the cube's file order.
    velocity_kms : ndarray
        Velocity of that channel, km/s.
    sigma_arcsec : ndarray
        1-sigma uncertainty of the position along the cut direction, arcsec.
    surface : ndarray of int8
        0 front surface, 1 back surface.
    snr : ndarray
        Peak brightness of the ridge over the channel noise.
    amplitude : ndarray
        Peak brightness of the ridge (Gaussian fit), in the cube's unit.
    width_arcsec : ndarray
        Gaussian sigma of the ridge profile along the cut, arcsec.
    dir_x, dir_y : ndarray
        Unit vector of the cut (the tracing model's velocity gradient).
    beam_fwhm_arcsec : ndarray
        Geometric-mean beam FWHM of the point's channel, arcsec.
    beam_sigma_cut_arcsec : ndarray
        Beam Gaussian sigma along the cut, arcsec.
    template_arcsec, half_window_arcsec : ndarray
        Width of the matched filter and half length of the cut used, arcsec.
    cut_x_arcsec, cut_y_arcsec : ndarray
        Centre of the cut (on the tracing model's iso-velocity curve).
    grad_cut_kms_per_arcsec : ndarray
        ``|grad V|`` of the tracing model at the cut centre, km/s/arcsec.
    meta : dict
        Settings used and the rejection counts (``'rejected'``).
    """

    x_arcsec: np.ndarray
    y_arcsec: np.ndarray
    channel: np.ndarray
    velocity_kms: np.ndarray
    sigma_arcsec: np.ndarray
    surface: np.ndarray
    snr: np.ndarray
    amplitude: np.ndarray
    width_arcsec: np.ndarray
    dir_x: np.ndarray
    dir_y: np.ndarray
    beam_fwhm_arcsec: np.ndarray
    beam_sigma_cut_arcsec: np.ndarray
    template_arcsec: np.ndarray
    half_window_arcsec: np.ndarray
    cut_x_arcsec: np.ndarray
    cut_y_arcsec: np.ndarray
    grad_cut_kms_per_arcsec: np.ndarray
    meta: dict = field(default_factory=dict, compare=False)

    def __post_init__(self):
        n = None
        for name in _FIELDS:
            dtype = {"channel": np.int64, "surface": np.int8}.get(name, float)
            a = _ro(getattr(self, name), dtype)
            if a.ndim != 1:
                raise ValueError(f"Ridges.{name} must be 1-D")
            if n is None:
                n = a.size
            elif a.size != n:
                raise ValueError(f"Ridges.{name} has {a.size} entries, "
                                 f"expected {n}")
            object.__setattr__(self, name, a)

    def __len__(self) -> int:
        return int(self.x_arcsec.size)

    @property
    def surface_names(self) -> list[str]:
        """Surface name of each point ('front'/'back')."""
        return [_SURFACE_NAMES[int(s)] for s in self.surface]

    def select(self, mask) -> "Ridges":
        """Subset by boolean mask or index array."""
        return Ridges(**{k: getattr(self, k)[mask] for k in _FIELDS},
                      meta=dict(self.meta))

    def with_positions(self, x_arcsec, y_arcsec) -> "Ridges":
        """Copy with new positions (everything else unchanged)."""
        return dataclasses.replace(self, x_arcsec=x_arcsec, y_arcsec=y_arcsec)

    def cuts(self, *, with_peaks: bool = True) -> dict:
        """The points' cuts, for re-tracing another cube at the same places.

        Parameters
        ----------
        with_peaks : bool
            Also pass the traced peak positions (``peak_x_arcsec``,
            ``peak_y_arcsec``) as starting hints for the peak search.

        Returns
        -------
        dict
            The ``cuts`` argument of :func:`trace_ridges`: cut centres and
            directions, channel, surface, matched-filter width and half
            window (arcsec).
        """
        out = {"x_arcsec": self.cut_x_arcsec, "y_arcsec": self.cut_y_arcsec,
               "channel": self.channel, "surface": self.surface,
               "dir_x": self.dir_x, "dir_y": self.dir_y,
               "template_arcsec": self.template_arcsec,
               "half_window_arcsec": self.half_window_arcsec}
        if with_peaks:
            out["peak_x_arcsec"] = self.x_arcsec
            out["peak_y_arcsec"] = self.y_arcsec
        return out

    def as_dict(self) -> dict:
        """Plain dict of the per-point arrays (for HDF5 / tables)."""
        return {k: np.asarray(getattr(self, k)) for k in _FIELDS}

    @classmethod
    def from_dict(cls, arrays: dict, meta: dict | None = None) -> "Ridges":
        """Inverse of :meth:`as_dict`."""
        return cls(**{k: np.asarray(arrays[k]) for k in _FIELDS},
                   meta=dict(meta or {}))

    @classmethod
    def concatenate(cls, parts, meta=None) -> "Ridges":
        """Join several Ridges (meta of the first unless given)."""
        parts = list(parts)
        if not parts:
            raise ValueError("nothing to concatenate")
        return cls(**{k: np.concatenate([getattr(p, k) for p in parts])
                      for k in _FIELDS},
                   meta=dict(meta if meta is not None else parts[0].meta))

    @classmethod
    def empty(cls, meta=None) -> "Ridges":
        return cls(**{k: np.zeros(0) for k in _FIELDS}, meta=dict(meta or {}))


# ---------------------------------------------------------------------------
# grid helpers
# ---------------------------------------------------------------------------

def _grid(cube):
    """Pixel-centre offsets and the affine index mapping of a cube."""
    x = np.asarray(cube.x_arcsec, dtype=float)
    y = np.asarray(cube.y_arcsec, dtype=float)
    dx = (x[-1] - x[0]) / (x.size - 1) if x.size > 1 else -cube.pixel_arcsec
    dy = (y[-1] - y[0]) / (y.size - 1) if y.size > 1 else cube.pixel_arcsec
    return x, y, float(x[0]), float(dx), float(y[0]), float(dy)


def _to_index(xs, ys, x0, dx, y0, dy):
    return (ys - y0) / dy, (xs - x0) / dx


def background_maps(cube, geom, surfaces=("front", "back")):
    """Background velocity and its gradient on the cube's pixel grid.

    Parameters
    ----------
    cube : kinkfit.cube.Cube
    geom : kinkfit.geometry.DiskGeometry
    surfaces : sequence of {'front', 'back'}

    Returns
    -------
    dict
        ``{surface: (V, gx, gy)}``, each ndarray shape (ny, nx): km/s and
        km/s per arcsec east / north (central differences on the pixel grid;
        NaN off the layer).
    """
    from .geometry import background_velocity
    x, y, *_ = _grid(cube)
    X, Y = np.meshgrid(x, y)
    out = {}
    for s in surfaces:
        V = background_velocity(geom, X, Y, s)
        gy, gx = np.gradient(V, y, x)
        out[s] = (V, gx, gy)
    return out


def _beam_sigma_along(bmaj, bmin, bpa_deg, ux, uy):
    """Gaussian sigma of an elliptical beam along unit vectors (ux, uy)."""
    pa = math.radians(bpa_deg)
    mx, my = math.sin(pa), math.cos(pa)          # major axis, (east, north)
    cm = ux * mx + uy * my
    sm2 = 1.0 - cm * cm
    smaj = bmaj / FWHM_PER_SIGMA
    smin = bmin / FWHM_PER_SIGMA
    return np.sqrt(smaj ** 2 * cm * cm + smin ** 2 * np.clip(sm2, 0, 1))


def position_sigma(noise, amplitude, width, template, beam_sigma):
    """Matched-filter peak-position uncertainty (docs/physics/tracing.md).

    Parameters
    ----------
    noise : float or ndarray
        Noise rms per pixel (cube unit).
    amplitude : ndarray
        Ridge peak brightness (cube unit).
    width, template, beam_sigma : ndarray
        Gaussian sigmas of the ridge profile, the filter and the beam along
        the cut, arcsec.

    Returns
    -------
    ndarray
        1-sigma position uncertainty, arcsec.
    """
    w2 = width ** 2
    t2 = template ** 2
    var = ((noise / amplitude) ** 2 * beam_sigma * (t2 + w2) ** 3
           / (2.0 * w2 * (t2 + beam_sigma ** 2) ** 1.5))
    return np.sqrt(var)


def peak_along_cuts(image, grid, cx, cy, ux, uy, half_window, beam_sigma,
                    nsamp, hint=None):
    """Locate the emission peak along straight cuts through one channel map.

    Parameters
    ----------
    image : ndarray, shape (ny, nx)
        Channel map (NaN = blanked).
    grid : tuple
        ``(x0, dx, y0, dy)`` affine pixel mapping (arcsec).
    cx, cy : ndarray, shape (n,)
        Cut centres, arcsec.
    ux, uy : ndarray, shape (n,)
        Unit cut directions.
    half_window : ndarray, shape (n,)
        Half length of each cut, arcsec.
    beam_sigma : ndarray, shape (n,)
        Beam sigma along each cut (template width), arcsec.
    nsamp : int
        Odd number of samples per cut.
    hint : ndarray, shape (n,), optional
        Take the interior local maximum nearest to this position along the
        cut (arcsec) instead of the highest one.

    Returns
    -------
    dict of ndarray, shape (n,)
        ``s`` peak position along the cut (arcsec from the centre),
        ``peak`` smoothed-profile peak, ``curv`` its second derivative
        (per arcsec^2), ``ok`` bool (finite cut, interior maximum, negative
        curvature), ``blank`` bool (cut touches NaN / leaves the cube).
    """
    x0, dx, y0, dy = grid
    n = cx.size
    u = np.linspace(-1.0, 1.0, nsamp)
    step = half_window * (u[1] - u[0])                         # (n,)
    s = half_window[:, None] * u[None, :]                      # (n, M)
    xs = cx[:, None] + s * ux[:, None]
    ys = cy[:, None] + s * uy[:, None]
    rows, cols = _to_index(xs, ys, x0, dx, y0, dy)
    prof = ndimage.map_coordinates(image, [rows.ravel(), cols.ravel()],
                                   order=1, mode="constant", cval=np.nan,
                                   prefilter=False).reshape(n, nsamp)
    blank = ~np.all(np.isfinite(prof), axis=1)
    prof = np.where(np.isfinite(prof), prof, 0.0)
    # matched filter: Gaussian of width beam_sigma, normalised per row
    d = (u[:, None] - u[None, :])                              # (M, M)
    k = np.exp(-0.5 * (d[None, :, :] * (half_window / beam_sigma)[:, None, None]) ** 2)
    k /= k.sum(axis=2, keepdims=True)
    sm = np.einsum("nij,nj->ni", k, prof)
    # interior maximum, away from the window edges by half a template width
    margin = np.maximum(2, np.ceil(0.5 * beam_sigma / step)).astype(int)
    idx = np.arange(nsamp)[None, :]
    inner = (idx >= margin[:, None]) & (idx <= nsamp - 1 - margin[:, None])
    # highest interior local maximum
    locmax = np.zeros_like(inner)
    locmax[:, 1:-1] = (sm[:, 1:-1] >= sm[:, :-2]) & (sm[:, 1:-1] >= sm[:, 2:])
    smi = np.where(inner & locmax, sm, -np.inf)
    if hint is None:
        j = np.argmax(smi, axis=1)
    else:
        dist = np.abs(s - np.asarray(hint, float)[:, None])
        j = np.argmin(np.where(np.isfinite(smi), dist, np.inf), axis=1)
    j = np.clip(j, 1, nsamp - 2)
    r = np.arange(n)
    ym, y0_, yp = sm[r, j - 1], sm[r, j], sm[r, j + 1]
    den = ym - 2.0 * y0_ + yp
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = 0.5 * (ym - yp) / den
        peak = y0_ - 0.25 * (ym - yp) * frac
        curv = den / step ** 2
    interior = np.isfinite(smi[r, j]) & inner[r, j]
    ok = (~blank) & interior & (den < 0) & (np.abs(frac) <= 1.0) & (peak > 0)
    return {"s": (j - (nsamp - 1) / 2 + frac) * step, "peak": peak,
            "curv": curv, "ok": ok, "blank": blank}


def _thin(px, py, order, spacing):
    """Greedy thinning: keep points at least ``spacing`` apart (priority order)."""
    if px.size == 0:
        return np.zeros(0, dtype=int)
    pts = np.column_stack([px, py])
    tree = cKDTree(pts)
    neigh = tree.query_ball_point(pts, r=spacing, return_sorted=False)
    alive = np.ones(px.size, dtype=bool)
    keep = []
    for i in order:
        if alive[i]:
            keep.append(i)
            alive[neigh[i]] = False
    return np.asarray(keep, dtype=int)


def _interp(maps, rows, cols):
    return [ndimage.map_coordinates(m, [rows, cols], order=1, mode="constant",
                                    cval=np.nan, prefilter=False) for m in maps]


def _crossings(vals, v, s):
    """Positions (along axis 1, coordinate ``s``) where ``vals`` crosses v.

    Returns an array shape (n, M-1), NaN where there is no crossing between
    consecutive samples (linear interpolation inside a crossing interval).
    """
    d = vals - v
    a, b = d[:, :-1], d[:, 1:]
    with np.errstate(invalid="ignore", divide="ignore"):
        cross = (np.sign(a) * np.sign(b) < 0) | ((a == 0) & np.isfinite(b))
        t = a / (a - b)
        pos = s[:, :-1] + t * (s[:, 1:] - s[:, :-1])
    return np.where(cross, pos, np.nan)


def _window_limits(v_own, v_other, v, grid, cx, cy, ux, uy, half, fwhm,
                   clearance, nsamp=121):
    """Largest half window keeping a cut clear of confusing structure.

    The cut must stop ``clearance`` (arcsec) before (a) the other surface's iso-velocity
    curve (unless it coincides with this one to within a quarter beam, as
    for a flat disk), (b) a second crossing of the own curve, and (c) the
    edge of the own layer.

    Returns
    -------
    limit : ndarray, shape (n,)
        Allowed half length, arcsec.
    reason : ndarray of str, shape (n,)
        Which condition set the limit ('off_surface', 'multiple_crossing',
        'other_surface' or '').
    """
    x0, dx, y0, dy = grid
    ext = half + fwhm
    u = np.linspace(-1.0, 1.0, nsamp)
    s = ext[:, None] * u[None, :]
    sx = cx[:, None] + s * ux[:, None]
    sy = cy[:, None] + s * uy[:, None]
    rr, cc = _to_index(sx, sy, x0, dx, y0, dy)
    own, oth = _interp([v_own, v_other], rr.ravel(), cc.ravel())
    own = own.reshape(s.shape)
    oth = oth.reshape(s.shape)
    n = cx.size
    inf = np.full(n, np.inf)
    # (c) edge of the own layer: nearest non-finite sample
    dist_nan = np.where(np.isfinite(own), np.inf, np.abs(s)).min(axis=1)
    # (b) own crossings other than the central one
    co = _crossings(own, v, s)
    aco = np.abs(co)
    with np.errstate(invalid="ignore"):
        first = np.nanmin(np.where(np.isfinite(aco), aco, np.inf), axis=1)
        second = np.where(np.isfinite(aco) & (aco > first[:, None] + 1e-12),
                          aco, np.inf).min(axis=1)
    lim_own = second - clearance
    # (a) other-surface crossings not coinciding with the own one
    ct = np.abs(_crossings(oth, v, s))
    coincide = np.abs(ct - first[:, None]) < 0.25 * fwhm
    dist_oth = np.where(np.isfinite(ct) & ~coincide, ct, np.inf).min(axis=1)
    lim_oth = dist_oth - clearance
    lim_nan = dist_nan
    stack = np.stack([lim_nan, lim_own, lim_oth, inf])
    which = np.argmin(stack, axis=0)
    limit = stack[which, np.arange(n)]
    names = np.array(["off_surface", "multiple_crossing", "other_surface", ""])
    reason = names[which]
    # a cut whose centre is not on the own layer is off the surface
    nocross = ~np.isfinite(first) | (first > 0.5 * fwhm)
    limit = np.where(nocross, 0.0, limit)
    reason = np.where(nocross, "off_surface", reason)
    return limit, reason


def trace_ridges(cube, geom, settings, *, window_beams: float = 1.5,
                 max_window_beams: float = 4.0, min_window_beams: float = 0.75,
                 clearance_beams: float = 0.5,
                 max_sigma_beams: float | None = None,
                 max_width_ratio: float | None = 2.0, edge_widths: float = 1.0,
                 channels=None,
                 cuts=None) -> Ridges:
    """Trace the emission ridges of every channel along the model's gradient.

    Parameters
    ----------
    cube : kinkfit.cube.Cube
        The data (any channel order, per-channel beams, NaN blanks allowed).
    geom : kinkfit.geometry.DiskGeometry
        Background disk that defines where to look (start geometry or a
        fitted one).
    settings : kinkfit.config.TraceSettings
        ``surfaces`` (names), ``min_snr``, ``points_per_beam``,
        ``max_sigma_beams``.
    window_beams : float
        Half length of each cut in beam FWHM, widened by twice the channel
        width over the local gradient (resolved ridges), capped at
        ``max_window_beams``.
    max_window_beams : float
        Cap of the half length, beam FWHM.
    min_window_beams : float
        The half length is shortened so that the cut stops ``clearance_beams`` FWHM before
        the other surface's iso-velocity curve, a second crossing of its own
        curve, or the edge of the layer; cuts shorter than this (in FWHM)
        are rejected.
    clearance_beams : float
        Distance (FWHM) a cut keeps from the other surface's curve and from
        a second crossing of its own curve.  The residual blending at this
        distance is part of the beam-smearing bias that
        :func:`kinkfit.deviations.estimate_smearing_bias` removes.
    max_sigma_beams : float, optional
        Points whose 1-sigma position error exceeds this (beam FWHM) are
        dropped (reason ``'imprecise'``).  Default: ``settings.
        max_sigma_beams`` (config ``trace.max_sigma_beams``, 0.15).  The
        choice and what it costs are argued in docs/physics/tracing.md
        section 2: beyond ~0.15 beam the peak estimate leaves its linear
        regime at low SNR (normalised scatter 1.2-1.8 on such points at
        peak SNR 8) and a single point no longer resolves a kink of a
        tenth of a beam.
    max_width_ratio : float or None
        Points whose ridge is wider than this times the width expected from
        the beam and the cube's median line width (``w_exp^2 = s_b^2 +
        sigma_v^2 / g^2``) are dropped as blended (reason ``'blended'``);
        None keeps them.
    channels : sequence of int, optional
        Channels to trace (default all).
    cuts : dict, optional
        Trace at given cuts instead of sampling the iso-velocity curves:
        arrays ``x_arcsec, y_arcsec`` (cut centres), ``channel, surface,
        dir_x, dir_y, template_arcsec, half_window_arcsec`` (one pass with
        this filter and window) and optionally ``peak_x_arcsec,
        peak_y_arcsec`` (take the local maximum nearest to it)
        (used for the beam-smearing bias, see
        :func:`kinkfit.deviations.estimate_smearing_bias`).  The overlap
        rejections are skipped; the returned Ridges keep the input order and
        carry ``meta['index']``, the input index of each kept point.

    Returns
    -------
    Ridges
    """
    surfaces = tuple(settings.surfaces)
    for s in surfaces:
        if s not in SURFACE_CODES:
            raise ConfigError(f"trace.surfaces: unknown surface {s!r} "
                              f"(use 'front' and/or 'back')", key="trace.surfaces",
                              value=s)
    min_snr = float(settings.min_snr)
    ppb = float(settings.points_per_beam)
    if max_sigma_beams is None:
        max_sigma_beams = float(getattr(settings, "max_sigma_beams",
                                        _DEFAULT_MAX_SIGMA_BEAMS))
    x, y, x0, dx, y0, dy = _grid(cube)
    grid = (x0, dx, y0, dy)
    pix = float(cube.pixel_arcsec)
    nchan = cube.nchan
    chans = range(nchan) if channels is None else [int(c) for c in channels]
    noise_k = np.asarray(cube.noise_per_channel, dtype=float)
    fallback = float(cube.noise) if np.isfinite(cube.noise) else np.nan
    noise_k = np.where(np.isfinite(noise_k) & (noise_k > 0), noise_k, fallback)
    if not np.all(np.isfinite(noise_k[list(chans)])):
        raise KinkfitError("cube noise is not finite; cannot set the SNR of "
                           "traced points", file=cube.provenance.get("path"))
    vel = np.asarray(cube.velocity_kms, dtype=float)
    dv_ch = float(cube.channel_width_kms)
    maps = background_maps(cube, geom, SURFACE_CODES.keys())
    if ("back" in surfaces and "front" in surfaces
            and geom.surface("front").is_flat and geom.surface("back").is_flat):
        log.info("flat emitting layer: front and back coincide, tracing "
                 "'front' only")
        surfaces = tuple(s for s in surfaces if s != "back")
    rejected = {k: 0 for k in ("blank", "off_surface", "multiple_crossing",
                               "other_surface", "no_peak", "imprecise",
                               "low_snr")}
    parts = []
    kept_index = []

    for k in chans:
        v = vel[k]
        img = cube.data[k]
        if not np.any(np.isfinite(img)):
            continue
        bmaj = float(cube.beam_major_arcsec[k])
        bmin = float(cube.beam_minor_arcsec[k])
        bpa = float(cube.beam_pa_deg[k])
        fwhm = math.sqrt(bmaj * bmin)
        for sname in surfaces:
            code = SURFACE_CODES[sname]
            other = "back" if sname == "front" else "front"
            V, gx, gy = maps[sname]
            if cuts is None:
                g = np.hypot(gx, gy)
                with np.errstate(invalid="ignore", divide="ignore"):
                    dvv = V - v
                    near = np.abs(dvv) <= 0.5 * pix * np.maximum(np.abs(gx), np.abs(gy))
                    near &= np.isfinite(dvv) & (g > 0)
                jj, ii = np.nonzero(near)
                if jj.size == 0:
                    continue
                gg = g[jj, ii]
                ux = gx[jj, ii] / gg
                uy = gy[jj, ii] / gg
                off = dvv[jj, ii] / gg
                cx = x[ii] - off * ux
                cy = y[jj] - off * uy
                order = np.argsort(np.abs(off), kind="stable")
                sel = _thin(cx, cy, order, fwhm / ppb)
                sel = np.sort(sel)
                cx, cy, ux, uy, gg = cx[sel], cy[sel], ux[sel], uy[sel], gg[sel]
                idx_in = None
            else:
                m = (np.asarray(cuts["channel"]) == k) & \
                    (np.asarray(cuts["surface"]) == code)
                idx_in = np.flatnonzero(m)
                if idx_in.size == 0:
                    continue
                cx = np.asarray(cuts["x_arcsec"], float)[idx_in]
                cy = np.asarray(cuts["y_arcsec"], float)[idx_in]
                ux = np.asarray(cuts["dir_x"], float)[idx_in]
                uy = np.asarray(cuts["dir_y"], float)[idx_in]
                r0, c0 = _to_index(cx, cy, x0, dx, y0, dy)
                gxi, gyi = _interp([gx, gy], r0, c0)
                gg = np.hypot(gxi, gyi)
                fixed_t = np.asarray(cuts["template_arcsec"], float)[idx_in]
                hint = None
                if "peak_x_arcsec" in cuts:
                    hint = ((np.asarray(cuts["peak_x_arcsec"], float)[idx_in] - cx) * ux
                            + (np.asarray(cuts["peak_y_arcsec"], float)[idx_in] - cy) * uy)
                fixed_h = np.asarray(cuts["half_window_arcsec"], float)[idx_in]
            sb = _beam_sigma_along(bmaj, bmin, bpa, ux, uy)
            with np.errstate(divide="ignore", invalid="ignore"):
                half = window_beams * fwhm + 2.0 * dv_ch / gg
            half = np.where(np.isfinite(half), half, max_window_beams * fwhm)
            half = np.minimum(half, max_window_beams * fwhm)
            good = np.ones(cx.size, dtype=bool)
            limit = np.full(cx.size, np.inf)
            if cuts is None:
                lim, why = _window_limits(maps[sname][0], maps[other][0], v,
                                          grid, cx, cy, ux, uy, half, fwhm,
                                          clearance_beams * fwhm)
                limit = lim
                half = np.minimum(half, lim)
                short = half < min_window_beams * fwhm
                for name in ("off_surface", "multiple_crossing",
                             "other_surface"):
                    bad = short & (why == name)
                    rejected[name] += int(np.sum(bad))
                good &= ~short
                half = np.maximum(half, min_window_beams * fwhm)
            # pass 1: beam-width template; pass 2: template matched to the
            # measured ridge width, window widened to >= 3 ridge widths.
            # Points where pass 2 fails keep their pass-1 measurement.
            tmpl = sb
            first = None
            passes = (1, 2)
            if cuts is not None:
                tmpl, half, passes = fixed_t, fixed_h, (3,)
            for npass in passes:
                step_max = np.minimum(0.5 * tmpl, 0.5 * pix)
                nsamp = int(2 * math.ceil(np.max(half / step_max)) + 1)
                res = peak_along_cuts(img, grid, cx, cy, ux, uy, half, tmpl,
                                      nsamp, hint=hint if npass == 3 else None)
                with np.errstate(divide="ignore", invalid="ignore"):
                    wt2 = -res["peak"] / res["curv"]
                    w2 = np.clip(wt2 - tmpl ** 2, sb ** 2, (2.0 * half) ** 2)
                    w = np.sqrt(w2)
                    amp = res["peak"] * np.sqrt(w2 + tmpl ** 2) / w
                if npass == 1:
                    first = (res, w, amp, tmpl, half)
                    okw = res["ok"] & np.isfinite(w)
                    tmpl = np.where(okw, w, sb)
                    wide = np.where(okw, 3.0 * w, half)
                    cap = np.minimum(max_window_beams * fwhm,
                                     np.maximum(limit, min_window_beams * fwhm))
                    half = np.clip(wide, half, np.maximum(cap, half))
                elif npass == 2:
                    r1, w1, a1, t1, h1 = first
                    back = r1["ok"] & ~res["ok"]
                    res = {key: np.where(back, r1[key], res[key]) for key in res}
                    w = np.where(back, w1, w)
                    amp = np.where(back, a1, amp)
                    tmpl = np.where(back, t1, tmpl)
                    half = np.where(back, h1, half)
            rejected["blank"] += int(np.sum(good & res["blank"]))
            rejected["no_peak"] += int(np.sum(good & ~res["ok"] & ~res["blank"]))
            good &= res["ok"]
            with np.errstate(divide="ignore", invalid="ignore"):
                snr = amp / noise_k[k]
                sig = position_sigma(noise_k[k], amp, w, tmpl, sb)
            # the ridge must sit inside its window (peak + edge_widths ridge
            # widths)
            edge = good & ~(np.abs(res["s"]) + edge_widths * w <= half)
            rejected["no_peak"] += int(np.sum(edge))
            good &= ~edge
            # final position must lie on the layer
            px = cx + res["s"] * ux
            py = cy + res["s"] * uy
            pr, pc = _to_index(px, py, x0, dx, y0, dy)
            offl = good & ~np.isfinite(_interp([V], pr, pc)[0])
            rejected["off_surface"] += int(np.sum(offl))
            good &= ~offl
            loose = good & ~(sig <= max_sigma_beams * fwhm)
            rejected["imprecise"] += int(np.sum(loose))
            good &= ~loose
            low = good & ~(snr >= min_snr)
            rejected["low_snr"] += int(np.sum(low))
            good &= snr >= min_snr
            if not np.any(good):
                continue
            sp = res["s"][good]
            parts.append(Ridges(
                x_arcsec=cx[good] + sp * ux[good],
                y_arcsec=cy[good] + sp * uy[good],
                channel=np.full(sp.size, k), velocity_kms=np.full(sp.size, v),
                sigma_arcsec=sig[good], surface=np.full(sp.size, code),
                snr=snr[good], amplitude=amp[good], width_arcsec=w[good],
                dir_x=ux[good], dir_y=uy[good],
                beam_fwhm_arcsec=np.full(sp.size, fwhm),
                beam_sigma_cut_arcsec=sb[good], template_arcsec=tmpl[good],
                half_window_arcsec=half[good], cut_x_arcsec=cx[good],
                cut_y_arcsec=cy[good], grad_cut_kms_per_arcsec=gg[good]))
            if idx_in is not None:
                kept_index.append(idx_in[good])
    meta = {"surfaces": list(surfaces), "min_snr": min_snr,
            "points_per_beam": ppb, "window_beams": window_beams,
            "max_window_beams": max_window_beams,
            "min_window_beams": min_window_beams,
            "clearance_beams": clearance_beams,
            "max_sigma_beams": max_sigma_beams, "rejected": rejected,
            "method": "matched-filter cut along the model velocity gradient"}
    if not parts:
        log.warning("no ridge points above SNR %.1f were found", min_snr)
        out = Ridges.empty(meta)
        if cuts is not None:
            meta["index"] = np.zeros(0, dtype=int)
        return out
    out = Ridges.concatenate(parts, meta=meta)
    if cuts is None and max_width_ratio is not None and len(out) >= 10:
        # blended ridges: much wider than a ridge of the cube's typical
        # line width, w_exp^2 = s_b^2 + sigma_v^2 / g^2 with
        # sigma_v^2 = median((w^2 - s_b^2) g^2) over all points
        sb2 = out.beam_sigma_cut_arcsec ** 2
        g2 = out.grad_cut_kms_per_arcsec ** 2
        sv2 = float(np.median((out.width_arcsec ** 2 - sb2) * g2))
        w_exp = np.sqrt(sb2 + max(sv2, 0.0) / g2)
        wide = out.width_arcsec > max_width_ratio * w_exp
        rejected["blended"] = int(np.sum(wide))
        meta["line_sigma_eff_kms"] = math.sqrt(max(sv2, 0.0))
        out = out.select(~wide)
    if cuts is not None:
        idx = np.concatenate(kept_index)
        order = np.argsort(idx, kind="stable")
        out = out.select(order)
        out.meta["index"] = idx[order]
    log.info("traced %d ridge points (rejected: %s)", len(out), rejected)
    return out


# ---------------------------------------------------------------------------
# pipeline and result file
# ---------------------------------------------------------------------------

#: layout version of the trace result file
TRACE_SCHEMA_VERSION = 1
TRACE_FILE_NAME = "trace.h5"


def load_cube(cfg):
    """Read the cube of a config (``data.cube``, centre, line-free channels)."""
    from .cube import read_cube
    centre = None
    if cfg.data.centre_ra_deg is not None and cfg.data.centre_dec_deg is not None:
        centre = (cfg.data.centre_ra_deg, cfg.data.centre_dec_deg)
    return read_cube(cfg.data.cube, centre=centre,
                     line_free=cfg.data.line_free_channels)


def run_trace(cfg, *, cube=None, rounds: int = 3, fit_background=None):
    """Trace, fit the background disk and measure the deviations.

    The stage the planet fit builds on:

    1. read the cube (``cfg.data``; or use ``cube``);
    2. trace the ridges with the ``[disk]`` start geometry and, when
       ``disk.fit_background``, alternate tracing and a robust background
       fit until the geometry settles (:func:`kinkfit.diskfit.trace_and_fit`);
       when ``trace.debias`` every round's fit removes the beam-smearing
       bias of the points, estimated from a noise-free model of the current
       geometry (:func:`kinkfit.deviations.estimate_smearing_bias`; the
       emission profile is estimated once, in the first round) -- without
       it the blended front/back ridges pull the fitted layer height down;
       with ``likelihood.kink_model = "forward"`` the emission profile of
       that model (line width, brightness, back/front ratio) is fitted to
       the cube (:func:`kinkfit.deviations.fit_emission`) at the start
       geometry and refitted once at the first fitted one, instead of being
       matched to the ridge widths;
    3. re-estimate the bias of the final points at the final geometry;
    4. measure the deviations against the fitted disk with the bias removed
       (:func:`kinkfit.deviations.measure_deviations`).

    Parameters
    ----------
    cfg : kinkfit.config.KinkfitConfig
    cube : kinkfit.cube.Cube, optional
        Already-read cube (default: read ``cfg.data.cube``).
    rounds : int
        Maximum trace/fit rounds.
    fit_background : bool, optional
        Override ``cfg.disk.fit_background``.

    Returns
    -------
    ridges : Ridges
    fit : kinkfit.diskfit.BackgroundFit or None
        None when ``disk.fit_background`` is false.
    deviations : kinkfit.deviations.Deviations
        ``deviations.meta['bias']`` describes the bias correction.
    """
    from .deviations import (estimate_emission, estimate_smearing_bias,
                             fit_emission, keep_measurable,
                             measure_deviations)
    from .diskfit import trace_and_fit
    if cube is None:
        cube = load_cube(cfg)
    geom0 = cfg.geometry()
    settings = cfg.trace
    do_fit = cfg.disk.fit_background if fit_background is None else fit_background
    state = {"emission": None, "bias": None}
    lk = getattr(cfg, "likelihood", None)
    fit_profile = getattr(lk, "kink_model", "first-order") == "forward"

    def emission_for(ridges, geom):
        # the forward kink model needs the emission profile itself, not only
        # a bias: fit it to the cube at the start geometry, and once more at
        # the first fitted geometry (a profile fitted at a wrong geometry
        # absorbs the geometry's error and biases the next fits)
        if not fit_profile or len(ridges) < 5:
            return state["emission"]
        if state["emission"] is None:
            state["emission"] = fit_emission(
                cube, geom, estimate_emission(ridges, geom, cube))
            state["emission_geom"] = geom
        elif state.get("refits", 0) < 1 and geom != state["emission_geom"]:
            state["emission"] = fit_emission(cube, geom, state["emission"],
                                             max_nfev=10)
            state["emission_geom"] = geom
            state["refits"] = 1
        return state["emission"]

    def bias_of(ridges, geom):
        b = estimate_smearing_bias(cube, ridges, geom, settings,
                                   emission=emission_for(ridges, geom))
        state["emission"], state["bias"] = b.emission, b
        return b.offset_arcsec

    if do_fit:
        ridges, fit = trace_and_fit(cube, geom0, settings, rounds=rounds,
                                    bias=bias_of if settings.debias else None)
        geom = fit.geometry
    else:
        ridges = trace_ridges(cube, geom0, settings)
        fit, geom = None, geom0
    if len(ridges) == 0:
        raise KinkfitError("no ridge points were traced: check the [disk] "
                           "start geometry and trace.min_snr",
                           file=getattr(cfg, "path", None), key="trace.min_snr",
                           value=settings.min_snr)
    bias = None
    if settings.debias:
        # bias of the final ridges at the final geometry
        bias = estimate_smearing_bias(cube, ridges, geom, settings,
                                      emission=emission_for(ridges, geom))
    dev, _ = keep_measurable(
        measure_deviations(ridges, fit if fit is not None else geom, bias=bias))
    if len(dev) == 0:
        raise KinkfitError("none of the traced points lies on the fitted "
                           "background disk: check the [disk] start geometry",
                           file=getattr(cfg, "path", None), key="disk")
    ridges = dev.ridges
    dev.meta["geometry"] = _geom_dict(geom)
    dev.meta["cube_sha256"] = cube.provenance.get("sha256", "")
    dev.meta["cube_path"] = str(cube.provenance.get("path", ""))
    return ridges, fit, dev


def _geom_dict(geom) -> dict:
    def surf(s):
        return None if s is None else {"aspect": s.aspect, "flaring": s.flaring,
                                       "r_ref_au": s.r_ref_au,
                                       "taper_au": s.taper_au}
    return {"mstar_msun": geom.mstar_msun, "distance_pc": geom.distance_pc,
            "inclination_deg": geom.inclination_deg,
            "position_angle_deg": geom.position_angle_deg,
            "rotation": geom.rotation, "x0_arcsec": geom.x0_arcsec,
            "y0_arcsec": geom.y0_arcsec, "vsys_kms": geom.vsys_kms,
            "front": surf(geom.front), "back": surf(geom.back),
            "r_max_au": geom.r_max_au if math.isfinite(geom.r_max_au) else None,
            "r_min_au": geom.r_min_au}


def geometry_from_dict(d: dict):
    """Inverse of the geometry record stored in a trace file."""
    from .geometry import DiskGeometry, EmittingSurface
    d = dict(d)
    for k in ("front", "back"):
        d[k] = None if d[k] is None else EmittingSurface(**d[k])
    if d["front"] is None:
        d["front"] = EmittingSurface(0.0)
    if d.get("r_max_au") is None:
        d["r_max_au"] = math.inf
    return DiskGeometry(**d)


def _json(obj) -> str:
    import json

    def default(o):
        if isinstance(o, np.ndarray):
            return o.tolist()
        if isinstance(o, (np.integer,)):
            return int(o)
        if isinstance(o, (np.floating,)):
            return float(o)
        return str(o)
    return json.dumps(obj, default=default)


def write_trace_file(path, ridges, fit, deviations, *, cfg=None,
                     overwrite: bool = False):
    """Write the trace stage to HDF5 (atomic; refuses to overwrite).

    Layout (``schema = 'kinkfit-trace'``, ``schema_version`` 1)::

        /                  attrs: schema, schema_version, kinkfit_version,
                           created (UTC ISO), cube_path, cube_sha256,
                           trace_settings (JSON), config_text
        /ridges/<field>    (n,) per-point arrays of Ridges; attrs meta (JSON)
        /background        attrs: names, values, errors, start, scatter,
                           loss, f_scale, success, message, rounds,
                           geometry (JSON, best fit); datasets covariance,
                           residuals, inlier.  Absent if not fitted.
        /deviations/<f>    (n,) r_au, phi_rad, z_au, a_r, a_phi,
                           grad_kms_per_arcsec, offset_arcsec,
                           offset_raw_arcsec, bias_arcsec, sigma_arcsec;
                           attrs meta (JSON), geometry (JSON)

    Parameters
    ----------
    path : str or os.PathLike
    ridges : Ridges
    fit : kinkfit.diskfit.BackgroundFit or None
    deviations : kinkfit.deviations.Deviations
    cfg : kinkfit.config.KinkfitConfig, optional
        Recorded (settings and config text).
    overwrite : bool

    Returns
    -------
    pathlib.Path
    """
    import datetime
    import os
    import tempfile
    from pathlib import Path

    import h5py

    from . import __version__
    from .errors import ResultFileError
    path = Path(path)
    if path.exists() and not overwrite:
        raise ResultFileError(f"{path} exists; set output.overwrite = true "
                              f"(or pass --force) to replace it", file=path,
                              key="output.overwrite", value=False)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, suffix=".h5.tmp")
    os.close(fd)
    kw = dict(compression="gzip", compression_opts=4, shuffle=True)
    try:
        with h5py.File(tmp, "w", track_order=True) as f:
            f.attrs["schema"] = "kinkfit-trace"
            f.attrs["schema_version"] = TRACE_SCHEMA_VERSION
            f.attrs["kinkfit_version"] = __version__
            f.attrs["created"] = datetime.datetime.now(
                datetime.timezone.utc).isoformat(timespec="seconds")
            f.attrs["cube_path"] = str(deviations.meta.get("cube_path", ""))
            f.attrs["cube_sha256"] = str(deviations.meta.get("cube_sha256", ""))
            if cfg is not None:
                f.attrs["trace_settings"] = _json(dataclasses.asdict(cfg.trace))
                f.attrs["config_text"] = cfg.text
            g = f.create_group("ridges", track_order=True)
            for k, a in ridges.as_dict().items():
                g.create_dataset(k, data=a, **(kw if a.size > 1 else {}))
            g.attrs["meta"] = _json(ridges.meta)
            if fit is not None:
                b = f.create_group("background", track_order=True)
                b.attrs["names"] = list(fit.names)
                for k in ("values", "errors", "start"):
                    b.attrs[k] = np.asarray(getattr(fit, k), float)
                for k in ("scatter", "f_scale"):
                    b.attrs[k] = float(getattr(fit, k))
                b.attrs["loss"] = fit.loss
                b.attrs["success"] = bool(fit.success)
                b.attrs["message"] = fit.message
                b.attrs["rounds"] = int(fit.rounds)
                b.attrs["nfev"] = int(fit.nfev)
                b.attrs["geometry"] = _json(_geom_dict(fit.geometry))
                b.create_dataset("covariance", data=fit.covariance)
                b.create_dataset("residuals", data=fit.residuals)
                b.create_dataset("inlier", data=fit.inlier)
            d = f.create_group("deviations", track_order=True)
            dd = deviations.as_dict()
            from .deviations import _DEV_FIELDS
            for k in _DEV_FIELDS:
                d.create_dataset(k, data=dd[k], **(kw if dd[k].size > 1 else {}))
            d.attrs["meta"] = _json(deviations.meta)
            if fit is not None:
                d.attrs["geometry"] = _json(_geom_dict(fit.geometry))
            elif "geometry" in deviations.meta:
                d.attrs["geometry"] = _json(deviations.meta["geometry"])
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return path


def read_trace_file(path):
    """Read a file written by :func:`write_trace_file`.

    Returns
    -------
    ridges : Ridges
    background : dict or None
        ``names, values, errors, covariance, residuals, inlier, geometry``
        (a :class:`kinkfit.geometry.DiskGeometry`) and the scalar attrs.
    deviations : kinkfit.deviations.Deviations
    """
    import json
    from pathlib import Path

    import h5py

    from .deviations import _DEV_FIELDS, Deviations
    from .errors import ResultFileError
    path = Path(path)
    try:
        f = h5py.File(path, "r")
    except (OSError, FileNotFoundError) as exc:
        raise ResultFileError(f"{path}: cannot open trace file ({exc})",
                              file=path) from None
    with f:
        if f.attrs.get("schema") != "kinkfit-trace":
            raise ResultFileError(f"{path} is not a kinkfit trace file",
                                  file=path, key="schema")
        g = f["ridges"]
        ridges = Ridges.from_dict({k: g[k][()] for k in g},
                                  json.loads(g.attrs["meta"]))
        background = None
        if "background" in f:
            b = f["background"]
            background = {k: b.attrs[k] for k in b.attrs}
            background["names"] = tuple(str(n) for n in b.attrs["names"])
            background["geometry"] = geometry_from_dict(json.loads(b.attrs["geometry"]))
            for k in ("covariance", "residuals", "inlier"):
                background[k] = b[k][()]
        d = f["deviations"]
        dev = Deviations(ridges, **{k: d[k][()] for k in _DEV_FIELDS},
                         meta=json.loads(d.attrs["meta"]))
    return ridges, background, dev
