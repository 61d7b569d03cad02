"""Forward model of what the ridge tracer measures when a wake is present.

The first-order kink ``-dv_los / |grad V_bg|`` evaluated at a traced point
is what an infinitely fine beam would see.  With a real beam the tracer
measures the peak of the *beam-smeared, filtered* channel profile along its
cut, and near a planet the wake varies on the scale of the beam: the traced
kink is smaller than the first-order one (by ~2-3x in the demo disk) and
displaced along the ridge.  This module predicts the traced peak itself.

Model of one traced point ``i`` (channel ``k``, cut centre ``c``, unit
direction ``u``, half window ``h``, template sigma ``t``; docs/physics/
response.md).  The channel image is the sum of a background part and the
change the wake makes to the front layer::

    I(p) = I_0(p) + sum_q B(p - q) S_eff(q) [Phi_k(V(q) + dv(q)) - Phi_k(V(q))]

with ``q`` the pixel centres of the cube's grid near the cut, ``B`` the
beam (unit sum on the grid, as :func:`kinkfit.synth.beam_kernel`), ``V``
the background line-of-sight velocity of the front layer, ``dv`` the wake's
line-of-sight excess there, ``Phi_k`` the Gaussian line averaged over
channel ``k`` (:func:`kinkfit.synth.channel_profile`) and
``S_eff = S_front - S_back Phi_back`` (the front layer hides the back one,
as in :func:`kinkfit.synth.make_cube`).  ``I_0`` is the noise-free model
cube of the background disk (:func:`kinkfit.deviations.model_cube`) -- the
same one that gives the beam-smearing bias.  Sampled along the cut and
filtered with the tracer's Gaussian template (normalised over the window,
as :func:`kinkfit.trace.peak_along_cuts`), ``F = K (P_0 + B' dI)``.  The
peak is located by a soft maximum of the profile (:func:`_soft_peak`),
applied alike to the data's own cut profile (``s_data``), to the background
model's (``s_0``) and to the model with the wake (``s``): a smooth function
of the parameters, where the tracer's nearest-local-maximum rule switches
between the two peaks of a kinked profile.  The model kink is
``kappa (s - s_0)`` and the data kink ``kappa (s_data - s_0)``, ``kappa`` =
d(first-order offset)/ds at the point; without a planet the model kink is
exactly zero and the beam-smearing bias is built in.

Everything but ``dv`` at the nodes is precomputed once per fit; an
evaluation costs one wake-model call at the nodes and, per walker, two error
functions per distinct (node, channel) pair, the weighted sums and the soft
maxima: :meth:`RidgeResponse.peaks` runs them in one compiled loop
(:func:`_peaks_kernel`) over a compact layout of the pairs
(:func:`_compact_layout`); :meth:`RidgeResponse.peaks_reference` is the plain
numpy form it is tested against.  The wake is applied to the front layer only
(the back layer's own kink is ignored).
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field

import numpy as np
from numba import njit
from scipy import ndimage
from scipy.special import erf

from .errors import KinkfitError

__all__ = ["RidgeResponse", "build_ridge_response"]

log = logging.getLogger(__name__)

_FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))
#: sharpness of the soft maximum that locates a cut profile's peak
PEAK_SHARPNESS = 6.0
_SQRT2 = math.sqrt(2.0)


def _channel_profile(v0, s2, lo, hi, scale):
    """``channel_profile`` with precomputed ``s2 = sqrt2 sigma`` and
    ``scale = sqrt(pi)/2 * s2 / width`` (the same formula)."""
    return scale * (erf((hi - v0) / s2) - erf((lo - v0) / s2))


@dataclass
class RidgeResponse:
    """Precomputed tracer response of a set of traced points.

    Attributes (``n`` points, ``Q`` nodes per point padded, ``M`` samples
    per cut padded, ``u`` unique nodes)
    ----------
    node_r_au, node_phi_rad : ndarray, shape (u,)
        Front-layer disk position of each unique node (pixel centre).
    node_a_r, node_a_phi : ndarray, shape (u,)
        Projection coefficients of the nodes (``dv_los = a_r dv_r +
        a_phi dv_phi``).
    node_index : ndarray of int, shape (n, Q)
        Unique-node index of each (point, node) pair (0 in padding).
    weight : ndarray, shape (n, M, Q)
        Filtered beam weights times ``S_eff`` (0 in padding).
    v_bg, s2, lo, hi, scale : ndarray, shape (n, Q)
        Background velocity, ``sqrt2 sigma_v``, channel bounds and profile
        scale of each pair (km/s).
    f0 : ndarray, shape (n, M)
        Filtered background profile along each cut.
    s_grid : ndarray, shape (n, M)
        Cut sample positions, arcsec (NaN in padding).
    inner : ndarray of bool, shape (n, M)
        Samples where a peak may be taken (away from the window edges).
    s_ref : ndarray, shape (n,)
        The tracer's peak position along each cut, arcsec (the model's
        samples are centred on it).
    s_data : ndarray, shape (n,)
        The data's half-maximum centroid along each cut (the same estimator
        as the model's), arcsec.
    s0 : ndarray, shape (n,)
        Background model's centroid, arcsec along the cut.
    kappa : ndarray, shape (n,)
        d(first-order offset)/ds at each point.
    """

    node_r_au: np.ndarray
    node_phi_rad: np.ndarray
    node_a_r: np.ndarray
    node_a_phi: np.ndarray
    node_index: np.ndarray
    weight: np.ndarray
    v_bg: np.ndarray
    s2: np.ndarray
    lo: np.ndarray
    hi: np.ndarray
    scale: np.ndarray
    f0: np.ndarray
    s_grid: np.ndarray
    inner: np.ndarray
    s_ref: np.ndarray
    s_data: np.ndarray
    s0: np.ndarray
    kappa: np.ndarray
    meta: dict = field(default_factory=dict)

    @property
    def n_points(self) -> int:
        return int(self.s0.size)

    @property
    def n_nodes(self) -> int:
        return int(self.node_r_au.size)

    @property
    def observed(self) -> np.ndarray:
        """The data's kinks, ``kappa (s_data - s0)``, arcsec, shape (n,)."""
        return self.kappa * (self.s_data - self.s0)

    def _phi0(self):
        if not hasattr(self, "_phi0_cache"):
            self._phi0_cache = _channel_profile(self.v_bg, self.s2, self.lo,
                                                self.hi, self.scale)
        return self._phi0_cache

    def _layout(self):
        if not hasattr(self, "_layout_cache"):
            self._layout_cache = _compact_layout(self)
        return self._layout_cache

    def peaks(self, dv_los_nodes: np.ndarray) -> np.ndarray:
        """Predicted peak positions along the cuts (compiled).

        The same quantity as :meth:`peaks_reference`, evaluated in one
        compiled loop (:func:`_peaks_kernel`): the error functions once per
        distinct (node, channel edge), the weighted sum and the soft
        maximum per point, without (m, n, M, Q) temporaries.  Equal to the
        reference to round-off (the summation order differs; channel edges
        of a node within 1e-12 km/s are taken as one): 5e-16 arcsec on the
        demo.

        Parameters
        ----------
        dv_los_nodes : ndarray, shape (m, u)
            Line-of-sight velocity excess of the wake at the nodes, km/s.

        Returns
        -------
        ndarray, shape (m, n)
            Peak positions, arcsec along each cut.
        """
        dv = np.ascontiguousarray(np.atleast_2d(np.asarray(dv_los_nodes,
                                                           dtype=float)))
        return self._run_kernel(dv, dv, False)

    def peaks_from_wake(self, dv_r_nodes: np.ndarray,
                        dv_phi_nodes: np.ndarray) -> np.ndarray:
        """:meth:`peaks` of the wake's ``(dv_r, dv_phi)`` at the nodes.

        The line-of-sight projection ``dv_los = a_r dv_r + a_phi dv_phi``
        (``node_a_r``, ``node_a_phi``) is done inside the kernel, node by
        node, with the same arithmetic (no (m, u) temporaries).

        Parameters
        ----------
        dv_r_nodes, dv_phi_nodes : ndarray, shape (m, u)
            Radial and azimuthal velocity excess at the nodes, km/s.

        Returns
        -------
        ndarray, shape (m, n)
            Peak positions, arcsec along each cut.
        """
        dr = np.ascontiguousarray(np.atleast_2d(np.asarray(dv_r_nodes,
                                                           dtype=float)))
        dp = np.ascontiguousarray(np.atleast_2d(np.asarray(dv_phi_nodes,
                                                           dtype=float)))
        if dr.shape != dp.shape:
            raise ValueError(f"dv_r {dr.shape} and dv_phi {dp.shape} differ")
        return self._run_kernel(dr, dp, True)

    def _run_kernel(self, dr, dp, project):
        if dr.shape[1] != self.n_nodes:
            raise ValueError(f"the wake is given at {dr.shape[1]} nodes, the "
                             f"response has {self.n_nodes}")
        out = np.empty((dr.shape[0], self.n_points))
        _run(self._layout(), dr, dp, project, out)
        return out

    def peaks_reference(self, dv_los_nodes: np.ndarray) -> np.ndarray:
        """:meth:`peaks` in plain numpy, walker by walker (the reference).

        Parameters
        ----------
        dv_los_nodes : ndarray, shape (m, u)
            Line-of-sight velocity excess of the wake at the nodes, km/s.

        Returns
        -------
        ndarray, shape (m, n)
            Peak positions, arcsec along each cut.
        """
        dv = np.atleast_2d(np.asarray(dv_los_nodes, dtype=float))
        m = dv.shape[0]
        out = np.empty((m, self.n_points))
        phi0 = self._phi0()
        for j in range(m):
            dvp = dv[j][self.node_index]                      # (n, Q)
            dphi = _channel_profile(self.v_bg + dvp, self.s2, self.lo,
                                    self.hi, self.scale) - phi0
            f = self.f0 + np.einsum("nmq,nq->nm", self.weight, dphi)
            out[j] = _soft_peak(f, self.s_grid, self.inner)
        return out

    def offsets(self, dv_los_nodes: np.ndarray) -> np.ndarray:
        """Model kinks ``kappa (s - s0)``, arcsec, shape (m, n).

        ``s0`` is taken as the kernel computes it (:func:`_compact_layout`),
        equal to ``self.s0`` to round-off: without a wake the kink is then
        exactly 0.
        """
        s0 = self._layout()["s0"]
        return self.kappa[None, :] * (self.peaks(dv_los_nodes) - s0[None, :])

    def offsets_reference(self, dv_los_nodes: np.ndarray) -> np.ndarray:
        """:meth:`offsets` from :meth:`peaks_reference` and ``self.s0``."""
        return self.kappa[None, :] * (self.peaks_reference(dv_los_nodes)
                                      - self.s0[None, :])

    def offsets_from_wake(self, dv_r_nodes: np.ndarray,
                          dv_phi_nodes: np.ndarray) -> np.ndarray:
        """:meth:`offsets` of the wake's ``(dv_r, dv_phi)`` at the nodes
        (projected inside the kernel, :meth:`peaks_from_wake`), arcsec,
        shape (m, n)."""
        s0 = self._layout()["s0"]
        return self.kappa[None, :] * (self.peaks_from_wake(
            dv_r_nodes, dv_phi_nodes) - s0[None, :])

    def __getstate__(self):
        state = dict(self.__dict__)
        state.pop("_phi0_cache", None)
        state.pop("_layout_cache", None)
        return state


