"""Disk geometry: sky <-> disk frames, emitting surfaces, projected velocities.

Conventions are those of ``DEVELOPERS.md`` ("Sky and disk frames"):

* sky Cartesian frame ``(east, north, away)``, right-handed, offsets in arcsec
  from the chosen centre, ``v_los > 0`` receding;
* disk frame ``(X, Y, Z)``: ``X`` along the red-shifted major axis (unit vector
  ``m`` at position angle PA east of north), ``Y = cos i p + sin i a`` with
  ``p`` the unit vector at ``PA + rotation * 90 deg`` and ``a`` pointing away
  from the observer, ``Z = X x Y``; the gas orbits in the ``+phi`` sense about
  ``+Z``;  ``phi = 0`` is the red-shifted major axis, ``phi = 90 deg`` the far
  side of the minor axis.

Working the cross product out gives the disk -> sky rotation matrix (columns
are X, Y, Z expressed in (east, north, away); ``s = rotation``)::

    X = ( sin PA,           cos PA,            0        )
    Y = ( s cos i cos PA,  -s cos i sin PA,    sin i    )
    Z = ( sin i cos PA,    -sin i sin PA,     -s cos i  )

so ``+Z`` points towards the observer for ``rotation = +1`` and away from
the observer for ``rotation = -1``; the ``front`` surface (observer's side)
therefore sits at ``z = +s h(r)`` along disk ``+Z`` and the ``back`` surface
at ``z = -s h(r)``.  The line-of-sight projection of a velocity
``v_r r_hat + v_phi phi_hat + v_z Z`` is::

    v_los - vsys = sin i sin(phi) v_r + sin i cos(phi) v_phi - s cos i v_z

The derivation, and the ray-surface intersection used by :func:`sky_to_disk`,
are written out in ``docs/physics/geometry.md``.

All functions are pure: floats and arrays in, arrays out.  Radii and heights
in au, angles in radians unless the name says ``_deg``, sky offsets in arcsec,
velocities in km/s.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .constants import AU_PER_ARCSEC_PER_PC, GM_SUN, AU, KM
from .errors import ConfigError, PhysicsRangeError

__all__ = [
    "EmittingSurface",
    "DiskGeometry",
    "rotation_matrix",
    "surface_sign",
    "surface_point",
    "disk_to_sky",
    "sky_to_disk",
    "rotation_speed_kms",
    "los_velocity",
    "projection_coefficients",
    "background_velocity",
    "velocity_gradient",
    "SURFACES",
]

#: Names of the two emitting layers.
SURFACES = ("front", "back")

# Scan grid (in units of the height at the flat-disk radius) used to bracket
# the ray-surface intersection: fine linear steps to 2 h, then geometric steps
# (8 per factor of two) up to 2**12 h.
_SCAN = np.concatenate([np.linspace(0.0, 2.0, 41)[1:],
                        np.geomspace(2.0, 2.0 ** 12, 11 * 8 + 1)[1:]])
_MAX_ITER = 60       # golden-section steps; cap on Newton/bisection polish steps


def _finite(name, value):
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise PhysicsRangeError(f"{name} must be a number, got {value!r}",
                                key=name, value=value) from None
    if not math.isfinite(v):
        raise PhysicsRangeError(f"{name} must be finite, got {value!r}",
                                key=name, value=value)
    return v


@dataclass(frozen=True)
class EmittingSurface:
    """Height of an emitting layer above the midplane.

    ``z(r) = aspect * r_ref * (r / r_ref)**flaring * exp(-(r / taper)**2)``
    (au), the exponential factor only when ``taper_au`` is set.

    Parameters
    ----------
    aspect : float
        ``z / r`` at ``r_ref_au`` (dimensionless, >= 0); 0 is a flat disk.
    flaring : float
        Power-law index of the height (>= 0), 1 is a cone.
    r_ref_au : float
        Reference radius, au (> 0).
    taper_au : float or None
        Radius of the Gaussian taper, au (> 0), or None for no taper.

    Examples
    --------
    >>> round(float(EmittingSurface(0.3, 1.25).height_au(100.0)), 6)
    30.0
    """

    aspect: float
    flaring: float = 1.0
    r_ref_au: float = 100.0
    taper_au: float | None = None

    def __post_init__(self):
        a = _finite("aspect", self.aspect)
        f = _finite("flaring", self.flaring)
        r = _finite("r_ref_au", self.r_ref_au)
        if a < 0:
            raise PhysicsRangeError(f"surface aspect must be >= 0, got {a}",
                                    key="aspect", value=a)
        if f < 0:
            raise PhysicsRangeError(f"surface flaring must be >= 0, got {f}",
                                    key="flaring", value=f)
        if r <= 0:
            raise PhysicsRangeError(f"surface r_ref_au must be > 0, got {r}",
                                    key="r_ref_au", value=r)
        t = self.taper_au
        if t is not None:
            t = _finite("taper_au", t)
            if t <= 0:
                raise PhysicsRangeError(
                    f"surface taper_au must be > 0 or None, got {t}",
                    key="taper_au", value=t)
        object.__setattr__(self, "aspect", a)
        object.__setattr__(self, "flaring", f)
        object.__setattr__(self, "r_ref_au", r)
        object.__setattr__(self, "taper_au", t)

    @property
    def is_flat(self) -> bool:
        """True for a midplane (``aspect == 0``) layer."""
        return self.aspect == 0.0

    def height_au(self, r_au):
        """Height of the layer above the midplane.

        Parameters
        ----------
        r_au : float or ndarray
            Cylindrical radius, au (>= 0).

        Returns
        -------
        ndarray
            Height ``z >= 0``, au, same shape as ``r_au``.
        """
        r = np.asarray(r_au, dtype=float)
        if self.aspect == 0.0:
            return np.zeros_like(r)
        with np.errstate(divide="ignore", invalid="ignore"):
            z = self.aspect * self.r_ref_au * (r / self.r_ref_au) ** self.flaring
            if self.taper_au is not None:
                z = z * np.exp(-(r / self.taper_au) ** 2)
        return z

    def slope(self, r_au):
        """Radial derivative of the height, ``dz/dr`` (dimensionless).

        ``z (flaring / r - 2 r / taper^2)``; 0 at ``r = 0`` when finite.
        """
        r = np.asarray(r_au, dtype=float)
        if self.aspect == 0.0:
            return np.zeros_like(r)
        with np.errstate(divide="ignore", invalid="ignore"):
            x = r / self.r_ref_au
            d = self.aspect * self.flaring * x ** (self.flaring - 1.0)
            if self.taper_au is not None:
                taper = np.exp(-(r / self.taper_au) ** 2)
                d = taper * (d - 2.0 * r / self.taper_au ** 2
                             * self.aspect * self.r_ref_au * x ** self.flaring)
        return d


@dataclass(frozen=True)
class DiskGeometry:
    """Orientation, centre and mass of a disk on the sky.

    Parameters
    ----------
    mstar_msun : float
        Stellar mass, solar masses (> 0).
    distance_pc : float
        Distance, pc (> 0).
    inclination_deg : float
        Inclination, deg, in ``[0, 90)``.
    position_angle_deg : float
        Position angle of the red-shifted major axis, deg east of north.
    rotation : int
        +1 counter-clockwise on the sky (PA increasing), -1 clockwise.
    x0_arcsec, y0_arcsec : float
        Disk centre, arcsec east and north of the image centre.
    vsys_kms : float
        Systemic velocity, km/s (radio convention, frame of the cube).
    front : EmittingSurface
        Layer on the observer's side of the midplane.
    back : EmittingSurface or None
        Layer on the other side; None mirrors ``front``.
    r_max_au, r_min_au : float
        Radial extent of the emitting layers, au.
    """

    mstar_msun: float
    distance_pc: float
    inclination_deg: float
    position_angle_deg: float
    rotation: int = 1
    x0_arcsec: float = 0.0
    y0_arcsec: float = 0.0
    vsys_kms: float = 0.0
    front: EmittingSurface = field(default_factory=lambda: EmittingSurface(0.0))
    back: EmittingSurface | None = None
    r_max_au: float = math.inf
    r_min_au: float = 0.0

    def __post_init__(self):
        m = _finite("mstar_msun", self.mstar_msun)
        if m <= 0:
            raise PhysicsRangeError(f"stellar mass must be > 0 Msun, got {m}",
                                    key="mstar_msun", value=m)
        d = _finite("distance_pc", self.distance_pc)
        if d <= 0:
            raise PhysicsRangeError(f"distance must be > 0 pc, got {d}",
                                    key="distance_pc", value=d)
        inc = _finite("inclination_deg", self.inclination_deg)
        if not 0.0 <= inc < 90.0:
            raise PhysicsRangeError(
                f"inclination must be in [0, 90) deg, got {inc}",
                key="inclination_deg", value=inc)
        pa = _finite("position_angle_deg", self.position_angle_deg)
        if self.rotation not in (1, -1) or isinstance(self.rotation, bool):
            raise PhysicsRangeError(
                f"rotation must be +1 or -1, got {self.rotation!r}",
                key="rotation", value=self.rotation)
        for name in ("x0_arcsec", "y0_arcsec", "vsys_kms"):
            object.__setattr__(self, name, _finite(name, getattr(self, name)))
        if not isinstance(self.front, EmittingSurface):
            raise PhysicsRangeError("front must be an EmittingSurface",
                                    key="front", value=self.front)
        if self.back is not None and not isinstance(self.back, EmittingSurface):
            raise PhysicsRangeError("back must be an EmittingSurface or None",
                                    key="back", value=self.back)
        try:
            rmin = float(self.r_min_au)
            rmax = float(self.r_max_au)
        except (TypeError, ValueError):
            raise PhysicsRangeError("r_min_au / r_max_au must be numbers",
                                    key="r_max_au", value=self.r_max_au) from None
        if not (math.isfinite(rmin) and rmin >= 0):
            raise PhysicsRangeError(f"r_min_au must be >= 0, got {rmin}",
                                    key="r_min_au", value=rmin)
        if not rmax > rmin:
            raise PhysicsRangeError(
                f"r_max_au ({rmax}) must exceed r_min_au ({rmin})",
                key="r_max_au", value=rmax)
        object.__setattr__(self, "mstar_msun", m)
        object.__setattr__(self, "distance_pc", d)
        object.__setattr__(self, "inclination_deg", inc)
        object.__setattr__(self, "position_angle_deg", pa)
        object.__setattr__(self, "rotation", int(self.rotation))
        object.__setattr__(self, "r_min_au", rmin)
        object.__setattr__(self, "r_max_au", rmax)

    # convenience -------------------------------------------------------
    @property
    def inclination_rad(self) -> float:
        """Inclination, rad."""
        return math.radians(self.inclination_deg)

    @property
    def position_angle_rad(self) -> float:
        """Position angle of the red-shifted major axis, rad east of north."""
        return math.radians(self.position_angle_deg)

    @property
    def au_per_arcsec(self) -> float:
        """Linear scale, au per arcsec (= distance in pc)."""
        return self.distance_pc * AU_PER_ARCSEC_PER_PC

    def surface(self, name: str = "front") -> EmittingSurface:
        """The :class:`EmittingSurface` of layer ``name`` ('front'/'back')."""
        _check_surface(name)
        if name == "back" and self.back is not None:
            return self.back
        return self.front


def _check_surface(name):
    if name not in SURFACES:
        raise ConfigError(f"surface must be 'front' or 'back', got {name!r}",
                          key="surface", value=name)


def rotation_matrix(geom: DiskGeometry) -> np.ndarray:
    """Rotation from the disk frame (X, Y, Z) to the sky frame.

    Parameters
    ----------
    geom : DiskGeometry

    Returns
    -------
    ndarray, shape (3, 3)
        ``R`` with ``sky = R @ disk``; sky axes (east, north, away).  The
        columns are the disk unit vectors X, Y, Z in sky components.
    """
    i = geom.inclination_rad
    pa = geom.position_angle_rad
    s = geom.rotation
    si, ci = math.sin(i), math.cos(i)
    sp, cp = math.sin(pa), math.cos(pa)
    return np.array([
        [sp, s * ci * cp, si * cp],
        [cp, -s * ci * sp, -si * sp],
        [0.0, si, -s * ci],
    ])


def surface_sign(geom: DiskGeometry, surface: str = "front") -> int:
    """Sign of disk ``Z`` of the layer: ``z_au = surface_sign * height``.

    +1 for the front surface when ``rotation = +1`` (``+Z`` towards the
    observer), -1 for the front surface when ``rotation = -1``; the back
    surface has the opposite sign.
    """
    _check_surface(surface)
    return geom.rotation if surface == "front" else -geom.rotation


def surface_point(geom: DiskGeometry, r_au, phi_rad=0.0, surface="front"):
    """Disk-frame height of an emitting layer.

    Parameters
    ----------
    geom : DiskGeometry
    r_au : float or ndarray
        Cylindrical radius, au.
    phi_rad : float or ndarray
        Azimuth, rad (unused for axisymmetric layers, kept for broadcasting).
    surface : {'front', 'back'}

    Returns
    -------
    ndarray
        ``z_au`` along disk ``+Z`` (signed), broadcast shape of the inputs.
    """
    sign = surface_sign(geom, surface)
    r, _ = np.broadcast_arrays(np.asarray(r_au, dtype=float),
                               np.asarray(phi_rad, dtype=float))
    return sign * geom.surface(surface).height_au(r)


def disk_to_sky(geom: DiskGeometry, r_au, phi_rad, z_au):
    """Project disk points onto the sky.

    Parameters
    ----------
    geom : DiskGeometry
    r_au, phi_rad, z_au : float or ndarray
        Cylindrical radius (au), azimuth (rad) and height along disk ``+Z``
        (au, signed), broadcastable.

    Returns
    -------
    x_arcsec, y_arcsec : ndarray
        Offsets east and north of the image centre (includes the disk
        centre offset), arcsec.
    depth_au : ndarray
        Distance along the line of sight from the plane of the sky through
        the disk centre, au, positive away from the observer.
    """
    r, phi, z = np.broadcast_arrays(np.asarray(r_au, dtype=float),
                                    np.asarray(phi_rad, dtype=float),
                                    np.asarray(z_au, dtype=float))
    R = rotation_matrix(geom)
    X = r * np.cos(phi)
    Y = r * np.sin(phi)
    east = R[0, 0] * X + R[0, 1] * Y + R[0, 2] * z
    north = R[1, 0] * X + R[1, 1] * Y + R[1, 2] * z
    depth = R[2, 1] * Y + R[2, 2] * z
    scale = geom.au_per_arcsec
    return east / scale + geom.x0_arcsec, north / scale + geom.y0_arcsec, depth


def _sky_components(geom, x_arcsec, y_arcsec):
    """Disk X and the flat-disk Y of sky offsets (au)."""
    x, y = np.broadcast_arrays(np.asarray(x_arcsec, dtype=float),
                               np.asarray(y_arcsec, dtype=float))
    scale = geom.au_per_arcsec
    e = (x - geom.x0_arcsec) * scale
    n = (y - geom.y0_arcsec) * scale
    pa = geom.position_angle_rad
    sp, cp = math.sin(pa), math.cos(pa)
    X = sp * e + cp * n
    u = cp * e - sp * n           # component along the unit vector at PA+90
    Yflat = geom.rotation * u / math.cos(geom.inclination_rad)
    return X, Yflat


def _max_height(surf: EmittingSurface, r_min, r_max):
    """Largest height of the layer over ``[r_min, r_max]`` (inf if unbounded)."""
    cands = [r_min, r_max]
    if surf.taper_au is not None:
        cands.append(min(max(surf.taper_au * math.sqrt(surf.flaring / 2.0), r_min),
                         r_max))
    with np.errstate(over="ignore", invalid="ignore"):
        vals = [float(surf.height_au(c)) if math.isfinite(c) else
                (0.0 if surf.taper_au is not None else
                 (math.inf if surf.flaring > 0 else surf.aspect * surf.r_ref_au))
                for c in cands]
    return max(vals)


def _solve_height(surf: EmittingSurface, X, Yflat, tan_i, side,
                  r_min=0.0, r_max=math.inf):
    """Height ``w >= 0`` of the layer where the line of sight meets it.

    Solves ``G(w) = w - h(hypot(X, Yflat - side * w * tan_i)) = 0`` for the
    smallest root ``w >= 0`` at which ``G`` turns from negative to positive,
    i.e. the crossing nearest the midplane with the layer seen from its
    observer-facing side.  ``side`` is +1 for the front layer, -1 for the
    back one.  The root is bracketed on a scan grid (stopped beyond the
    largest height the layer reaches within ``[r_min, r_max]``), grazing
    rays are caught by a golden-section search for the maximum of ``G``,
    and the bracket is polished by safeguarded Newton steps.  Returns NaN
    where no root is found.
    """
    X = np.asarray(X, dtype=float).ravel()
    Yf = np.asarray(Yflat, dtype=float).ravel()
    out = np.full(X.shape, np.nan)

    def G(w, Xs, Ys):
        return w - surf.height_au(np.hypot(Xs, Ys - side * w * tan_i))

    h0 = surf.height_au(np.hypot(X, Yf))
    ok = np.isfinite(h0) & (np.abs(X) <= r_max)
    zero = ok & (h0 <= 0.0)
    out[zero] = 0.0
    todo = np.flatnonzero(ok & ~zero)
    if todo.size == 0 or tan_i == 0.0:
        if tan_i == 0.0:
            out[todo] = h0[todo]
        return out
    h_max = _max_height(surf, r_min, r_max)
    Xs, Ys, scale = X[todo], Yf[todo], h0[todo]
    nt = todo.size
    lo = np.zeros(nt)
    hi = np.full(nt, np.nan)
    found = np.zeros(nt, dtype=bool)
    best = -scale.copy()                  # largest sampled G and its index
    best_j = np.zeros(nt, dtype=int)
    act = np.arange(nt)                   # rays still being scanned
    prev = 0.0
    for j, g in enumerate(_SCAN, start=1):
        w = scale[act] * g
        gw = G(w, Xs[act], Ys[act])
        pos = gw > 0.0
        sel = act[pos]
        lo[sel] = scale[sel] * prev
        hi[sel] = w[pos]
        found[sel] = True
        better = gw > best[act]
        best[act[better]] = gw[better]
        best_j[act[better]] = j
        keep = ~pos & (w <= h_max)
        act = act[keep]
        prev = g
        if act.size == 0:
            break
    # rays that graze the layer (two roots inside one scan cell, next to a
    # fold): maximise G around the best sample by golden-section search
    miss = np.flatnonzero(~found & (best > -0.05 * scale))
    if miss.size:
        grid = np.concatenate([[0.0], _SCAN])
        jj = best_j[miss]
        sc = scale[miss]
        a = sc * grid[np.maximum(jj - 1, 0)]
        b = sc * grid[np.minimum(jj + 1, grid.size - 1)]
        Xm, Ym = Xs[miss], Ys[miss]
        ratio = (math.sqrt(5.0) - 1.0) / 2.0
        for _ in range(_MAX_ITER):
            c = b - ratio * (b - a)
            d = a + ratio * (b - a)
            left = G(c, Xm, Ym) > G(d, Xm, Ym)
            b = np.where(left, d, b)
            a = np.where(left, a, c)
        wmax = 0.5 * (a + b)
        pos = G(wmax, Xm, Ym) > 0.0
        sel = miss[pos]
        lo[sel] = sc[pos] * grid[np.maximum(jj[pos] - 1, 0)]
        hi[sel] = wmax[pos]
        found[sel] = True
    idx = np.flatnonzero(found)
    a, b = lo[idx], hi[idx]
    Xf, Yff = Xs[idx], Ys[idx]
    w = 0.5 * (a + b)
    tol = 4.0 * np.finfo(float).eps * np.maximum(b, scale[idx])
    live = np.arange(idx.size)
    for _ in range(_MAX_ITER):
        wl, al, bl = w[live], a[live], b[live]
        Xl, Yl = Xf[live], Yff[live]
        Y = Yl - side * wl * tan_i
        r = np.hypot(Xl, Y)
        gl = wl - surf.height_au(r)
        with np.errstate(divide="ignore", invalid="ignore"):
            dg = 1.0 + side * tan_i * surf.slope(r) * Y / r
            newton = wl - gl / dg
        pos = gl > 0.0
        bl = np.where(pos, wl, bl)
        al = np.where(pos, al, wl)
        good = np.isfinite(newton) & (newton > al) & (newton < bl)
        wn = np.where(good, newton, 0.5 * (al + bl))
        a[live], b[live] = al, bl
        done = (np.abs(wn - wl) <= tol[live]) | (gl == 0.0) | (bl - al <= tol[live])
        w[live] = np.where(gl == 0.0, wl, wn)
        live = live[~done]
        if live.size == 0:
            break
    res = np.full(nt, np.nan)
    res[idx] = w
    out[todo] = res
    return out


def sky_to_disk(geom: DiskGeometry, x_arcsec, y_arcsec, surface="front"):
    """Deproject sky offsets onto an emitting layer.

    The line of sight through ``(x, y)`` is intersected with the layer
    ``z = +-h(r)``.  Writing ``w`` for the height of the ray above the
    midplane on the layer's side, the ray is ``Y = Y_flat - side w tan i``
    at fixed ``X``; the root of ``w = h(hypot(X, Y))`` is bracketed on a
    scan grid and refined by bisection (robust for flared layers at high
    inclination, where fixed-point iteration diverges).  The root returned
    is the crossing nearest the midplane where the layer is seen from its
    observer-facing side; parts of a layer seen from below (beyond the fold
    of a strongly flared near side) are not returned, and occultation of
    the root by a far outer rim of a tapered layer is not modelled.

    Parameters
    ----------
    geom : DiskGeometry
    x_arcsec, y_arcsec : float or ndarray
        Offsets east and north of the image centre, arcsec (broadcastable).
    surface : {'front', 'back'}

    Returns
    -------
    r_au, phi_rad, z_au : ndarray
        Cylindrical radius (au), azimuth in ``(-pi, pi]`` (rad) and height
        along disk ``+Z`` (au, signed).  NaN where the ray misses the layer
        or ``r`` lies outside ``[r_min_au, r_max_au]``.
    """
    _check_surface(surface)
    X, Yf = _sky_components(geom, x_arcsec, y_arcsec)
    shape = X.shape
    surf = geom.surface(surface)
    side = 1 if surface == "front" else -1
    tan_i = math.tan(geom.inclination_rad)
    if surf.is_flat:
        w = np.zeros(shape)
    else:
        w = _solve_height(surf, X, Yf, tan_i, side, geom.r_min_au,
                          geom.r_max_au).reshape(shape)
    Y = Yf - side * w * tan_i
    r = np.hypot(X, Y)
    phi = np.arctan2(Y, X)
    z = surface_sign(geom, surface) * w
    bad = ~np.isfinite(w) | (r < geom.r_min_au) | (r > geom.r_max_au)
    r = np.where(bad, np.nan, r)
    phi = np.where(bad, np.nan, phi)
    z = np.where(bad, np.nan, z)
    return r, phi, z


def rotation_speed_kms(geom: DiskGeometry, r_au, z_au=0.0):
    """Keplerian rotation speed of an elevated layer.

    ``v_phi = sqrt(G M r^2 / (r^2 + z^2)^(3/2))`` (PHYSICS.md section 1),
    pressure and self-gravity neglected.

    Parameters
    ----------
    geom : DiskGeometry
    r_au, z_au : float or ndarray
        Cylindrical radius and height, au.

    Returns
    -------
    ndarray
        Speed, km/s (0 at ``r = 0``).

    Examples
    --------
    >>> g = DiskGeometry(1.0, 100.0, 30.0, 0.0)
    >>> round(float(rotation_speed_kms(g, 1.0)), 2)
    29.78
    """
    r = np.asarray(r_au, dtype=float) * AU
    z = np.asarray(z_au, dtype=float) * AU
    r, z = np.broadcast_arrays(r, z)
    d2 = r * r + z * z
    with np.errstate(divide="ignore", invalid="ignore"):
        v = np.sqrt(GM_SUN * geom.mstar_msun * r * r / d2 ** 1.5) / KM
    return np.where(r == 0.0, 0.0, v)


def projection_coefficients(geom: DiskGeometry, phi_rad):
    """Line-of-sight projection of cylindrical velocity components.

    ``v_los - vsys = a_r v_r + a_phi v_phi + a_z v_z`` with
    ``a_r = sin i sin phi``, ``a_phi = sin i cos phi``,
    ``a_z = -rotation cos i`` (``v_z`` along disk ``+Z``).

    Parameters
    ----------
    geom : DiskGeometry
    phi_rad : float or ndarray
        Azimuth, rad.

    Returns
    -------
    a_r, a_phi, a_z : ndarray
        Dimensionless coefficients, shape of ``phi_rad``.
    """
    phi = np.asarray(phi_rad, dtype=float)
    si = math.sin(geom.inclination_rad)
    ci = math.cos(geom.inclination_rad)
    a_r = si * np.sin(phi)
    a_phi = si * np.cos(phi)
    a_z = np.full_like(phi, -geom.rotation * ci)
    return a_r, a_phi, a_z


def los_velocity(geom: DiskGeometry, r_au, phi_rad, z_au, v_r=0.0,
                 v_phi=None, v_z=0.0):
    """Line-of-sight velocity of gas at a disk point.

    Parameters
    ----------
    geom : DiskGeometry
    r_au, phi_rad, z_au : float or ndarray
        Position: radius (au), azimuth (rad), height along ``+Z`` (au).
    v_r, v_phi, v_z : float or ndarray
        Velocity components, km/s; ``v_phi`` defaults to
        :func:`rotation_speed_kms` at ``(r, z)``; ``v_z`` is along disk
        ``+Z``.

    Returns
    -------
    ndarray
        ``v_los`` in km/s including ``vsys`` (positive receding).
    """
    if v_phi is None:
        v_phi = rotation_speed_kms(geom, r_au, z_au)
    a_r, a_phi, a_z = projection_coefficients(geom, phi_rad)
    return (geom.vsys_kms + a_r * np.asarray(v_r, dtype=float)
            + a_phi * np.asarray(v_phi, dtype=float)
            + a_z * np.asarray(v_z, dtype=float))


def background_velocity(geom: DiskGeometry, x_arcsec, y_arcsec,
                        surface="front"):
    """Keplerian line-of-sight velocity seen at sky positions.

    Parameters
    ----------
    geom : DiskGeometry
    x_arcsec, y_arcsec : float or ndarray
        Offsets east and north of the image centre, arcsec.
    surface : {'front', 'back'}

    Returns
    -------
    ndarray
        ``v_los`` in km/s (including ``vsys``); NaN off the layer.
    """
    r, phi, z = sky_to_disk(geom, x_arcsec, y_arcsec, surface)
    return los_velocity(geom, r, phi, z)


def velocity_gradient(geom: DiskGeometry, x_arcsec, y_arcsec,
                      surface="front", step_arcsec: float | None = None):
    """Sky gradient of :func:`background_velocity`.

    By default analytic: the layer height ``w(X, Y_flat)`` at the ray-surface
    intersection is differentiated implicitly (``G(w) = w - h(r) = 0``, see
    ``docs/physics/geometry.md``) and chained through
    ``V = vsys + sin i v_phi(r, z) X / r``.  With ``step_arcsec`` set,
    central differences with that step along east and north are used
    instead (truncation error ``~ (step / L)^2`` relative at a distance
    ``L`` from the centre; 1 mas gives < 1e-4 beyond 0.1").

    Parameters
    ----------
    geom : DiskGeometry
    x_arcsec, y_arcsec : float or ndarray
        Offsets east and north, arcsec.
    surface : {'front', 'back'}
    step_arcsec : float or None
        Finite-difference step, arcsec (> 0); None for the analytic form.

    Returns
    -------
    dv_dx, dv_dy : ndarray
        km/s per arcsec along east and north; NaN off the layer (and, for
        differences, where a stencil point is off the layer).
    """
    x, y = np.broadcast_arrays(np.asarray(x_arcsec, dtype=float),
                               np.asarray(y_arcsec, dtype=float))
    if step_arcsec is not None:
        h = float(step_arcsec)
        if not h > 0:
            raise PhysicsRangeError(f"step_arcsec must be > 0, got {step_arcsec}",
                                    key="step_arcsec", value=step_arcsec)
        xs = np.stack([x + h, x - h, x, x])
        ys = np.stack([y, y, y + h, y - h])
        v = background_velocity(geom, xs, ys, surface)
        return (v[0] - v[1]) / (2 * h), (v[2] - v[3]) / (2 * h)

    r, phi, z = sky_to_disk(geom, x, y, surface)
    surf = geom.surface(surface)
    side = 1 if surface == "front" else -1
    i = geom.inclination_rad
    tan_i, si, ci = math.tan(i), math.sin(i), math.cos(i)
    pa = geom.position_angle_rad
    sp, cp = math.sin(pa), math.cos(pa)
    s = geom.rotation
    D = geom.au_per_arcsec
    X = r * np.cos(phi)
    Y = r * np.sin(phi)
    w = side * s * z                      # height on the layer's own side, >= 0
    with np.errstate(divide="ignore", invalid="ignore"):
        hp = surf.slope(r)
        g_w = 1.0 + side * tan_i * hp * Y / r
        w_X = hp * X / (r * g_w)          # implicit derivatives of w(X, Y_flat)
        w_Yf = hp * Y / (r * g_w)
        Y_X = -side * tan_i * w_X         # Y = Y_flat - side w tan i
        Y_Yf = 1.0 - side * tan_i * w_Yf
        r_X = (X + Y * Y_X) / r
        r_Yf = Y * Y_Yf / r
        d2 = r * r + z * z
        vphi = rotation_speed_kms(geom, r, z)
        cosp = X / r
        # d ln v_phi = (1/r - 1.5 r / d2) dr - 1.5 w dw / d2  (z dz = w dw)
        dlnv_dr = 1.0 / r - 1.5 * r / d2
        dlnv_dw = -1.5 * w / d2
        V_X = si * vphi * ((1.0 - cosp * r_X) / r
                           + cosp * (dlnv_dr * r_X + dlnv_dw * w_X))
        V_Yf = si * vphi * (-cosp * r_Yf / r
                            + cosp * (dlnv_dr * r_Yf + dlnv_dw * w_Yf))
    # X = sP e + cP n, Y_flat = s (cP e - sP n) / cos i, (e, n) = D (x, y)
    dv_dx = D * (V_X * sp + V_Yf * s * cp / ci)
    dv_dy = D * (V_X * cp - V_Yf * s * sp / ci)
    return dv_dx, dv_dy
