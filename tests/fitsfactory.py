"""Synthetic CASA/ALMA-like FITS headers and HDUs for the reader tests.

Built directly with ``astropy.io.fits`` (not with :func:`kinkfit.cube.write_cube`)
so the reader is tested against files it did not write.  Layouts follow the
FITS WCS papers (Paper I: CTYPE/CRVAL/CDELT/CRPIX/CUNIT; Paper II: celestial
projections; Paper III: FREQ/VRAD/VOPT/VELO and RESTFRQ/RESTWAV) and the CASA
multi-beam convention (``CASAMBM`` + ``BEAMS`` binary table with BMAJ, BMIN,
BPA, CHAN, POL).

Nothing here is a real observation: positions and values are invented.
"""

from __future__ import annotations

import numpy as np
from astropy.io import fits

#: 12CO J=2-1 rest frequency, Hz (CDMS, from memory)
NU_CO21 = 230.538e9
#: speed of light, km/s (SI definition)
C_KMS = 299792.458

#: an invented field centre (deg)
RA0 = 187.25
DEC0 = -41.5


def spectral_cards(kind="FREQ", nchan=12, *, descending=False, unit=None,
                   dv_kms=0.25, v0_kms=-1.5, rest_hz=NU_CO21, crpix=1.0, velref=None):
    """Spectral-axis cards ``(ctype, crval, cdelt, crpix, cunit)`` and extras.

    ``kind`` is ``'FREQ'``, ``'VRAD'``, ``'VOPT'``, ``'VELO'`` or ``'VELO-LSR'``.
    For FREQ the channel spacing corresponds to ``dv_kms`` (radio convention);
    ``descending`` reverses the sign of CDELT (FREQ: descending frequency =
    ascending velocity).
    """
    if kind == "FREQ":
        scale = {"Hz": 1.0, "GHz": 1e-9, "MHz": 1e-6, None: 1.0}[unit]
        nu_first = rest_hz * (1 - v0_kms / C_KMS)
        dnu = rest_hz * dv_kms / C_KMS
        cdelt = -dnu if descending else dnu
        return ("FREQ", nu_first * scale, cdelt * scale, crpix, unit or "Hz"), {}
    scale = {"m/s": 1e3, "km/s": 1.0, None: 1e3}[unit]
    cdelt = -dv_kms if descending else dv_kms
    extras = {} if velref is None else {"VELREF": velref}
    return (kind, v0_kms * scale, cdelt * scale, crpix, unit or "m/s"), extras