#: channel edges of one node closer than this (km/s) are one edge: adjacent
#: channels share an edge up to the rounding of ``v_k +- width/2``
_EDGE_MERGE_KMS = 1e-12


def _compact_layout(resp: RidgeResponse) -> dict:
    """Compact arrays of a response for :func:`_peaks_kernel`.

    The (point, node) pairs of ``resp`` (padding dropped: the pairs whose
    profile scale and weights are all zero) are grouped by their distinct
    (node, background velocity, line width, channel bounds, scale): the
    channel profile of such a group is the same number for every point that
    uses it.  Its two error functions are those of its channel's edges, and
    a node seen in adjacent channels shares an edge between them: the
    distinct (node, edge) values (``e_*``; edges within
    :data:`_EDGE_MERGE_KMS` merged, a change of the profile below 1e-14)
    are evaluated once per walker, the pairs index them (``p_lo``,
    ``p_hi``).  Per point the pairs are listed contiguously (``ptr``,
    ``pair``) with their weight rows ``w`` (pair entry, sample).
    """
    n, Q = resp.node_index.shape
    weight = np.asarray(resp.weight, float)
    real = (np.asarray(resp.scale) != 0) | np.any(weight != 0, axis=1)
    ii, qq = np.nonzero(real)                     # row-major: point by point
    key = np.column_stack([resp.node_index[ii, qq].astype(float),
                           resp.v_bg[ii, qq], resp.s2[ii, qq],
                           resp.lo[ii, qq], resp.hi[ii, qq],
                           resp.scale[ii, qq]])
    uniq, inverse = np.unique(key, axis=0, return_inverse=True)
    inverse = np.asarray(inverse).ravel()
    npair = uniq.shape[0]
    # distinct (node, v, s2) and their edges
    _, kid = np.unique(uniq[:, :3], axis=0, return_inverse=True)
    kid = np.asarray(kid).ravel()
    ek = np.concatenate([kid, kid])
    ex = np.concatenate([uniq[:, 3], uniq[:, 4]])
    order = np.lexsort((ex, ek))
    new_edge = np.ones(order.size, dtype=bool)
    new_edge[1:] = (np.diff(ek[order]) != 0) | \
        (np.diff(ex[order]) > _EDGE_MERGE_KMS)
    eid_sorted = np.cumsum(new_edge) - 1
    eid = np.empty(order.size, dtype=np.int64)
    eid[order] = eid_sorted
    first = order[new_edge]                       # representative of each edge
    src = np.concatenate([np.arange(npair), np.arange(npair)])[first]
    ptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.bincount(ii, minlength=n), out=ptr[1:])
    inner = np.ascontiguousarray(resp.inner, dtype=np.bool_)
    lay = {"e_node": np.ascontiguousarray(uniq[src, 0].astype(np.int64)),
           "e_v": np.ascontiguousarray(uniq[src, 1]),
           "e_s2": np.ascontiguousarray(uniq[src, 2]),
           "e_x": np.ascontiguousarray(ex[first]),
           "p_lo": np.ascontiguousarray(eid[:npair]),
           "p_hi": np.ascontiguousarray(eid[npair:]),
           "scale": np.ascontiguousarray(uniq[:, 5]),
           "ptr": ptr, "pair": np.ascontiguousarray(inverse, dtype=np.int64),
           "w": np.ascontiguousarray(weight[ii, :, qq]),     # (entries, M)
           "f0": np.ascontiguousarray(resp.f0, dtype=float),
           "s_grid": np.ascontiguousarray(resp.s_grid, dtype=float),
           "inner": inner,
           "a_r": np.ascontiguousarray(resp.node_a_r, dtype=float),
           "a_phi": np.ascontiguousarray(resp.node_a_phi, dtype=float)}
    lay["e_erf0"] = _edge_values(lay["e_x"], lay["e_v"], lay["e_s2"])
    lay["phi0"] = lay["scale"] * (lay["e_erf0"][lay["p_hi"]]
                                  - lay["e_erf0"][lay["p_lo"]])
    # the background peak s0 as the kernel computes it (its sums run in
    # another order than numpy's: ~1e-17 arcsec apart), so that a zero wake
    # gives exactly zero kinks; where the builder replaced a failed peak
    # (s0 = 0) the builder's value is kept
    zero = np.zeros((1, resp.n_nodes))
    s0k = np.empty((1, n))
    _run(lay, zero, zero, False, s0k)
    s0 = np.asarray(resp.s0, float)
    same = np.abs(s0k[0] - s0) <= 1e-12 * np.maximum(np.abs(s0), 1e-3)
    lay["s0"] = np.where(same, s0k[0], s0)
    return lay


