"""CLI tests of ``kinkfit inspect`` and ``kinkfit montage``.

The contract (DEVELOPERS.md, Errors): a user mistake prints one line
``kinkfit: error: <message>`` naming the file on stderr and exits 2, never a
traceback.  Reference values come from astropy (WCS spectral axis as oracle).
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from astropy import units as u
from astropy.io import fits
from astropy.wcs import WCS

import fitsfactory as ff
from kinkfit.cli import main


@pytest.fixture(scope="module")
def bad_cases(tmp_path_factory):
    return ff.bad_files(tmp_path_factory.mktemp("bad"))


CASE_NAMES = ["not_fits", "empty", "missing", "truncated", "no_data", "image_2d",
              "no_spectral_axis", "non_celestial", "zero_size_axis", "no_rest_frequency",
              "no_beam", "beam_missing_channel", "all_nan", "cdelt3_zero", "nan_crval",
              "negative_restfrq", "rotated", "unsupported_spectral", "negative_beam"]


def test_case_list_is_complete(bad_cases):
    assert sorted(bad_cases) == sorted(CASE_NAMES)


@pytest.mark.parametrize("name", CASE_NAMES)
def test_inspect_bad_input_one_line_exit_2(bad_cases, capsys, name):
    path, words = bad_cases[name]
    rc = main(["inspect", str(path)])
    out, err = capsys.readouterr()
    assert rc == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("kinkfit: error:")
    assert str(path) in lines[0]
    assert "Traceback" not in err and out == ""
    for w in words:
        assert w in lines[0], (w, lines[0])


def test_inspect_text_and_json(tmp_path, capsys):
    nchan = 9
    hdr = ff.cube_header(nx=16, ny=14, nchan=nchan, bunit="JY/BEAM",
                         spectral=ff.spectral_cards("FREQ", nchan, descending=True))
    path = ff.write(tmp_path / "ok.fits", hdr)
    assert main(["inspect", path]) == 0
    out, err = capsys.readouterr()
    assert "nchan=9" in out and "ascending" in out and "Jy/beam" in out
    assert main(["inspect", "--json", path]) == 0
    out, err = capsys.readouterr()
    d = json.loads(out)
    assert d["nchan"] == nchan
    # velocities against astropy's WCS spectral axis (oracle)
    sc = WCS(fits.getheader(path)).spectral.pixel_to_world(np.arange(nchan))
    ref = sc.to(u.km / u.s, doppler_convention="radio",
                doppler_rest=ff.NU_CO21 * u.Hz).value
    np.testing.assert_allclose(d["velocity_kms"], ref, atol=1e-9)
    np.testing.assert_allclose(d["beam"]["major_arcsec"], 0.30, rtol=1e-9)
    np.testing.assert_allclose(d["beam"]["minor_arcsec"], 0.22, rtol=1e-9)
    assert d["bunit"] == "Jy/beam" and d["bunit_raw"] == "JY/BEAM"
    assert d["specsys"] == "LSRK" and d["header_cards"]["CTYPE3"] == "FREQ"


def test_montage_command_writes_png(tmp_path, capsys):
    path = ff.write(tmp_path / "m.fits", ff.cube_header(nx=16, ny=12, nchan=10))
    assert main(["montage", path, "--channels", "6", "--columns", "3"]) == 0
    out, _ = capsys.readouterr()
    png = tmp_path / "m_channels.png"
    assert png.is_file() and str(png) in out
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"   # PNG signature (PNG spec)
    target = tmp_path / "custom.png"
    assert main(["montage", path, "-o", str(target)]) == 0
    assert target.is_file()


def test_montage_bad_layout_and_bad_cube(tmp_path, capsys, bad_cases):
    path = ff.write(tmp_path / "m.fits", ff.cube_header(nx=8, ny=8, nchan=4))
    assert main(["montage", path, "--columns", "0"]) == 2
    _, err = capsys.readouterr()
    assert err.startswith("kinkfit: error:") and "ncols" in err
    bad, _ = bad_cases["no_beam"]
    assert main(["montage", str(bad)]) == 2
    _, err = capsys.readouterr()
    assert len(err.strip().splitlines()) == 1 and str(bad) in err
