"""FITS spectral cubes: read into a :class:`Cube`, write ALMA-like cubes.

Conventions (see ``DEVELOPERS.md``):

* ``Cube.data`` has shape ``(nchan, ny, nx)`` in **file pixel order**: channel
  ``k`` is spectral pixel ``k`` of the file, row ``j`` is latitude pixel ``j``,
  column ``i`` is longitude pixel ``i``.  Nothing is flipped.
* ``velocity_kms`` is the radio-convention line-of-sight velocity,
  ``v = c (1 - nu / nu0)`` (``astropy.units.doppler_radio``), in the frame of
  the file (``SPECSYS``, usually LSRK; no frame conversion is done).  It may be
  ascending or descending with channel index; use
  :meth:`Cube.sorted_by_velocity` for an ascending copy.
* ``x_arcsec`` is the offset **east** of the centre, ``y_arcsec`` north of it,
  as gnomonic (tangent-plane) standard coordinates about the centre computed
  through ``astropy.wcs``.  With the usual ``CDELT1 < 0`` the column offsets
  ``x_arcsec`` *decrease* with pixel index (east is to the left of an image
  drawn with pixel 0 on the left).
* The default centre is the world position of pixel ``(nx // 2, ny // 2)``
  (0-based), which is the reference pixel :func:`write_cube` writes.

The celestial grid must be separable (no rotation): the offsets of every pixel
must match ``(x_arcsec[i], y_arcsec[j])`` to within :data:`GRID_TOLERANCE_PIX`
pixel, otherwise :class:`~kinkfit.errors.InputFileError` is raised.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import logging
import math
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .errors import ConfigError, InputFileError, ResultFileError

__all__ = [
    "Cube",
    "read_cube",
    "write_cube",
    "describe_cube",
    "radio_velocity_kms",
    "GRID_TOLERANCE_PIX",
    "C_KMS",
]

log = logging.getLogger(__name__)

#: speed of light in km/s (exact, SI definition)
C_KMS = 299792.458

#: largest allowed departure (pixels) of any pixel's sky offset from the
#: separable grid ``(x_arcsec[i], y_arcsec[j])``; larger means a rotated or
#: strongly distorted celestial WCS, which is refused.
GRID_TOLERANCE_PIX = 0.05

#: largest allowed relative difference between the two pixel scales
SQUARE_PIXEL_RTOL = 1e-3

#: AIPS frame suffixes accepted after FREQ / VELO (e.g. ``VELO-LSR``)
_AIPS_FRAMES = {"LSR", "LSRK", "LSRD", "HEL", "OBS", "BAR", "TOP", "GEO", "GAL"}

_BUNIT_CANON = {
    "jy/beam": "Jy/beam",
    "mjy/beam": "mJy/beam",
    "ujy/beam": "uJy/beam",
    "jy/pixel": "Jy/pixel",
    "jy/pix": "Jy/pixel",
    "k": "K",
    "mk": "mK",
    "jy": "Jy",
    "": "",
}

# ---------------------------------------------------------------------------
# data object
# ---------------------------------------------------------------------------


def _readonly(a, dtype=None):
    a = np.array(a, dtype=dtype, copy=True)
    a.setflags(write=False)
    return a


@dataclass(frozen=True)
class Cube:
    """A spectral line cube on a regular sky grid (read-only arrays).

    Attributes
    ----------
    data : ndarray, shape (nchan, ny, nx), float32 or float64
        Brightness in :attr:`bunit`; NaN where blanked.  File pixel order.
    velocity_kms : ndarray, shape (nchan,)
        Radio-convention velocity of each channel centre, km/s, file order
        (may be descending).
    x_arcsec : ndarray, shape (nx,)
        Offset east of the centre of each column, arcsec (usually decreasing
        with index because ``CDELT1 < 0``).
    y_arcsec : ndarray, shape (ny,)
        Offset north of the centre of each row, arcsec.
    pixel_arcsec : float
        Pixel size, arcsec (square pixels).
    beam_major_arcsec, beam_minor_arcsec : ndarray, shape (nchan,)
        Beam FWHM, arcsec.
    beam_pa_deg : ndarray, shape (nchan,)
        Beam position angle east of north, deg.
    noise_per_channel : ndarray, shape (nchan,)
        Noise rms of each channel from its negative pixels
        (:func:`channel_noise`), in :attr:`bunit`; unaffected by positive
        line emission when the baseline is zero (continuum subtracted).
    noise : float
        Noise rms of all line-free channels pooled (:func:`channel_noise`),
        in :attr:`bunit`.
    bunit : str
        Normalised brightness unit (``'Jy/beam'``, ``'K'``...).
    bunit_raw : str
        ``BUNIT`` exactly as written in the file.
    rest_frequency_hz : float or None
        Rest frequency, Hz; None only for velocity axes without one.
    channel_width_kms : float
        Median absolute channel spacing, km/s (positive).
    centre_ra_deg, centre_dec_deg : float
        World position of offset (0, 0), deg.
    specsys : str
        ``SPECSYS`` of the file ('' if absent).
    line_free_channels : tuple of int
        Channels used for :attr:`noise`.
    provenance : dict
        ``path``, ``sha256``, ``hdu``, ``header_cards`` (the cards relied
        upon), ``specsys``, ``spectral_ctype``, ``beam_source``...
    """

    data: np.ndarray
    velocity_kms: np.ndarray
    x_arcsec: np.ndarray
    y_arcsec: np.ndarray
    pixel_arcsec: float
    beam_major_arcsec: np.ndarray
    beam_minor_arcsec: np.ndarray
    beam_pa_deg: np.ndarray
    noise_per_channel: np.ndarray
    noise: float
    bunit: str
    bunit_raw: str
    rest_frequency_hz: float | None
    channel_width_kms: float
    centre_ra_deg: float
    centre_dec_deg: float
    specsys: str = ""
    line_free_channels: tuple = ()
    provenance: dict = field(default_factory=dict)

    # -- shape helpers ----------------------------------------------------
    @property
    def nchan(self) -> int:
        """Number of channels."""
        return int(self.data.shape[0])

    @property
    def ny(self) -> int:
        """Number of rows (latitude pixels)."""
        return int(self.data.shape[1])

    @property
    def nx(self) -> int:
        """Number of columns (longitude pixels)."""
        return int(self.data.shape[2])

    @property
    def beams(self) -> np.ndarray:
        """Beams as an array of shape (nchan, 3): major, minor (arcsec), PA (deg)."""
        return np.column_stack([self.beam_major_arcsec, self.beam_minor_arcsec,
                                self.beam_pa_deg])

    @property
    def velocity_ascending(self) -> bool:
        """True when velocity increases with channel index."""
        return bool(self.nchan < 2 or self.velocity_kms[-1] > self.velocity_kms[0])

    @property
    def blanked_fraction(self) -> float:
        """Fraction of NaN voxels."""
        return float(np.mean(~np.isfinite(self.data)))

    @property
    def single_beam(self) -> bool:
        """True when every channel has the same beam."""
        b = self.beams
        return bool(np.all(b == b[0]))

    # -- beam helpers -----------------------------------------------------
    def beam_fwhm_arcsec(self, chan=None):
        """Geometric-mean beam FWHM ``sqrt(bmaj * bmin)``, arcsec.

        Parameters
        ----------
        chan : int or None
            Channel index (file order); None returns the array for all
            channels, shape (nchan,).
        """
        g = np.sqrt(self.beam_major_arcsec * self.beam_minor_arcsec)
        return g if chan is None else float(g[chan])

    def beam_area_arcsec2(self, chan=None):
        """Gaussian beam solid angle ``pi bmaj bmin / (4 ln 2)``, arcsec^2."""
        a = np.pi * self.beam_major_arcsec * self.beam_minor_arcsec / (4.0 * np.log(2.0))
        return a if chan is None else float(a[chan])

    def beam_area_pixels(self, chan=None):
        """Gaussian beam solid angle in pixels, ``pi bmaj bmin / (4 ln 2) / pix^2``.

        Parameters
        ----------
        chan : int or None
            Channel index (file order); None returns shape (nchan,).
        """
        a = self.beam_area_arcsec2() / self.pixel_arcsec ** 2
        return a if chan is None else float(a[chan])

    # -- reordering -------------------------------------------------------
    def sorted_by_velocity(self) -> "Cube":
        """Return a copy with channels in ascending velocity.

        ``provenance['channel_order']`` gives, for each new channel, its index
        in the file; ``line_free_channels`` are renumbered accordingly.
        """
        order = np.argsort(self.velocity_kms, kind="stable")
        inverse = np.empty_like(order)
        inverse[order] = np.arange(order.size)
        prov = dict(self.provenance)
        prov["channel_order"] = [int(k) for k in
                                 np.asarray(prov.get("channel_order",
                                                     np.arange(order.size)))[order]]
        return dataclasses.replace(
            self,
            data=_readonly(self.data[order]),
            velocity_kms=_readonly(self.velocity_kms[order]),
            beam_major_arcsec=_readonly(self.beam_major_arcsec[order]),
            beam_minor_arcsec=_readonly(self.beam_minor_arcsec[order]),
            beam_pa_deg=_readonly(self.beam_pa_deg[order]),
            noise_per_channel=_readonly(self.noise_per_channel[order]),
            line_free_channels=tuple(sorted(int(inverse[k]) for k in
                                            self.line_free_channels)),
            provenance=prov,
        )


# ---------------------------------------------------------------------------
# small helpers
# ---------------------------------------------------------------------------


def radio_velocity_kms(freq_hz, rest_frequency_hz):
    """Radio-convention velocity ``c (1 - nu / nu0)``, km/s.

    Parameters
    ----------
    freq_hz : float or ndarray
        Frequency, Hz.
    rest_frequency_hz : float
        Rest frequency, Hz.

    Examples
    --------
    >>> round(float(radio_velocity_kms(230.538e9 * (1 - 1 / C_KMS), 230.538e9)), 9)
    1.0
    """
    return C_KMS * (1.0 - np.asarray(freq_hz, dtype=float) / rest_frequency_hz)


def normalise_bunit(raw: str) -> str:
    """Normalise a ``BUNIT`` string case-insensitively (``'JY/BEAM'`` -> ``'Jy/beam'``)."""
    key = "".join(str(raw).split()).lower().replace("**", "^")
    key = key.replace("jy.beam-1", "jy/beam").replace("jy/beam^-1", "jy/beam")
    key = key.replace("beam-1jy", "jy/beam")
    return _BUNIT_CANON.get(key, str(raw).strip())


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 22), b""):
            h.update(block)
    return h.hexdigest()


def _finite_float(hdr, key, path, default=None, required=True):
    if key not in hdr:
        if required and default is None:
            raise InputFileError(f"{path}: header keyword {key} is missing",
                                 file=path, key=key)
        return default
    try:
        val = hdr[key]
    except Exception:  # astropy VerifyError on an unparsable card (e.g. NAN)
        raise InputFileError(f"{path}: header card {key} is unparsable "
                             f"({str(hdr.cards[key].image).strip()!r})", file=path,
                             key=key) from None
    try:
        f = float(val)
    except (TypeError, ValueError):
        raise InputFileError(f"{path}: header keyword {key} = {val!r} is not a number",
                             file=path, key=key, value=val) from None
    if not math.isfinite(f):
        raise InputFileError(f"{path}: header keyword {key} = {val!r} is not finite",
                             file=path, key=key, value=val)
    return f


def _unit(text, path, key, default):
    from astropy import units as u
    s = str(text).strip() if text is not None else ""
    if not s:
        return default
    aliases = {"DEGREES": "deg", "DEGREE": "deg", "DEG": "deg", "ARCSEC": "arcsec",
               "ARCSECS": "arcsec", "RAD": "rad", "KM/S": "km/s", "M/S": "m/s",
               "HZ": "Hz", "GHZ": "GHz", "MHZ": "MHz", "KHZ": "kHz"}
    s = aliases.get(s.upper(), s)
    try:
        return u.Unit(s)
    except ValueError:
        raise InputFileError(f"{path}: unit {key} = {text!r} is not understood",
                             file=path, key=key, value=text) from None


def _linear_matrix(hdr, naxis, path):
    """Return the (naxis, naxis) linear transformation matrix M_ij (CD or CDELT*PC)."""
    has_cd = any(f"CD{i}_{j}" in hdr for i in range(1, naxis + 1)
                 for j in range(1, naxis + 1))
    m = np.zeros((naxis, naxis))
    for i in range(1, naxis + 1):
        for j in range(1, naxis + 1):
            if has_cd:
                m[i - 1, j - 1] = _finite_float(hdr, f"CD{i}_{j}", path, default=0.0,
                                                required=False)
            else:
                m[i - 1, j - 1] = _finite_float(hdr, f"PC{i}_{j}", path,
                                                default=1.0 if i == j else 0.0,
                                                required=False)
        if not has_cd:
            m[i - 1, :] *= _finite_float(hdr, f"CDELT{i}", path, default=1.0,
                                         required=False)
    return m


# ---------------------------------------------------------------------------
# reading
# ---------------------------------------------------------------------------


def _open_hdul(path: Path):
    from astropy.io import fits
    if not path.exists():
        raise InputFileError(f"{path}: no such file", file=path)
    if path.is_dir():
        raise InputFileError(f"{path}: is a directory, not a FITS file", file=path)
    if path.stat().st_size == 0:
        raise InputFileError(f"{path}: empty file, not a FITS file", file=path)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            hdul = fits.open(path, memmap=False, lazy_load_hdus=False)
        except OSError as exc:
            msg = " ".join(str(exc).split(".")[0].split())
            raise InputFileError(f"{path}: not a readable FITS file ({msg})",
                                 file=path) from None
        except Exception as exc:  # astropy raises assorted errors on junk
            raise InputFileError(f"{path}: not a readable FITS file "
                                 f"({type(exc).__name__})", file=path) from None
    for w in caught:
        text = str(w.message)
        if "truncated" in text.lower():
            hdul.close()
            raise InputFileError(f"{path}: file is truncated ({text.split(':')[-1].strip()})",
                                 file=path)
        log.debug("%s: %s", path, text)
    return hdul


def _pick_image_hdu(hdul, path):
    best = None
    for k, hdu in enumerate(hdul):
        if not hasattr(hdu, "is_image") or not hdu.is_image:
            continue
        naxis = int(hdu.header.get("NAXIS", 0))
        if naxis == 0:
            continue
        shape = [int(hdu.header.get(f"NAXIS{i}", 0)) for i in range(1, naxis + 1)]
        if best is None:
            best = (k, hdu, shape)
        nontrivial = sum(1 for n in shape if n > 1)
        if nontrivial >= 3 or naxis >= 3:
            return k, hdu, shape
    if best is None:
        raise InputFileError(f"{path}: contains no image data", file=path)
    k, hdu, shape = best
    raise InputFileError(f"{path}: HDU {k} is a {len(shape)}-D image "
                         f"(NAXIS = {len(shape)}), a spectral cube needs 3 or 4 axes",
                         file=path, key="NAXIS", value=len(shape))


def _spectral_kind(ctype):
    """Classify a spectral CTYPE.

    Returns ``'freq'``, ``'vrad'``, ``'vopt'``, ``'velo'`` (relativistic, FITS WCS
    Paper III), ``'aips-velo'`` (legacy ``VELO-LSR`` etc., convention from
    ``VELREF``), ``'felo'`` (recognised, refused) or None (not supported, e.g.
    WAVE or a non-linear algorithm code such as ``VOPT-F2W``).
    """
    c = ctype.strip().upper()
    head, _, tail = c.partition("-")
    tail = tail.strip("-")
    if head == "FREQ" and (not tail or tail in _AIPS_FRAMES):
        return "freq"
    if head == "VRAD" and not tail:
        return "vrad"
    if head == "VOPT" and not tail:
        return "vopt"
    if head == "VELO" and not tail:
        return "velo"
    if head == "VELO" and tail in _AIPS_FRAMES:
        return "aips-velo"
    if head == "FELO" and (not tail or tail in _AIPS_FRAMES):
        return "felo"
    return None


#: first four letters of every spectral CTYPE (FITS WCS Paper III + AIPS FELO)
_SPECTRAL_HEADS = {"FREQ", "VRAD", "VOPT", "VELO", "FELO", "WAVE", "AWAV", "ZOPT",
                   "ENER", "WAVN", "BETA"}


def read_cube(path, *, centre=None, line_free=None) -> Cube:
    """Read a 3- or 4-axis FITS spectral cube.

    Parameters
    ----------
    path : str or os.PathLike
        FITS file (the first image HDU with 3 or more axes is used).
    centre : (float, float), optional
        ``(ra_deg, dec_deg)`` of the offset origin, in the celestial frame of
        the file (``RADESYS``; no frame conversion); default the world
        position of pixel ``(nx // 2, ny // 2)`` (0-based).
    line_free : sequence of int, optional
        Channels (file order) free of line emission, used for the noise.
        Default: the first and last ``max(1, round(0.1 nchan))`` channels.

    Returns
    -------
    Cube
        Channels in file order.  Of a Stokes axis the plane with value 1 (I)
        is used (else the first); other degenerate axes are dropped.

    Raises
    ------
    kinkfit.errors.InputFileError
        For every malformed file, naming the file and the keyword.
    kinkfit.errors.ConfigError
        For an invalid ``centre`` or ``line_free`` argument.
    """
    path = Path(path)
    from astropy.io.fits.verify import VerifyError
    hdul = _open_hdul(path)
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            cube = _read_from_hdul(hdul, path, centre, line_free)
        for w in caught:
            log.debug("%s: %s", path, " ".join(str(w.message).split()))
        return cube
    except (InputFileError, ConfigError):
        raise
    except VerifyError as exc:
        raise InputFileError(f"{path}: malformed header ({' '.join(str(exc).split())})",
                             file=path) from None
    except Exception as exc:  # last resort: a user file must never give a traceback
        log.debug("unexpected error reading %s", path, exc_info=True)
        raise InputFileError(f"{path}: could not be read as a spectral cube "
                             f"({type(exc).__name__}: {' '.join(str(exc).split())})",
                             file=path) from None
    finally:
        hdul.close()


def _read_from_hdul(hdul, path, centre, line_free):
    hdu_index, hdu, shape_fits = _pick_image_hdu(hdul, path)
    hdr = hdu.header
    naxis = len(shape_fits)
    if naxis > 4:
        raise InputFileError(f"{path}: NAXIS = {naxis}; only 3- or 4-axis cubes are read",
                             file=path, key="NAXIS", value=naxis)
    for i, n in enumerate(shape_fits, start=1):
        if n <= 0:
            raise InputFileError(f"{path}: axis {i} has zero size (NAXIS{i} = {n})",
                                 file=path, key=f"NAXIS{i}", value=n)

    cards = {}

    def card(key):
        """Return a header value and record it as relied upon."""
        if key in hdr:
            v = hdr[key]
            cards[key] = v if isinstance(v, (bool, int, float, str)) else str(v)
        return hdr.get(key)

    ctypes = [str(card(f"CTYPE{i}") or "").strip() for i in range(1, naxis + 1)]
    ispec, ilng, ilat, stokes = _locate_axes(ctypes, shape_fits, path)
    for i in range(1, naxis + 1):
        for key in (f"CRVAL{i}", f"CRPIX{i}", f"CDELT{i}"):
            if key in hdr:
                _finite_float(hdr, key, path)
    m = _linear_matrix(hdr, naxis, path)

    velocity, width, rest_hz, convention = _spectral_axis(hdr, m, ispec, ctypes[ispec],
                                                          shape_fits[ispec], path, card)
    x_arcsec, y_arcsec, pixel_arcsec, ra0, dec0 = _sky_grid(
        hdr, naxis, ilng, ilat, shape_fits, centre, ctypes, path, card)
    data, stokes_index = _extract_data(hdu, hdu_index, hdr, m, shape_fits, ispec, ilng,
                                       ilat, stokes, path)
    nchan = data.shape[0]
    bmaj, bmin, bpa, beam_source = _read_beams(hdul, hdr, path, nchan, stokes_index,
                                               card)

    bunit_raw = str(card("BUNIT") or "")
    specsys = str(card("SPECSYS") or "").strip()
    if not specsys and "-" in ctypes[ispec]:   # AIPS legacy frame suffix, e.g. VELO-LSR
        specsys = ctypes[ispec].upper().split("-", 1)[1].strip("-")

    lf = _line_free_channels(line_free, nchan, path)
    noise_per_channel, noise = _robust_noise(data, lf)
    if not math.isfinite(noise):
        raise InputFileError(f"{path}: line-free channels {_ranges(lf)} are all blank; "
                             f"no noise estimate", file=path)

    prov = {
        "path": str(path.resolve()),
        "sha256": _sha256(path),
        "hdu": int(hdu_index),
        "header_cards": cards,
        "specsys": specsys,
        "spectral_ctype": ctypes[ispec],
        "velocity_convention": convention,
        "beam_source": beam_source,
        "stokes_plane": stokes_index,
        "axis_order_fits": ctypes,
    }
    return Cube(
        data=_readonly(data),
        velocity_kms=_readonly(velocity, float),
        x_arcsec=_readonly(x_arcsec, float),
        y_arcsec=_readonly(y_arcsec, float),
        pixel_arcsec=pixel_arcsec,
        beam_major_arcsec=_readonly(bmaj, float),
        beam_minor_arcsec=_readonly(bmin, float),
        beam_pa_deg=_readonly(bpa, float),
        noise_per_channel=_readonly(noise_per_channel, float),
        noise=float(noise),
        bunit=normalise_bunit(bunit_raw),
        bunit_raw=bunit_raw,
        rest_frequency_hz=rest_hz,
        channel_width_kms=width,
        centre_ra_deg=ra0,
        centre_dec_deg=dec0,
        specsys=specsys,
        line_free_channels=tuple(lf),
        provenance=prov,
    )


def _locate_axes(ctypes, shape_fits, path):
    """FITS axis indices (0-based) of the spectral, longitude, latitude and Stokes axes."""
    up = [c.upper() for c in ctypes]
    lng = [k for k, c in enumerate(up) if c.startswith(("RA--", "GLON", "ELON")) or c == "RA"]
    lat = [k for k, c in enumerate(up) if c.startswith(("DEC-", "GLAT", "ELAT")) or c == "DEC"]
    spec = [k for k, c in enumerate(up) if c[:4] in _SPECTRAL_HEADS]
    stokes = [k for k, c in enumerate(up) if c == "STOKES"]
    if len(spec) != 1:
        raise InputFileError(f"{path}: no spectral axis (CTYPEs {ctypes}); expected one of "
                             f"FREQ, VRAD, VOPT, VELO", file=path, key="CTYPEn",
                             value=ctypes)
    if len(lng) != 1 or len(lat) != 1:
        raise InputFileError(f"{path}: no pair of celestial axes (CTYPEs {ctypes}); "
                             f"expected RA---xxx/DEC--xxx", file=path, key="CTYPEn",
                             value=ctypes)
    ispec, ilng, ilat = spec[0], lng[0], lat[0]
    for k in range(len(ctypes)):
        if k not in (ispec, ilng, ilat) and shape_fits[k] != 1 and k not in stokes:
            raise InputFileError(f"{path}: axis {k + 1} ({ctypes[k] or 'no CTYPE'}) has "
                                 f"{shape_fits[k]} pixels; only a degenerate extra axis "
                                 f"is supported", file=path, key=f"CTYPE{k + 1}",
                                 value=ctypes[k])
    kind = _spectral_kind(ctypes[ispec])
    if kind is None or kind == "felo":
        what = ("optical velocity sampled in frequency" if kind == "felo"
                else "use FREQ, VRAD, VOPT, VELO or VELO-LSR, linear")
        raise InputFileError(f"{path}: spectral axis CTYPE{ispec + 1} = "
                             f"'{ctypes[ispec]}' is not supported ({what})", file=path,
                             key=f"CTYPE{ispec + 1}", value=ctypes[ispec])
    return ispec, ilng, ilat, stokes


def _rest_frequency_hz(hdr, path):
    """RESTFRQ, else RESTFREQ, else c / RESTWAV (m); None when all are absent."""
    for key in ("RESTFRQ", "RESTFREQ"):
        if key in hdr:
            val = _finite_float(hdr, key, path)
            if val <= 0:
                raise InputFileError(f"{path}: {key} = {val!r} is not a positive frequency",
                                     file=path, key=key, value=val)
            return val
    if "RESTWAV" in hdr:
        wav = _finite_float(hdr, "RESTWAV", path)
        if wav <= 0:
            raise InputFileError(f"{path}: RESTWAV = {wav!r} is not a positive wavelength",
                                 file=path, key="RESTWAV", value=wav)
        return C_KMS * 1e3 / wav  # RESTWAV in m (FITS WCS Paper III)
    return None


def _spectral_axis(hdr, m, ispec, ctype, nchan, path, card):
    """Radio velocities (km/s) of the channel centres, median width, rest frequency.

    Our own arithmetic from the header (FITS WCS Paper III); the tests use
    astropy's SpectralCoord as the oracle.
    """
    from astropy import units as u

    s = ispec + 1
    naxis = m.shape[0]
    for key in (f"CRVAL{s}", f"CRPIX{s}", f"CUNIT{s}", f"CDELT{s}", "SPECSYS", "VELREF",
                "RESTFRQ", "RESTFREQ", "RESTWAV"):
        card(key)
    crval = _finite_float(hdr, f"CRVAL{s}", path)
    crpix = _finite_float(hdr, f"CRPIX{s}", path, default=1.0, required=False)
    step = m[ispec, ispec]
    if any(m[ispec, j] != 0.0 or m[j, ispec] != 0.0 for j in range(naxis) if j != ispec):
        raise InputFileError(f"{path}: spectral axis {s} is coupled to other axes in the "
                             f"PC/CD matrix; not supported", file=path, key=f"PC{s}_{s}")
    if step == 0.0:
        key = f"CD{s}_{s}" if f"CD{s}_{s}" in hdr else f"CDELT{s}"
        raise InputFileError(f"{path}: spectral channel width is zero ({key} = "
                             f"{hdr.get(key, 0.0)!r})", file=path, key=key, value=0.0)
    rest_hz = _rest_frequency_hz(hdr, path)
    kind = _spectral_kind(ctype)
    cunit = hdr.get(f"CUNIT{s}")
    if kind == "freq":
        unit = _unit(cunit, path, f"CUNIT{s}", u.Hz)
        if unit.physical_type != "frequency":
            raise InputFileError(f"{path}: CUNIT{s} = {cunit!r} is not a frequency unit "
                                 f"for CTYPE{s} = '{ctype}'", file=path, key=f"CUNIT{s}",
                                 value=cunit)
        if rest_hz is None:
            raise InputFileError(f"{path}: frequency axis without a rest frequency "
                                 f"(RESTFRQ, RESTFREQ and RESTWAV all absent)", file=path,
                                 key="RESTFRQ")
        scale = unit.to(u.Hz)
        convention = "radio (from frequency)"
    else:
        unit = _unit(cunit, path, f"CUNIT{s}", u.m / u.s)
        if unit.physical_type != "speed":
            raise InputFileError(f"{path}: CUNIT{s} = {cunit!r} is not a velocity unit "
                                 f"for CTYPE{s} = '{ctype}'", file=path, key=f"CUNIT{s}",
                                 value=cunit)
        scale = unit.to(u.km / u.s)
        if kind == "aips-velo":
            # AIPS convention (as wcslib's spcfix): VELREF > 256 radio, else optical
            velref = int(hdr.get("VELREF", 0) or 0)
            kind = "vrad" if velref > 256 else "vopt"
            log.info("%s: legacy CTYPE%d = '%s' read as %s velocity (VELREF = %d, "
                        "AIPS convention)", path, s, ctype,
                        "radio" if kind == "vrad" else "optical", velref)
        convention = {"vrad": "radio", "vopt": "radio (from optical)",
                      "velo": "radio (from relativistic)"}[kind]

    def radio_kms(pix):
        native = (crval + step * (pix + 1.0 - crpix)) * scale
        if kind == "freq":
            if np.any(native <= 0):
                raise InputFileError(f"{path}: non-positive frequencies on axis {s} "
                                     f"(CRVAL{s} = {crval!r})", file=path,
                                     key=f"CRVAL{s}", value=crval)
            return radio_velocity_kms(native, rest_hz)
        if kind == "vrad":
            return native
        if kind == "vopt":
            # nu0/nu = 1 + v_opt/c  ->  v_rad = c v_opt / (c + v_opt)   (FITS WCS Paper III)
            if np.any(native <= -C_KMS):
                raise InputFileError(f"{path}: optical velocity <= -c on axis {s}",
                                     file=path, key=f"CRVAL{s}", value=crval)
            return C_KMS * native / (C_KMS + native)
        # relativistic: nu/nu0 = sqrt((c - v)/(c + v))   (FITS WCS Paper III)
        if np.any(np.abs(native) >= C_KMS):
            raise InputFileError(f"{path}: |velocity| >= c on axis {s}", file=path,
                                 key=f"CRVAL{s}", value=crval)
        return C_KMS * (1.0 - np.sqrt((C_KMS - native) / (C_KMS + native)))

    pix = np.arange(nchan, dtype=float)
    velocity = radio_kms(pix)
    if not np.all(np.isfinite(velocity)):
        raise InputFileError(f"{path}: channel velocities are not finite on "
                             f"axis {s}", file=path, key=f"CDELT{s}")
    if nchan > 1 and not np.all(np.abs(np.diff(velocity)) > 1e-6):
        # e.g. a frequency axis near 0 Hz or a vanishing increment: every
        # channel at the same velocity (to 1 mm/s)
        raise InputFileError(
            f"{path}: channel velocities are not distinct on axis {s} "
            f"(spacing {float(np.min(np.abs(np.diff(velocity)))):.3g} km/s); "
            f"check CRVAL{s}, CDELT{s} and the rest frequency",
            file=path, key=f"CDELT{s}")
    if nchan > 1:   # median spacing of adjacent channel centres
        width = float(np.median(np.abs(np.diff(velocity))))
    else:           # one channel: its extent along the axis
        width = float(abs(radio_kms(np.array([0.5])) - radio_kms(np.array([-0.5])))[0])
    return velocity, width, rest_hz, convention


def _sky_grid(hdr, naxis, ilng, ilat, shape_fits, centre, ctypes, path, card):
    """East/north offsets (arcsec) of the columns and rows, pixel size, centre (deg)."""
    from astropy.wcs import WCS, FITSFixedWarning

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            wcs = WCS(hdr, naxis=naxis, fix=True)
        except Exception as exc:
            raise InputFileError(f"{path}: invalid WCS header ({' '.join(str(exc).split())})",
                                 file=path) from None
    for w in caught:
        if issubclass(w.category, FITSFixedWarning):
            log.info("%s: %s", path, " ".join(str(w.message).split()))
    for i in (ilng + 1, ilat + 1):
        for key in (f"CRVAL{i}", f"CDELT{i}", f"CRPIX{i}", f"CUNIT{i}"):
            card(key)
    for key in ("RADESYS", "EQUINOX", "LONPOLE", "LATPOLE"):
        card(key)
    for key in (f"CDELT{ilng + 1}", f"CDELT{ilat + 1}"):
        if key in hdr and float(hdr[key]) == 0.0:
            raise InputFileError(f"{path}: {key} = 0 (zero pixel size)", file=path,
                                 key=key, value=0.0)
    nx, ny = shape_fits[ilng], shape_fits[ilat]

    def world(ix, iy):
        """(lon, lat) in deg of 0-based pixels (ix, iy); other axes at pixel 0."""
        ix = np.atleast_1d(np.asarray(ix, dtype=float))
        iy = np.atleast_1d(np.asarray(iy, dtype=float))
        pixcrd = np.zeros((ix.size, naxis))
        pixcrd[:, ilng] = ix
        pixcrd[:, ilat] = iy
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            try:
                w = wcs.wcs_pix2world(pixcrd, 0)
            except Exception as exc:
                raise InputFileError(f"{path}: celestial WCS cannot be evaluated "
                                     f"({' '.join(str(exc).split())})", file=path) from None
        return w[:, ilng].astype(float), w[:, ilat].astype(float)

    if centre is None:
        lon, lat = world(nx // 2, ny // 2)
        ra0, dec0 = float(lon[0]), float(lat[0])
        if not (math.isfinite(ra0) and math.isfinite(dec0)):
            raise InputFileError(f"{path}: celestial WCS gives no finite position for the "
                                 f"centre pixel (check CRVAL/CDELT/CTYPE)", file=path)
    else:
        try:
            ra0, dec0 = (float(centre[0]), float(centre[1]))
        except (TypeError, ValueError, IndexError):
            raise ConfigError(f"centre = {centre!r} is not (ra_deg, dec_deg)",
                              key="centre", value=centre) from None
        if not (math.isfinite(ra0) and math.isfinite(dec0) and -90 <= dec0 <= 90):
            raise ConfigError(f"centre = {centre!r} is not a valid (ra_deg, dec_deg)",
                              key="centre", value=centre)

    def offsets(ix, iy):
        return _gnomonic_arcsec(*world(ix, iy), ra0, dec0)

    x_arcsec, _ = offsets(np.arange(nx), np.full(nx, ny // 2))
    _, y_arcsec = offsets(np.full(ny, nx // 2), np.arange(ny))
    if not (np.all(np.isfinite(x_arcsec)) and np.all(np.isfinite(y_arcsec))):
        raise InputFileError(f"{path}: celestial WCS gives non-finite positions inside the "
                             f"image (CTYPE {ctypes[ilng]}/{ctypes[ilat]})", file=path)
    # pixel size from the central row and column (a 1-pixel axis takes the other's)
    px = float(np.median(np.abs(np.diff(x_arcsec)))) if nx > 1 else None
    py = float(np.median(np.abs(np.diff(y_arcsec)))) if ny > 1 else None
    if px is None and py is None:
        m = _linear_matrix(hdr, naxis, path)
        px = py = abs(m[ilng, ilng]) * 3600.0
    px = py if px is None else px
    py = px if py is None else py
    if not (px > 0 and py > 0):
        raise InputFileError(f"{path}: zero pixel size on the celestial axes", file=path)
    if abs(px - py) > SQUARE_PIXEL_RTOL * max(px, py):
        raise InputFileError(f"{path}: non-square pixels ({px:.6g} x {py:.6g} arcsec); "
                             f"not supported", file=path, key=f"CDELT{ilng + 1}")
    pixel_arcsec = 0.5 * (px + py)
    # separability: every pixel of a sub-sampled grid (edges included) must sit at
    # (x_arcsec[i], y_arcsec[j]) within GRID_TOLERANCE_PIX
    gx = np.unique(np.r_[np.arange(0, nx, max(1, nx // 64)), nx - 1])
    gy = np.unique(np.r_[np.arange(0, ny, max(1, ny // 64)), ny - 1])
    GX, GY = (g.ravel() for g in np.meshgrid(gx, gy))
    ox, oy = offsets(GX, GY)
    dev = np.hypot(ox - x_arcsec[GX], oy - y_arcsec[GY]) / pixel_arcsec
    worst = float(np.max(dev)) if np.all(np.isfinite(dev)) else float("inf")
    if worst > GRID_TOLERANCE_PIX:
        raise InputFileError(f"{path}: celestial grid is rotated or non-linear (a pixel "
                             f"departs {worst:.3g} pixel from a regular east/north grid, "
                             f"tolerance {GRID_TOLERANCE_PIX}); not supported", file=path,
                             key="PCi_j/CROTA2", value=worst)
    for arr, name in ((x_arcsec, "x"), (y_arcsec, "y")):
        if arr.size > 2:
            k = np.arange(arr.size)
            fit = np.polyval(np.polyfit(k, arr, 1), k)
            if np.max(np.abs(arr - fit)) / pixel_arcsec > GRID_TOLERANCE_PIX:
                raise InputFileError(f"{path}: celestial {name} offsets are not evenly "
                                     f"spaced (projection too non-linear over the field)",
                                     file=path)
    return x_arcsec, y_arcsec, float(pixel_arcsec), ra0, dec0


def _extract_data(hdu, hdu_index, hdr, m, shape_fits, ispec, ilng, ilat, stokes, path):
    """Data as (nchan, ny, nx) float32/float64 in file pixel order; Stokes plane used."""
    try:
        raw = hdu.data
    except Exception as exc:
        raise InputFileError(f"{path}: data of HDU {hdu_index} unreadable, file truncated "
                             f"or corrupt ({type(exc).__name__})", file=path) from None
    if raw is None:
        raise InputFileError(f"{path}: HDU {hdu_index} has no data", file=path)
    raw = np.asarray(raw)
    naxis = len(shape_fits)
    expected = tuple(reversed(shape_fits))
    if raw.shape != expected:
        raise InputFileError(f"{path}: data shape {raw.shape} does not match the header "
                             f"NAXISn {expected}", file=path, key="NAXIS")
    # NumPy axis of FITS axis k (0-based) is naxis - 1 - k; squeeze only after locating
    index = [slice(None)] * naxis
    stokes_index = None
    for k in range(naxis):
        if k in (ispec, ilng, ilat):
            continue
        sel = 0
        if k in stokes and shape_fits[k] > 1:
            crv = _finite_float(hdr, f"CRVAL{k + 1}", path, default=1.0, required=False)
            crp = _finite_float(hdr, f"CRPIX{k + 1}", path, default=1.0, required=False)
            cdl = m[k, k] if m[k, k] != 0 else 1.0
            vals = crv + cdl * (np.arange(shape_fits[k]) + 1 - crp)
            hits = np.flatnonzero(np.isclose(vals, 1.0))   # STOKES = 1 is I (Paper I)
            sel = int(hits[0]) if hits.size else 0
            log.warning("%s: %d Stokes planes; using plane %d (Stokes value %g)", path,
                        shape_fits[k], sel, vals[sel])
        if k in stokes:
            stokes_index = sel
        index[naxis - 1 - k] = sel
    sub = raw[tuple(index)]
    # remaining NumPy axes are in decreasing FITS order: rank them to transpose
    kept = sorted((naxis - 1 - k for k in (ispec, ilng, ilat)))
    pos = {ax: n for n, ax in enumerate(kept)}
    sub = np.transpose(sub, (pos[naxis - 1 - ispec], pos[naxis - 1 - ilat],
                             pos[naxis - 1 - ilng]))
    dtype = np.float64 if sub.dtype in (np.float64, np.int32, np.int64) else np.float32
    data = np.array(sub, dtype=dtype)
    if not np.isfinite(data).any():
        raise InputFileError(f"{path}: all data values are NaN/blank", file=path)
    return data, stokes_index


def _line_free_channels(line_free, nchan, path):
    """Sorted channel list: the user's, or the first and last ~10 % of the channels."""
    if line_free is None:
        nedge = max(1, int(round(0.1 * nchan)))
        return sorted(set(range(nedge)) | set(range(max(0, nchan - nedge), nchan)))
    try:
        lf = sorted({int(k) for k in line_free})
    except (TypeError, ValueError):
        raise ConfigError(f"line_free = {line_free!r} is not a list of channel indices",
                          key="line_free", value=line_free) from None
    bad = [k for k in lf if not 0 <= k < nchan]
    if bad or not lf:
        raise ConfigError(f"line_free channels {bad or lf} outside 0..{nchan - 1} of "
                          f"{path}", key="line_free", value=line_free)
    return lf


def _gnomonic_arcsec(lon_deg, lat_deg, lon0_deg, lat0_deg):
    """Gnomonic standard coordinates (east, north) about (lon0, lat0), arcsec.

    ``xi = cos d sin(a - a0) / cos c``, ``eta = (cos d0 sin d - sin d0 cos d
    cos(a - a0)) / cos c``, ``cos c = sin d0 sin d + cos d0 cos d cos(a - a0)``
    (the TAN projection of FITS Paper II about the centre).
    """
    a = np.radians(lon_deg)
    d = np.radians(lat_deg)
    a0 = math.radians(lon0_deg)
    d0 = math.radians(lat0_deg)
    da = a - a0
    cosc = math.sin(d0) * np.sin(d) + math.cos(d0) * np.cos(d) * np.cos(da)
    xi = np.cos(d) * np.sin(da) / cosc
    eta = (math.cos(d0) * np.sin(d) - math.sin(d0) * np.cos(d) * np.cos(da)) / cosc
    k = 180.0 / math.pi * 3600.0
    return xi * k, eta * k


#: Fewest negative pixels a channel needs for the negative-half noise estimate;
#: below it the whole-plane ``mad_std`` is used (common practice, no source).
_MIN_NEGATIVE_PIXELS = 50

#: Phi^-1(0.75): the median of a half-normal distribution in units of sigma
#: (scipy.stats.norm.ppf(0.75) = 0.6744897501960817).
_HALF_NORMAL_MEDIAN = 0.6744897501960817


def channel_noise(plane):
    """Rms of the noise in one channel, robust to bright positive emission.

    Line emission is positive and, in a channel map, can cover a large part
    of the field; the whole-plane median absolute deviation then counts it
    as noise (a 75 / 25 mixture of noise and a bright line reads ~1.4 sigma).
    For a continuum-subtracted cube the noise is symmetric about zero and
    the emission only fills the positive side, so the negative pixels are
    (nearly) pure noise: ``-x`` over ``x < 0`` is half-normal, with median
    ``sigma * Phi^-1(0.75)``.

    Parameters
    ----------
    plane : array_like
        Channel image, brightness units; NaN marks blanked pixels.  The
        baseline must be zero (continuum subtracted).

    Returns
    -------
    float
        Noise rms in the units of ``plane``; NaN if every pixel is blank.
        With fewer than 50 negative pixels, ``astropy.stats.mad_std`` of
        the whole plane.
    """
    from astropy.stats import mad_std
    x = np.asarray(plane, dtype=float)
    x = x[np.isfinite(x)]
    if x.size == 0:
        return float("nan")
    neg = x[x < 0.0]
    if neg.size < _MIN_NEGATIVE_PIXELS:
        return float(mad_std(x))
    return float(np.median(-neg) / _HALF_NORMAL_MEDIAN)


def _robust_noise(data, line_free):
    """Per-channel noise and the noise of the line-free channels pooled,
    both from :func:`channel_noise`."""
    nchan = data.shape[0]
    per = np.array([channel_noise(data[k]) for k in range(nchan)])
    total = channel_noise(data[list(line_free)])
    return per, total


def _read_beams(hdul, hdr, path, nchan, stokes_index, card):
    """Return bmaj, bmin (arcsec), bpa (deg) arrays of shape (nchan,) and the source."""
    from astropy import units as u
    table_hdu = None
    for h in hdul[1:]:
        if str(h.header.get("EXTNAME", "")).strip().upper() == "BEAMS":
            table_hdu = h
            break
    casambm = bool(card("CASAMBM")) if "CASAMBM" in hdr else False
    if table_hdu is not None:
        cols = {c.name.upper(): c for c in table_hdu.columns}
        for need in ("BMAJ", "BMIN", "BPA", "CHAN"):
            if need not in cols:
                raise InputFileError(f"{path}: BEAMS table has no {need} column", file=path,
                                     key=need)
        tab = table_hdu.data
        try:
            chan = np.asarray(tab[cols["CHAN"].name]).astype(int)
            pol = (np.asarray(tab[cols["POL"].name]).astype(int) if "POL" in cols
                   else np.zeros_like(chan))
            vals = {}
            for name, default in (("BMAJ", u.arcsec), ("BMIN", u.arcsec), ("BPA", u.deg)):
                unit = _unit(cols[name].unit, path, f"TUNIT ({name})", default)
                target = u.deg if name == "BPA" else u.arcsec
                vals[name] = np.asarray(tab[cols[name].name], dtype=float) * unit.to(target)
        except InputFileError:
            raise
        except Exception as exc:
            raise InputFileError(f"{path}: BEAMS table unreadable ({type(exc).__name__})",
                                 file=path) from None
        want_pol = 0
        sel = pol == want_pol
        out = np.full((3, nchan), np.nan)
        for c, a, b, p in zip(chan[sel], vals["BMAJ"][sel], vals["BMIN"][sel],
                              vals["BPA"][sel]):
            if 0 <= c < nchan and np.isnan(out[0, c]):
                out[:, c] = (a, b, p)
        missing = np.flatnonzero(np.isnan(out[0]))
        if missing.size:
            raise InputFileError(f"{path}: BEAMS table has no beam for channel "
                                 f"{int(missing[0])} (POL = {want_pol})"
                                 + (f" and {missing.size - 1} more" if missing.size > 1
                                    else ""), file=path, key="CHAN",
                                 value=int(missing[0]))
        source = "BEAMS table"
        bmaj, bmin, bpa = out
    else:
        if "BMAJ" not in hdr:
            hint = " (CASAMBM = T but no BEAMS extension)" if casambm else ""
            raise InputFileError(f"{path}: no beam: BMAJ absent and no BEAMS table{hint}",
                                 file=path, key="BMAJ")
        a = _finite_float(hdr, "BMAJ", path) * 3600.0
        b = _finite_float(hdr, "BMIN", path) * 3600.0
        if "BPA" in hdr:
            p = _finite_float(hdr, "BPA", path)
        else:
            log.warning("%s: BPA absent, beam position angle taken as 0 deg", path)
            p = 0.0
        for key in ("BMAJ", "BMIN", "BPA"):
            card(key)
        bmaj, bmin, bpa = (np.full(nchan, a), np.full(nchan, b), np.full(nchan, p))
        source = "header BMAJ/BMIN/BPA"
    if not (np.all(np.isfinite(bmaj)) and np.all(bmaj > 0) and np.all(bmin > 0)
            and np.all(np.isfinite(bmin)) and np.all(np.isfinite(bpa))):
        raise InputFileError(f"{path}: beam sizes must be positive and finite "
                             f"(BMAJ/BMIN from the {source})", file=path, key="BMAJ")
    if np.any(bmin > bmaj * (1 + 1e-9)):
        log.warning("%s: BMIN > BMAJ in some channels; axes swapped (PA + 90 deg)", path)
        swap = bmin > bmaj
        bmaj, bmin = np.where(swap, bmin, bmaj), np.where(swap, bmaj, bmin)
        bpa = np.where(swap, bpa + 90.0, bpa)
    return bmaj, bmin, bpa, source


# ---------------------------------------------------------------------------
# writing
# ---------------------------------------------------------------------------

_STRUCTURAL = {"SIMPLE", "BITPIX", "NAXIS", "EXTEND", "NAXIS1", "NAXIS2", "NAXIS3",
               "NAXIS4", "XTENSION", "PCOUNT", "GCOUNT", "END"}


def write_cube(path, data, *, velocity_kms, pixel_arcsec, rest_frequency_hz, beam,
               ra_deg, dec_deg, bunit="Jy/beam", overwrite=False, extra_cards=None,
               per_channel_beams=None) -> Path:
    """Write an ALMA-like 4-D FITS cube (RA---SIN, DEC--SIN, FREQ, STOKES).

    The frequency axis is linear: evenly spaced radio-convention velocities
    map exactly onto ``nu = nu0 (1 - v / c)``.  ``CDELT1 < 0`` (RA increases
    to the left), reference pixel ``(nx // 2 + 1, ny // 2 + 1)`` (1-based) at
    ``(ra_deg, dec_deg)``, ``SPECSYS = 'LSRK'``, ``RESTFRQ``.  Written
    atomically (temporary file in the target directory, then ``os.replace``).

    Parameters
    ----------
    path : str or os.PathLike
        Output FITS file.
    data : array_like, shape (nchan, ny, nx)
        Brightness in ``bunit``, in pixel order (column 0 is the *west*-most,
        i.e. largest east offset is column 0 -- the same layout as
        :attr:`Cube.data`).  float64 is kept, anything else is written float32.
    velocity_kms : array_like, shape (nchan,)
        Evenly spaced radio velocities of the channels, km/s (either order).
    pixel_arcsec : float
        Pixel size, arcsec.
    rest_frequency_hz : float
        Rest frequency, Hz.
    beam : (float, float, float) or None
        ``(bmaj_arcsec, bmin_arcsec, bpa_deg)``; may be None when
        ``per_channel_beams`` is given.
    ra_deg, dec_deg : float
        Sky position of the reference pixel, deg.
    bunit : str
        ``BUNIT`` card.
    overwrite : bool
        Replace an existing file.
    extra_cards : dict or sequence of (key, value[, comment]), optional
        Additional header cards (structural keywords are refused).
    per_channel_beams : array_like, shape (nchan, 3), optional
        Per-channel ``(bmaj_arcsec, bmin_arcsec, bpa_deg)``; written as a CASA
        ``BEAMS`` binary table with ``CASAMBM = T`` and no ``BMAJ`` card.

    Returns
    -------
    pathlib.Path
        The written file.
    """
    from astropy.io import fits

    path = Path(path)
    if path.exists() and not overwrite:
        raise ResultFileError(f"{path}: exists; pass overwrite=True to replace it",
                              file=path)
    arr = np.asarray(data)
    if arr.ndim != 3 or 0 in arr.shape:
        raise InputFileError(f"{path}: data must have shape (nchan, ny, nx), got "
                             f"{arr.shape}", file=path, key="data", value=arr.shape)
    nchan, ny, nx = arr.shape
    arr = arr.astype(np.float64 if arr.dtype == np.float64 else np.float32, copy=False)
    v = np.asarray(velocity_kms, dtype=float).ravel()
    if v.size != nchan or not np.all(np.isfinite(v)):
        raise InputFileError(f"{path}: velocity_kms must be {nchan} finite values "
                             f"(got {v.size})", file=path, key="velocity_kms")
    if nchan > 1:
        dv = np.diff(v)
        dv0 = (v[-1] - v[0]) / (nchan - 1)
        if dv0 == 0 or np.max(np.abs(dv - dv0)) > 1e-6 * abs(dv0) + 1e-9:
            raise InputFileError(f"{path}: velocity_kms must be evenly spaced and "
                                 f"distinct", file=path, key="velocity_kms")
    else:
        dv0 = 1.0
    nu0 = float(rest_frequency_hz)
    pix = float(pixel_arcsec)
    if not (math.isfinite(nu0) and nu0 > 0):
        raise InputFileError(f"{path}: rest_frequency_hz = {rest_frequency_hz!r} invalid",
                             file=path, key="rest_frequency_hz", value=rest_frequency_hz)
    if not (math.isfinite(pix) and pix > 0):
        raise InputFileError(f"{path}: pixel_arcsec = {pixel_arcsec!r} invalid", file=path,
                             key="pixel_arcsec", value=pixel_arcsec)

    hdr = fits.Header()
    hdr["BSCALE"] = 1.0
    hdr["BZERO"] = 0.0
    beams_hdu = None
    if per_channel_beams is not None:
        pb = np.asarray(per_channel_beams, dtype=float)
        if pb.shape != (nchan, 3) or not np.all(np.isfinite(pb)) or np.any(pb[:, :2] <= 0):
            raise InputFileError(f"{path}: per_channel_beams must be positive finite "
                                 f"(nchan={nchan}, 3) values, got shape {pb.shape}",
                                 file=path, key="per_channel_beams")
        hdr["CASAMBM"] = (True, "per-channel beams in the BEAMS table")
        cols = [
            fits.Column(name="BMAJ", format="E", unit="arcsec", array=pb[:, 0]),
            fits.Column(name="BMIN", format="E", unit="arcsec", array=pb[:, 1]),
            fits.Column(name="BPA", format="E", unit="deg", array=pb[:, 2]),
            fits.Column(name="CHAN", format="J", array=np.arange(nchan, dtype=np.int32)),
            fits.Column(name="POL", format="J", array=np.zeros(nchan, dtype=np.int32)),
        ]
        beams_hdu = fits.BinTableHDU.from_columns(cols, name="BEAMS")
        beams_hdu.header["EXTVER"] = 1
        beams_hdu.header["NCHAN"] = nchan
        beams_hdu.header["NPOL"] = 1
    else:
        try:
            bmaj, bmin, bpa = (float(b) for b in beam)
        except (TypeError, ValueError):
            raise InputFileError(f"{path}: beam = {beam!r} is not (bmaj_arcsec, "
                                 f"bmin_arcsec, bpa_deg)", file=path, key="beam",
                                 value=beam) from None
        if not (bmaj > 0 and bmin > 0 and math.isfinite(bmaj + bmin + bpa)):
            raise InputFileError(f"{path}: beam = {beam!r} invalid", file=path, key="beam",
                                 value=beam)
        hdr["BMAJ"] = bmaj / 3600.0
        hdr["BMIN"] = bmin / 3600.0
        hdr["BPA"] = bpa
    hdr["BTYPE"] = "Intensity"
    hdr["BUNIT"] = (bunit, "brightness unit")
    hdr["RADESYS"] = "ICRS"
    hdr["EQUINOX"] = 2000.0
    hdr["LONPOLE"] = 180.0
    hdr["LATPOLE"] = float(dec_deg)
    freq0 = nu0 * (1.0 - v[0] / C_KMS)
    dfreq = -nu0 * dv0 / C_KMS
    axes = [
        ("RA---SIN", float(ra_deg), -pix / 3600.0, nx // 2 + 1.0, "deg"),
        ("DEC--SIN", float(dec_deg), pix / 3600.0, ny // 2 + 1.0, "deg"),
        ("FREQ", freq0, dfreq, 1.0, "Hz"),
        ("STOKES", 1.0, 1.0, 1.0, ""),
    ]
    for i, (ct, crv, cdl, crp, cu) in enumerate(axes, start=1):
        hdr[f"CTYPE{i}"] = ct
        hdr[f"CRVAL{i}"] = crv
        hdr[f"CDELT{i}"] = cdl
        hdr[f"CRPIX{i}"] = crp
        hdr[f"CUNIT{i}"] = cu
    hdr["PC1_1"] = 1.0
    hdr["PC2_2"] = 1.0
    hdr["PC3_3"] = 1.0
    hdr["PC4_4"] = 1.0
    hdr["RESTFRQ"] = (nu0, "rest frequency, Hz")
    hdr["SPECSYS"] = ("LSRK", "spectral reference frame")
    hdr["VELREF"] = (257, "radio LSR (AIPS convention)")
    hdr["ORIGIN"] = "kinkfit"
    if extra_cards:
        items = extra_cards.items() if isinstance(extra_cards, dict) else extra_cards
        for item in items:
            key, value = str(item[0]), item[1]
            if key.upper() in _STRUCTURAL:
                raise InputFileError(f"{path}: extra card {key} is structural and may "
                                     f"not be set", file=path, key=key)
            if isinstance(value, tuple):      # dict form {key: (value, comment)}
                hdr[key] = value
            elif len(item) > 2:               # sequence form (key, value, comment)
                hdr[key] = (value, item[2])
            else:
                hdr[key] = value
    primary = fits.PrimaryHDU(data=arr[np.newaxis], header=hdr)
    hdul = fits.HDUList([primary] + ([beams_hdu] if beams_hdu is not None else []))

    target_dir = path.parent if str(path.parent) else Path(".")
    if not target_dir.is_dir():
        raise ResultFileError(f"{path}: directory {target_dir} does not exist", file=path)
    from .atomic import atomic_path
    with atomic_path(path) as tmp:
        hdul.writeto(tmp, overwrite=True, output_verify="exception")
    log.info("wrote %s (%d channels, %d x %d pixels)", path, nchan, ny, nx)
    return path


# ---------------------------------------------------------------------------
# description
# ---------------------------------------------------------------------------


def _summary_dict(cube: Cube) -> dict:
    v = cube.velocity_kms
    prov = cube.provenance
    single = cube.single_beam
    beam = {
        "major_arcsec": [float(b) for b in cube.beam_major_arcsec],
        "minor_arcsec": [float(b) for b in cube.beam_minor_arcsec],
        "pa_deg": [float(b) for b in cube.beam_pa_deg],
        "single": single,
        "source": prov.get("beam_source", ""),
        "area_pixels_median": float(np.median(cube.beam_area_pixels())),
    }
    cards = {k: (v_ if isinstance(v_, (bool, int, float, str)) else str(v_))
             for k, v_ in prov.get("header_cards", {}).items()}
    return {
        "path": prov.get("path", ""),
        "sha256": prov.get("sha256", ""),
        "shape": [cube.nchan, cube.ny, cube.nx],
        "nchan": cube.nchan,
        "ny": cube.ny,
        "nx": cube.nx,
        "axes_fits": prov.get("axis_order_fits", []),
        "spectral_ctype": prov.get("spectral_ctype", ""),
        "velocity_convention": prov.get("velocity_convention", ""),
        "velocity_kms": [float(x) for x in v],
        "velocity_min_kms": float(np.min(v)),
        "velocity_max_kms": float(np.max(v)),
        "velocity_order": "ascending" if cube.velocity_ascending else "descending",
        "channel_width_kms": cube.channel_width_kms,
        "pixel_arcsec": cube.pixel_arcsec,
        "x_range_arcsec": [float(cube.x_arcsec[0]), float(cube.x_arcsec[-1])],
        "y_range_arcsec": [float(cube.y_arcsec[0]), float(cube.y_arcsec[-1])],
        "centre_deg": [cube.centre_ra_deg, cube.centre_dec_deg],
        "beam": beam,
        "noise": cube.noise,
        "noise_per_channel": [None if not np.isfinite(x) else float(x)
                              for x in cube.noise_per_channel],
        "line_free_channels": list(cube.line_free_channels),
        "blanked_fraction": cube.blanked_fraction,
        "rest_frequency_hz": cube.rest_frequency_hz,
        "specsys": cube.specsys,
        "bunit": cube.bunit,
        "bunit_raw": cube.bunit_raw,
        "header_cards": cards,
    }


def describe_cube(cube: Cube, as_json: bool = False) -> str:
    """Describe what the reader understood of a cube.

    Parameters
    ----------
    cube : Cube
    as_json : bool
        Return a JSON document (keys ``nchan``, ``velocity_kms``, ``beam``,
        ``noise``, ``header_cards``...) instead of text.

    Returns
    -------
    str
    """
    d = _summary_dict(cube)
    if as_json:
        return json.dumps(d, indent=1)
    b = d["beam"]
    if b["single"]:
        beam = (f"{b['major_arcsec'][0]:.4g}\" x {b['minor_arcsec'][0]:.4g}\" at PA "
                f"{b['pa_deg'][0]:.4g} deg ({b['source']})")
    else:
        beam = (f"per channel ({b['source']}): major {min(b['major_arcsec']):.4g}-"
                f"{max(b['major_arcsec']):.4g}\", minor {min(b['minor_arcsec']):.4g}-"
                f"{max(b['minor_arcsec']):.4g}\", PA {min(b['pa_deg']):.4g}-"
                f"{max(b['pa_deg']):.4g} deg")
    nu0 = d["rest_frequency_hz"]
    lines = [
        f"file            {d['path']}",
        f"sha256          {d['sha256']}",
        f"FITS axes       {', '.join(d['axes_fits'])}",
        f"shape           nchan={d['nchan']}  ny={d['ny']}  nx={d['nx']}",
        f"spectral axis   {d['spectral_ctype']} -> {d['velocity_convention']} velocity",
        f"velocity        {d['velocity_kms'][0]:.4f} .. {d['velocity_kms'][-1]:.4f} km/s "
        f"({d['velocity_order']} with channel), width {d['channel_width_kms']:.4f} km/s",
        f"rest frequency  " + (f"{nu0 / 1e9:.7f} GHz" if nu0 else "absent"),
        f"SPECSYS         {d['specsys'] or 'absent'}",
        f"pixel           {d['pixel_arcsec']:.5g} arcsec; x (east) {d['x_range_arcsec'][0]:.4g}"
        f" .. {d['x_range_arcsec'][1]:.4g}, y (north) {d['y_range_arcsec'][0]:.4g} .. "
        f"{d['y_range_arcsec'][1]:.4g} arcsec",
        f"centre          RA {d['centre_deg'][0]:.7f} deg, Dec {d['centre_deg'][1]:.7f} deg",
        f"beam            {beam}; {b['area_pixels_median']:.4g} pixels per beam",
        f"BUNIT           {d['bunit']} (raw '{d['bunit_raw']}')",
        f"noise           {d['noise']:.4g} {d['bunit']} (negative pixels of channels "
        f"{_ranges(d['line_free_channels'])})",
        f"blanked         {100 * d['blanked_fraction']:.2f} % of voxels",
        "header cards    " + ", ".join(f"{k}={v!r}" for k, v in d["header_cards"].items()),
    ]
    return "\n".join(lines)


def _ranges(idx):
    idx = sorted(idx)
    out = []
    start = prev = None
    for k in idx:
        if start is None:
            start = prev = k
        elif k == prev + 1:
            prev = k
        else:
            out.append(f"{start}-{prev}" if prev > start else f"{start}")
            start = prev = k
    if start is not None:
        out.append(f"{start}-{prev}" if prev > start else f"{start}")
    return ", ".join(out)