def _run(lay, dr, dp, project, out):
    """:func:`_peaks_kernel` on a layout."""
    _peaks_kernel(dr, dp, lay["a_r"], lay["a_phi"], project, lay["e_node"],
                  lay["e_v"], lay["e_s2"], lay["e_x"], lay["e_erf0"],
                  lay["p_lo"], lay["p_hi"], lay["scale"], lay["phi0"],
                  lay["ptr"], lay["pair"], lay["w"], lay["f0"],
                  lay["s_grid"], lay["inner"], float(PEAK_SHARPNESS), out)


@njit(cache=True)
def _edge_values(x, v, s2):  # pragma: no cover - compiled
    """``erf((x - v) / s2)`` element by element with ``math.erf`` (the
    kernel's own error function and arithmetic, so that a zero excess gives
    exactly the background profile)."""
    out = np.empty(x.size)
    for e in range(x.size):
        out[e] = math.erf((x[e] - (v[e] + 0.0)) / s2[e])
    return out


@njit(cache=True)
def _peaks_kernel(dr, dp, a_r, a_phi, project, e_node, e_v, e_s2, e_x, e_erf0,
                  p_lo, p_hi, scale, phi0, ptr, pair, w, f0, s_grid, inner,
                  sharpness, out):  # pragma: no cover - compiled
    """Soft-maximum peak of every (walker, point) into ``out`` (m, n).

    The excess at node ``u`` is ``dr[k, u]`` (``project`` false) or
    ``dr[k, u] a_r[u] + dp[k, u] a_phi[u]`` (true).  First the error
    function of every distinct (node, edge) for every walker (not evaluated
    where the node's excess is exactly 0: the background value), the change
    of each distinct pair's channel profile ``scale (E_hi - E_lo) - phi0``
    (exactly 0 without excess, as the reference's); then, point by point,
    ``f = f0 + sum_e w[e] dphi[pair[e]]`` for all walkers at once (each
    weight row is read once per call, not once per walker: the weights are
    megabytes) and :func:`_soft_peak` of it over the inner samples (same
    formula, NaN where it has none).
    """
    m = dr.shape[0]
    nedge = e_node.shape[0]
    npair = scale.shape[0]
    n = f0.shape[0]
    M = f0.shape[1]
    E = np.empty((nedge, m))
    for e in range(nedge):
        u = e_node[e]
        ve = e_v[e]
        xe = e_x[e]
        se = e_s2[e]
        for k in range(m):
            if project:
                d = dr[k, u] * a_r[u] + dp[k, u] * a_phi[u]
            else:
                d = dr[k, u]
            if d == 0.0:
                E[e, k] = e_erf0[e]
            else:
                E[e, k] = math.erf((xe - (ve + d)) / se)
    dphi = np.empty((npair, m))
    for p in range(npair):
        hp = p_hi[p]
        lp = p_lo[p]
        cp = scale[p]
        pp = phi0[p]
        for k in range(m):
            dphi[p, k] = cp * (E[hp, k] - E[lp, k]) - pp
    acc = np.empty((m, M))
    for i in range(n):
        # all M rows (fixed-length loops over row views vectorise; the rows
        # where no peak may be taken are computed and ignored)
        f0i = f0[i]
        for k in range(m):
            ak = acc[k]
            for r in range(M):
                ak[r] = 0.0
        for e in range(ptr[i], ptr[i + 1]):
            pe = pair[e]
            we = w[e]
            for k in range(m):
                dpe = dphi[pe, k]
                ak = acc[k]
                for r in range(M):
                    ak[r] += we[r] * dpe
        for k in range(m):
            ak = acc[k]
            top = -np.inf
            bad = False
            for r in range(M):
                if inner[i, r]:
                    ak[r] = f0i[r] + ak[r]
                    if ak[r] > top:
                        top = ak[r]
                    elif not (ak[r] <= top):
                        bad = True          # NaN (np.max propagates it)
            if bad or not (abs(top) < np.inf):
                out[k, i] = np.nan          # also: no inner sample
                continue
            sc = abs(top) if abs(top) > 0 else 1.0
            tot = 0.0
            num = 0.0
            for r in range(M):
                if inner[i, r]:
                    wt = math.exp(sharpness * (ak[r] - top) / sc)
                    tot += wt
                    num += wt * s_grid[i, r]
            out[k, i] = num / tot if tot > 0 else np.nan
    return 0


