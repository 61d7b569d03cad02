"""The bundled demo: its cube is regenerated bit for bit by the documented
command, and its config describes the scenario the README states.

Oracle: the bundled file itself (a regression golden, made by
``kinkfit synth configs/demo.toml --force``; regenerate it with that command
whenever the wake model or the generator changes on purpose).
"""

import filecmp
from pathlib import Path

from astropy.io import fits

from kinkfit.cli import main
from kinkfit.config import load_config

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "configs" / "demo.toml"


def test_demo_cube_regenerates_bit_for_bit(tmp_path):
    out = tmp_path / "demo.fits"
    assert main(["synth", str(DEMO), "-o", str(out)]) == 0
    cfg = load_config(DEMO)
    assert filecmp.cmp(out, cfg.data.cube, shallow=False), (
        "demo cube differs from `kinkfit synth configs/demo.toml`; regenerate "
        "it with `kinkfit synth configs/demo.toml --force` if the change is "
        "intended")


def test_demo_cube_is_small_and_records_its_planet():
    cfg = load_config(DEMO)
    assert cfg.data.cube.stat().st_size < 5 * 2**20
    hdr = fits.getheader(cfg.data.cube)
    assert hdr["KFPLANET"] is True
    assert hdr["KFMASS"] == cfg.synth.truth.mass_mjup
    assert hdr["KFRADIUS"] == cfg.synth.truth.radius_au
    # FITS WCS Paper III: a frequency axis with a rest frequency
    assert hdr["CTYPE3"] == "FREQ" and hdr["RESTFRQ"] > 0