def cube_header(nx=24, ny=20, nchan=12, *, axes=("RA", "DEC", "SPEC", "STOKES"),
                spectral=None, proj="SIN", ra_deg=RA0, dec_deg=DEC0, pix_arcsec=0.1,
                crpix_sky=None, rest=(("RESTFRQ", NU_CO21),), beam=(0.30, 0.22, 25.0),
                casambm=False, bunit="Jy/beam", specsys="LSRK", bitpix=-32, extra=None):
    """Build a primary header for a cube.

    Parameters
    ----------
    axes : sequence of str
        FITS axis order, from ``'RA'``, ``'DEC'``, ``'SPEC'``, ``'STOKES'``.
    spectral : (cards, extras), optional
        Output of :func:`spectral_cards` (default FREQ ascending).
    rest : sequence of (key, value)
        Rest frequency/wavelength cards to write (empty for none).
    beam : (bmaj_arcsec, bmin_arcsec, bpa_deg) or None
        Single beam written as BMAJ/BMIN/BPA in deg; None writes none.
    extra : dict, optional
        Cards set last (may override anything, also set to None to delete).
    """
    spec, spec_extra = spectral if spectral is not None else spectral_cards("FREQ", nchan)
    if crpix_sky is None:
        crpix_sky = (nx // 2 + 1.0, ny // 2 + 1.0)
    sizes = {"RA": nx, "DEC": ny, "SPEC": nchan, "STOKES": 1}
    cards = {
        "RA": (f"RA---{proj}", ra_deg, -pix_arcsec / 3600.0, crpix_sky[0], "deg"),
        "DEC": (f"DEC--{proj}", dec_deg, pix_arcsec / 3600.0, crpix_sky[1], "deg"),
        "SPEC": spec,
        "STOKES": ("STOKES", 1.0, 1.0, 1.0, ""),
    }
    h = fits.Header()
    h["SIMPLE"] = True
    h["BITPIX"] = bitpix
    h["NAXIS"] = len(axes)
    for i, name in enumerate(axes, start=1):
        h[f"NAXIS{i}"] = sizes[name]
    h["EXTEND"] = True
    if beam is not None:
        h["BMAJ"] = beam[0] / 3600.0
        h["BMIN"] = beam[1] / 3600.0
        h["BPA"] = beam[2]
    if casambm:
        h["CASAMBM"] = True
    h["BTYPE"] = "Intensity"
    h["BUNIT"] = bunit
    h["RADESYS"] = "ICRS"
    for i, name in enumerate(axes, start=1):
        ct, crv, cdl, crp, cu = cards[name]
        h[f"CTYPE{i}"] = ct
        h[f"CRVAL{i}"] = crv
        h[f"CDELT{i}"] = cdl
        h[f"CRPIX{i}"] = crp
        h[f"CUNIT{i}"] = cu
    for key, value in rest:
        h[key] = value
    if specsys:
        h["SPECSYS"] = specsys
    for key, value in spec_extra.items():
        h[key] = value
    for key, value in (extra or {}).items():
        if value is None:
            h.remove(key, ignore_missing=True)
        else:
            h[key] = value
    return h


def data_shape(header):
    """NumPy shape of the data described by ``header`` (reversed NAXISn)."""
    n = header["NAXIS"]
    return tuple(header[f"NAXIS{i}"] for i in range(n, 0, -1))


def beams_table(bmaj_arcsec, bmin_arcsec, bpa_deg, *, chans=None, pols=None,
                tunit="arcsec"):
    """CASA ``BEAMS`` binary table HDU (columns BMAJ, BMIN, BPA, CHAN, POL).

    ``tunit`` is the TUNIT of BMAJ/BMIN (``None`` writes no TUNIT); values
    given in arcsec are converted when ``tunit`` is ``'deg'``/``'DEGREES'``.
    """
    bmaj = np.asarray(bmaj_arcsec, dtype=float)
    bmin = np.asarray(bmin_arcsec, dtype=float)
    n = bmaj.size
    chans = np.arange(n) if chans is None else np.asarray(chans)
    pols = np.zeros(n, dtype=int) if pols is None else np.asarray(pols)
    factor = 1.0 / 3600.0 if tunit in ("deg", "DEGREES") else 1.0
    cols = [
        fits.Column(name="BMAJ", format="E", unit=tunit, array=bmaj * factor),
        fits.Column(name="BMIN", format="E", unit=tunit, array=bmin * factor),
        fits.Column(name="BPA", format="E", unit="deg",
                    array=np.broadcast_to(np.asarray(bpa_deg, float), (n,))),
        fits.Column(name="CHAN", format="J", array=chans.astype(np.int32)),
        fits.Column(name="POL", format="J", array=pols.astype(np.int32)),
    ]
    hdu = fits.BinTableHDU.from_columns(cols, name="BEAMS")
    hdu.header["EXTVER"] = 1
    hdu.header["NCHAN"] = int(np.max(chans) + 1) if n else 0
    hdu.header["NPOL"] = int(np.unique(pols).size)
    return hdu


def make_hdul(header, data=None, *, rng=None, sigma=0.01, table=None):
    """HDUList with ``header`` and data (Gaussian noise of ``sigma`` by default)."""
    shape = data_shape(header)
    if data is None:
        rng = np.random.default_rng(1) if rng is None else rng
        data = rng.normal(0.0, sigma, shape)
    dtype = np.float64 if header.get("BITPIX") == -64 else np.float32
    data = np.asarray(data, dtype=dtype).reshape(shape)
    hdr = header.copy()
    primary = fits.PrimaryHDU(data=data, header=hdr)
    hdus = [primary]
    if table is not None:
        hdus.append(table)
    return fits.HDUList(hdus)


def write(path, header, data=None, **kw):
    """Write a cube file and return its path (str)."""
    make_hdul(header, data, **kw).writeto(path, overwrite=True)
    return str(path)


def bad_files(tmp_path):
    """Malformed inputs, one per failure mode: ``{name: (path, words expected)}``.

    ``words`` are fragments the one-line error message must contain.
    """
    out = {}
    d = tmp_path

    p = d / "text.fits"
    p.write_text("this is not a FITS file\n" * 200)
    out["not_fits"] = (p, ["not a readable FITS"])

    p = d / "empty.fits"
    p.write_bytes(b"")
    out["empty"] = (p, ["empty"])

    p = d / "missing.fits"
    out["missing"] = (p, ["no such file"])

    good = d / "good_for_truncation.fits"
    write(good, cube_header())
    raw = good.read_bytes()
    p = d / "truncated.fits"
    p.write_bytes(raw[: 2880 + 4000])
    out["truncated"] = (p, ["truncated"])

    p = d / "header_only.fits"
    fits.PrimaryHDU().writeto(p)
    out["no_data"] = (p, ["no image data"])

    p = d / "image2d.fits"
    h = fits.Header()
    h["CTYPE1"], h["CTYPE2"] = "RA---SIN", "DEC--SIN"
    fits.PrimaryHDU(np.zeros((8, 8), np.float32), header=h).writeto(p)
    out["image_2d"] = (p, ["2-D", "NAXIS"])

    p = d / "nospec.fits"
    write(p, cube_header(extra={"CTYPE3": "LINEAR", "CUNIT3": ""}))
    out["no_spectral_axis"] = (p, ["no spectral axis"])

    p = d / "noncelestial.fits"
    write(p, cube_header(extra={"CTYPE1": "X", "CTYPE2": "Y"}))
    out["non_celestial"] = (p, ["celestial"])

    p = d / "zerosize.fits"
    h = cube_header(nchan=12)
    h["NAXIS3"] = 0
    h.tofile(p)  # header only: a zero-length axis means no data bytes (FITS 4.0 §4.4.1)
    out["zero_size_axis"] = (p, ["zero size", "NAXIS3"])

    p = d / "norest.fits"
    write(p, cube_header(rest=()))
    out["no_rest_frequency"] = (p, ["rest frequency", "RESTFRQ"])

    p = d / "nobeam.fits"
    write(p, cube_header(beam=None))
    out["no_beam"] = (p, ["BMAJ", "BEAMS"])

    p = d / "beam_gap.fits"
    nchan = 12
    chans = [k for k in range(nchan) if k != 7]
    tab = beams_table(np.full(nchan - 1, 0.3), np.full(nchan - 1, 0.2), 10.0, chans=chans)
    write(p, cube_header(beam=None, casambm=True), table=tab)
    out["beam_missing_channel"] = (p, ["channel 7"])

    p = d / "allnan.fits"
    h = cube_header()
    write(p, h, np.full(data_shape(h), np.nan))
    out["all_nan"] = (p, ["NaN"])

    p = d / "cdelt3zero.fits"
    write(p, cube_header(extra={"CDELT3": 0.0}))
    out["cdelt3_zero"] = (p, ["CDELT3"])

    p = d / "nancrval.fits"
    write(p, cube_header(extra={"CRVAL3": 1.0}))
    raw = bytearray(p.read_bytes())
    i = raw.find(b"CRVAL3  =")
    raw[i:i + 80] = b"CRVAL3  =                  NAN / not a number".ljust(80)
    p.write_bytes(bytes(raw))
    out["nan_crval"] = (p, ["CRVAL3"])

    p = d / "negrest.fits"
    write(p, cube_header(rest=(("RESTFRQ", -1.0),)))
    out["negative_restfrq"] = (p, ["RESTFRQ"])

    p = d / "rotated.fits"
    write(p, cube_header(nx=40, ny=40, extra={"PC1_1": np.cos(0.2), "PC1_2": -np.sin(0.2),
                                              "PC2_1": np.sin(0.2), "PC2_2": np.cos(0.2)}))
    out["rotated"] = (p, ["rotated"])

    p = d / "wave.fits"
    write(p, cube_header(extra={"CTYPE3": "WAVE", "CUNIT3": "m", "CRVAL3": 1.3e-3,
                                "CDELT3": 1e-9}))
    out["unsupported_spectral"] = (p, ["CTYPE3", "WAVE"])

    p = d / "negbeam.fits"
    write(p, cube_header(beam=(-0.3, 0.2, 0.0)))
    out["negative_beam"] = (p, ["beam"])
    return out