def _soft_peak(f, s_grid, inner, sharpness=None):
    """Soft maximum position of each row (inner samples only).

    ``s = sum w s / sum w``, ``w = exp(sharpness (f - max f) / max f)``: a
    smooth function of the profile (two nearly equal peaks are averaged
    instead of switching), equal to the peak for a symmetric one, and
    local (samples below ~0.9 of the maximum hardly count, so a broad band
    cut by the window is measured at its top).  ``f`` (n, M).
    """
    if sharpness is None:
        sharpness = PEAK_SHARPNESS
    fi = np.where(inner, f, -np.inf)
    top = np.max(fi, axis=1, keepdims=True)
    scale = np.where(np.abs(top) > 0, np.abs(top), 1.0)
    with np.errstate(invalid="ignore", over="ignore"):
        w = np.where(inner, np.exp(sharpness * (f - top) / scale), 0.0)
    tot = w.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        c = (w * s_grid).sum(axis=1) / tot
    return np.where(tot > 0, c, np.nan)


def build_ridge_response(cube, ridges, geom, emission, *, background=None,
                         reach_sigma: float = 2.5,
                         search_beams: float = 1.5,
                         node_stride: int = 1,
                         back_layer: bool = True,
                         back_stride: int = 2,
                         node_oversample: int = 1) -> RidgeResponse:
    """Precompute the tracer response of traced points (module docstring).

    Parameters
    ----------
    cube : kinkfit.cube.Cube
        The data cube (pixel grid, channels, beams).
    ridges : kinkfit.trace.Ridges
        Traced points with their cuts (``cut_x_arcsec``, ``dir_x``,
        ``template_arcsec``, ``half_window_arcsec``...).
    geom : kinkfit.geometry.DiskGeometry
        The background disk the points were measured against.
    emission : kinkfit.synth.LineEmission
        Emission profile of the background model (the bias model's).
    background : kinkfit.cube.Cube, optional
        Noise-free background model cube (default:
        :func:`kinkfit.deviations.model_cube`).
    reach_sigma : float
        Nodes within this many beam sigmas (major axis) of a cut are used.
    search_beams : float
        The model's peak is looked for within this many beam FWHM of the
        data's peak (a model kink beyond it saturates there).
    node_stride : int
        Use every ``node_stride``-th pixel (both axes) as a node, with
        weights scaled by ``node_stride**2`` (a coarser quadrature of the
        beam integral: ``node_stride`` pixels should stay below ~1.7 beam
        sigmas; the wake changes on the pixel scale near the planet and in
        shocks: on the demo disk stride 2 makes the model kinks 6% too
        large, stride 1 agrees with the generator's cube to 0.2%).
    back_layer : bool
        Also apply the wake to the back layer (its emission seen through
        the front layer).  False: the front layer only.
    back_stride : int
        Back-layer nodes on every ``back_stride``-th pixel of the
        ``node_stride`` nodes (weights scaled by ``back_stride**2``).  On
        the demo disk 2 agrees with 1 (model-vs-generator slope 1.000 and
        0.997, residual rms 0.18 and 0.20 mas) with a third fewer nodes.
    node_oversample : int
        Nodes per pixel and axis: each pixel's layers are sampled at
        ``node_oversample**2`` sub-pixel centres (the wake, the background
        velocity, the brightness and the line width at each), each with the
        pixel's beam weight divided by ``node_oversample**2`` -- the
        pixel-average emission of :func:`kinkfit.synth.make_cube`.  1: the
        pixel centres.  Worth it where a pixel is a sizeable part of the
        wake's scale (docs/physics/response.md: 0.04" pixels at 100 pc,
        inviscid wakes of 1.5-3.5 Mjup: slope of the generator's traced
        kinks on the model 0.89-0.99 at 1 with ``back_stride`` 2, 0.98-0.99
        at 2 and 0.99-1.00 at 3 with ``back_stride`` 1).

    Returns
    -------
    RidgeResponse
    """
    from .deviations import model_cube, signed_offsets
    from .geometry import (background_velocity, projection_coefficients,
                           sky_to_disk)
    from .synth import channel_profile
    from .trace import _grid, _to_index

    n = len(ridges)
    if n == 0:
        raise KinkfitError("no traced points: nothing to model")
    if background is None:
        background = model_cube(cube, geom, emission)
    x, y, x0, dx, y0, dy = _grid(cube)
    pix = float(cube.pixel_arcsec)
    vel = np.asarray(cube.velocity_kms, float)
    dv_ch = float(cube.channel_width_kms)
    cx = np.asarray(ridges.cut_x_arcsec, float)
    cy = np.asarray(ridges.cut_y_arcsec, float)
    ux = np.asarray(ridges.dir_x, float)
    uy = np.asarray(ridges.dir_y, float)
    half = np.asarray(ridges.half_window_arcsec, float)
    tmpl = np.asarray(ridges.template_arcsec, float)
    chan = np.asarray(ridges.channel, int)
    s_data = (ridges.x_arcsec - cx) * ux + (ridges.y_arcsec - cy) * uy

    # sampling of each cut (odd count, step <= min(t/2, pix/2)); the model
    # profile is kept at the samples within search_beams FWHM of the data's
    # peak (padded to M)
    step_max = np.minimum(0.5 * tmpl, 0.5 * pix)
    ns = (2 * np.ceil(half / step_max) + 1).astype(int)
    fwhm = np.sqrt(np.asarray(cube.beam_major_arcsec, float)[chan]
                   * np.asarray(cube.beam_minor_arcsec, float)[chan])
    search = search_beams * fwhm
    steps = 2.0 * half / (ns - 1)
    M = int(np.max(np.minimum(ns, 2 * np.ceil(search / steps) + 3)))
    # pixel nodes near each cut
    bmaj = np.asarray(cube.beam_major_arcsec, float)[chan]
    bmin = np.asarray(cube.beam_minor_arcsec, float)[chan]
    bpa = np.radians(np.asarray(cube.beam_pa_deg, float)[chan])
    smaj = bmaj / _FWHM_PER_SIGMA
    smin = bmin / _FWHM_PER_SIGMA
    reach = reach_sigma * smaj + 0.5 * pix
    node_lists = []
    for i in range(n):
        ends_x = cx[i] + np.array([-half[i], half[i]]) * ux[i]
        ends_y = cy[i] + np.array([-half[i], half[i]]) * uy[i]
        r_lo, c_lo = _to_index(np.array([ends_x.min() - reach[i]]),
                               np.array([ends_y.min() - reach[i]]), x0, dx, y0, dy)
        r_hi, c_hi = _to_index(np.array([ends_x.max() + reach[i]]),
                               np.array([ends_y.max() + reach[i]]), x0, dx, y0, dy)
        rows = np.arange(int(math.floor(min(r_lo[0], r_hi[0]))),
                         int(math.ceil(max(r_lo[0], r_hi[0]))) + 1)
        cols = np.arange(int(math.floor(min(c_lo[0], c_hi[0]))),
                         int(math.ceil(max(c_lo[0], c_hi[0]))) + 1)
        rows = rows[(rows >= 0) & (rows < y.size)]
        cols = cols[(cols >= 0) & (cols < x.size)]
        rr, cc = np.meshgrid(rows, cols, indexing="ij")
        rr, cc = rr.ravel(), cc.ravel()
        qx, qy = x[cc], y[rr]
        # distance from the cut segment
        t = np.clip((qx - cx[i]) * ux[i] + (qy - cy[i]) * uy[i], -half[i], half[i])
        d = np.hypot(qx - (cx[i] + t * ux[i]), qy - (cy[i] + t * uy[i]))
        keep = (d <= reach[i]) & (rr % node_stride == 0) & \
            (cc % node_stride == 0)
        node_lists.append(rr[keep] * x.size + cc[keep])
    flat = np.unique(np.concatenate(node_lists))
    # sub-pixel nodes: node j of pixel p is entry p * nsub + j of the node
    # arrays below; the beam weight is the pixel's (``bx, by``), the layers
    # are evaluated at the sub-pixel centres (``gx, gy``), as the generator
    # averages its sub-pixels before convolving with the beam
    nos = int(node_oversample)
    if nos < 1:
        raise ValueError(f"node_oversample must be >= 1, got {node_oversample!r}")
    nsub = nos * nos
    sub = ((np.arange(nos) + 0.5) / nos - 0.5) * pix
    fr = np.repeat(flat // x.size, nsub)
    fc = np.repeat(flat % x.size, nsub)
    bx, by = x[fc], y[fr]
    gx = bx + np.tile(np.repeat(sub, nos), flat.size)
    gy = by + np.tile(np.tile(sub, nos), flat.size)
    r_f, phi_f, _ = sky_to_disk(geom, gx, gy, "front")
    on = np.isfinite(r_f) & (r_f <= float(emission.r_out_au))
    v_f = background_velocity(geom, gx, gy, surface="front")
    v_b = background_velocity(geom, gx, gy, surface="back")
    r_b, phi_b, _ = sky_to_disk(geom, gx, gy, "back")
    s_front = np.where(on, emission.brightness_jy_beam(np.where(on, r_f, 1.0),
                                                       "front"), 0.0)
    sig_f = emission.line_sigma_kms(np.where(on, r_f, 1.0))
    has_back = np.isfinite(r_b) & (r_b <= float(emission.r_out_au)) & \
        (float(emission.back_ratio) > 0)
    s_back = np.where(has_back, emission.brightness_jy_beam(
        np.where(has_back, r_b, 1.0), "back"), 0.0)
    sig_b = emission.line_sigma_kms(np.where(has_back, r_b, 1.0))
    # unique nodes: the pixels' front-layer positions, then (with
    # ``back_layer``) their back-layer positions -- the wake moves the back
    # layer's emission too, and near the front ridge that shifts the traced
    # peak (~10% of the kink on the demo disk)
    keep_u = on & np.isfinite(v_f)
    keep_b = has_back & np.isfinite(v_b) & bool(back_layer)
    if back_stride > 1:
        # the back layer's kink is a ~10% part of the traced one: a coarser
        # quadrature of its beam integral (weights x back_stride**2)
        bs = int(back_stride) * int(node_stride)
        keep_b = keep_b & (fr % bs == 0) & (fc % bs == 0)
    n_front = int(keep_u.sum())
    ui = -np.ones(fr.size, dtype=int)
    ui[keep_u] = np.arange(n_front)
    ub = -np.ones(fr.size, dtype=int)
    ub[keep_b] = n_front + np.arange(int(keep_b.sum()))
    node_r = np.concatenate([r_f[keep_u], r_b[keep_b]])
    node_phi = np.concatenate([phi_f[keep_u], phi_b[keep_b]])
    a_r, a_phi, _ = projection_coefficients(geom, node_phi)
    # each point's pixels as positions in `flat`: front-layer nodes and
    # back-layer nodes (one (point, node) pair each)
    pos_all = [(np.searchsorted(flat, nl)[:, None] * nsub
                + np.arange(nsub)[None, :]).ravel() for nl in node_lists]
    pos_lists = [p[keep_u[p]] for p in pos_all]
    pos_back = [p[keep_b[p]] for p in pos_all]
    Q = max(max(p.size + b.size for p, b in zip(pos_lists, pos_back)), 1)

    node_index = np.zeros((n, Q), dtype=np.int64)
    weight = np.zeros((n, M, Q))
    v_bg = np.zeros((n, Q))
    s2 = np.ones((n, Q))
    lo = np.zeros((n, Q))
    hi = np.ones((n, Q))
    scale = np.zeros((n, Q))
    s_grid = np.full((n, M), np.nan)
    inner = np.zeros((n, M), dtype=bool)
    f0 = np.zeros((n, M))
    fd = np.zeros((n, M))
    img_cache = {}
    data_cache = {}
    for i in range(n):
        pos = pos_lists[i]
        q = pos.size
        k = chan[i]
        nsi = ns[i]
        u = np.linspace(-1.0, 1.0, nsi)
        s = half[i] * u
        step = s[1] - s[0]
        margin = max(2, int(math.ceil(0.5 * tmpl[i] / step)))
        inner_full = np.zeros(nsi, dtype=bool)
        inner_full[margin:nsi - margin] = True
        # kept samples: a run of at most M around the data's peak
        j0 = int(np.clip(np.searchsorted(s, s_data[i] - search[i]) - 1,
                         0, max(nsi - M, 0)))
        sel = np.arange(j0, min(j0 + M, nsi))
        nk = sel.size
        # pad beyond the kept run with the same step (never chosen)
        s_grid[i] = s[sel[0]] + step * np.arange(M)
        inner[i, :nk] = inner_full[sel]
        px = cx[i] + s * ux[i]
        py = cy[i] + s * uy[i]
        # template filter, normalised over the window (as the tracer)
        dd = (s[sel, None] - s[None, :]) / tmpl[i]
        kern = np.exp(-0.5 * dd ** 2)
        kern /= kern.sum(axis=1, keepdims=True)
        # background profile from the model cube, sampled like the tracer
        if k not in img_cache:
            img_cache[k] = np.asarray(background.data[k], float)
        rows, cols = _to_index(px, py, x0, dx, y0, dy)
        prof = ndimage.map_coordinates(img_cache[k], [rows, cols], order=1,
                                       mode="constant", cval=0.0,
                                       prefilter=False)
        f0[i, :nk] = kern @ np.nan_to_num(prof)
        f0[i, nk:] = f0[i, nk - 1]
        if k not in data_cache:
            data_cache[k] = np.nan_to_num(np.asarray(cube.data[k], float))
        prof_d = ndimage.map_coordinates(data_cache[k], [rows, cols], order=1,
                                         mode="constant", cval=0.0,
                                         prefilter=False)
        fd[i, :nk] = kern @ prof_d
        fd[i, nk:] = fd[i, nk - 1]
        pb = pos_back[i]
        qb = pb.size
        if q + qb == 0:
            continue
        both = np.concatenate([pos, pb])
        qx, qy = bx[both], by[both]
        # beam at (p_m - q), unit sum on the pixel grid, seen through the
        # tracer's bilinear interpolation of the image: the beam sum at the
        # four pixel centres around p_m, bilinearly weighted (the same
        # smoothing as the background profile f0, or the ratio of the two
        # -- the peak shift -- is biased; by ~10% on a uniform flow)
        beam = np.zeros((nsi, q + qb))
        r0_ = np.floor(rows).astype(int)
        c0_ = np.floor(cols).astype(int)
        fr_, fc_ = rows - r0_, cols - c0_
        for dr, dc in ((0, 0), (0, 1), (1, 0), (1, 1)):
            wgt = (fr_ if dr else 1.0 - fr_) * (fc_ if dc else 1.0 - fc_)
            rr_ = np.clip(r0_ + dr, 0, y.size - 1)
            cc_ = np.clip(c0_ + dc, 0, x.size - 1)
            ex = x[cc_][:, None] - qx[None, :]
            ey = y[rr_][:, None] - qy[None, :]
            a = ex * math.sin(bpa[i]) + ey * math.cos(bpa[i])
            b = ex * math.cos(bpa[i]) - ey * math.sin(bpa[i])
            beam += wgt[:, None] * np.exp(
                -0.5 * ((a / smaj[i]) ** 2 + (b / smin[i]) ** 2))
        beam *= (node_stride * pix) ** 2 / (2.0 * math.pi * smaj[i] * smin[i]
                                            * nsub)
        lo_k, hi_k = vel[k] - 0.5 * dv_ch, vel[k] + 0.5 * dv_ch
        phib = np.where(has_back[pos], channel_profile(
            v_b[pos], sig_b[pos], lo_k, hi_k), 0.0)
        s_eff = s_front[pos] - s_back[pos] * np.nan_to_num(phib)
        kb = kern @ beam
        weight[i, :nk, :q] = kb[:, :q] * s_eff[None, :]
        node_index[i, :q] = ui[pos]
        v_bg[i, :q] = v_f[pos]
        s2[i, :q] = _SQRT2 * sig_f[pos]
        if qb:
            # the back layer's change, seen through the unperturbed front
            # layer: S_back (1 - Phi_front) dPhi_back (the product of the
            # two layers' changes, second order, is dropped)
            phif = np.where(keep_u[pb], channel_profile(
                v_f[pb], sig_f[pb], lo_k, hi_k), 0.0)
            weight[i, :nk, q:q + qb] = kb[:, q:] * (
                s_back[pb] * (1.0 - np.nan_to_num(phif))
                * float(back_stride) ** 2)[None, :]
            node_index[i, q:q + qb] = ub[pb]
            v_bg[i, q:q + qb] = v_b[pb]
            s2[i, q:q + qb] = _SQRT2 * sig_b[pb]
        lo[i, :q + qb], hi[i, :q + qb] = lo_k, hi_k
        scale[i, :q + qb] = math.sqrt(math.pi) / 2.0 * s2[i, :q + qb] / dv_ch
    s_grid = np.nan_to_num(s_grid)
    s0 = _soft_peak(f0, s_grid, inner)
    s_meas = _soft_peak(fd, s_grid, inner)
    bad = ~(np.isfinite(s0) & np.isfinite(s_meas))
    s0 = np.where(bad, 0.0, s0)
    s_meas = np.where(bad, 0.0, s_meas)
    # d(first-order offset)/ds at each point, by a central difference
    eps = 0.25 * pix
    surf = np.where(np.asarray(ridges.surface) == 1, "back", "front")
    kappa = np.ones(n)
    for name in ("front", "back"):
        mk = surf == name
        if not np.any(mk):
            continue
        px, py = ridges.x_arcsec[mk], ridges.y_arcsec[mk]
        vv = ridges.velocity_kms[mk]
        code = np.asarray(ridges.surface)[mk]
        op, _ = signed_offsets(geom, px + eps * ux[mk], py + eps * uy[mk], vv, code)
        om, _ = signed_offsets(geom, px - eps * ux[mk], py - eps * uy[mk], vv, code)
        kk = (op - om) / (2.0 * eps)
        kappa[mk] = np.where(np.isfinite(kk), kk, 1.0)
    log.info("ridge response: %d points, %d nodes (%d front, %d back; %d "
             "per point, padded), %d samples per cut", n, node_r.size,
             n_front, node_r.size - n_front, Q, M)
    return RidgeResponse(
        node_r_au=node_r, node_phi_rad=node_phi, node_a_r=a_r,
        node_a_phi=a_phi, node_index=node_index, weight=weight, v_bg=v_bg,
        s2=s2, lo=lo, hi=hi, scale=scale, f0=f0, s_grid=s_grid,
        inner=inner, s_ref=s_data, s_data=s_meas, s0=s0, kappa=kappa,
        meta={"reach_sigma": reach_sigma, "node_stride": node_stride,
              "node_oversample": nos,
              "n_nodes": int(node_r.size), "n_front_nodes": n_front,
              "back_layer": bool(back_layer),
              "nodes_per_point_padded": Q, "samples_per_cut": M})
