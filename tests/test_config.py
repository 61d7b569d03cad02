"""Config validation: every example config loads; bad configs give one clear
ConfigError naming the key (contract in DEVELOPERS.md)."""

from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from kinkfit.config import LINES, config_reference, load_config, parse_config
from kinkfit.errors import ConfigError
from kinkfit.priors import LogUniform, Uniform

ROOT = Path(__file__).resolve().parents[1]

MINIMAL = """
[data]
cube = "cube.fits"
distance = 140
[disk]
stellar_mass = 1.0
inclination = 30
position_angle = 45
systemic_velocity = 5.0
outer_radius = 200
"""


@pytest.mark.parametrize("path", sorted((ROOT / "configs").glob("*.toml")),
                         ids=lambda p: p.name)
def test_every_example_config_loads(path):
    if "manifest" in path.name:  # survey manifests have their own schema
        from kinkfit.batch import load_manifest
        manifest = load_manifest(path)
        assert manifest.entries
        for entry in manifest.entries:  # every listed config validates too
            assert load_config(entry.config).data.cube.exists()
        return
    cfg = load_config(path)
    for damping in cfg.wake.damping:
        pset = cfg.parameter_set(damping)
        assert pset.ndim >= 1
        assert cfg.sampler.walkers >= 2 * pset.ndim


def test_units_are_converted():
    # astropy.units as the oracle for the conversions: 1 au = 1.495978707e11 m
    text = MINIMAL.replace("outer_radius = 200", 'outer_radius = "2.991957414e13 m"')
    text = text.replace("inclination = 30", 'inclination = "0.5235987755982988 rad"')
    cfg = parse_config(text, "x.toml")
    assert cfg.disk.outer_radius_au == pytest.approx(200.0, rel=1e-10)
    assert cfg.disk.inclination_deg == pytest.approx(30.0, rel=1e-12)


def test_rest_frequencies_are_cdms_values():
    # CDMS catalogue values (from memory), as listed in PHYSICS.md §2
    assert LINES["12CO(2-1)"] == pytest.approx(230.538000e9)
    assert LINES["13CO(2-1)"] == pytest.approx(220.3986842e9)
    assert LINES["C18O(2-1)"] == pytest.approx(219.5603541e9)


def test_prior_units_and_default_priors():
    text = MINIMAL + """
[planet]
mass = { prior = "log-uniform", low = "1e-4 solMass", high = "10 jupiterMass" }
radius = { prior = "uniform", low = "7.48e12 m", high = 150 }
"""
    cfg = parse_config(text, "x.toml")
    pset = cfg.parameter_set("none")
    m = pset.prior("mass")
    # 1e-4 Msun in Jupiter masses: M_sun/M_jup = 1047.57 (IAU nominal, astropy)
    assert isinstance(m, LogUniform) and m.low == pytest.approx(0.104757, rel=1e-4)
    assert isinstance(pset.prior("radius"), Uniform)
    assert pset.prior("radius").low == pytest.approx(50.0, rel=1e-3)


@pytest.mark.parametrize("edit,needle", [
    (lambda t: t + "\n[sampler]\nwalkrs = 10\n", "sampler.walkrs"),
    (lambda t: t + "\n[wake]\ndamping = 'viscus'\n", "viscous"),
    (lambda t: t.replace("distance = 140", 'distance = "140 km/s"'), "data.distance"),
    (lambda t: t.replace("distance = 140", "distance = -1"), "data.distance"),
    (lambda t: t.replace("inclination = 30", 'inclination = "thirty"'), "disk.inclination"),
    (lambda t: t.replace("inclination = 30", "inclination = 95"), "disk.inclination"),
    (lambda t: t.replace("outer_radius = 200\n", ""), "disk.outer_radius"),
    (lambda t: t + "\n[planet]\nmass = { prior = 'uniform', low = 5, high = 1 }\n", "planet.mass"),
    (lambda t: t + "\n[planet]\nmass = { prior = 'log-uniform', low = 0, high = 1 }\n", "planet.mass"),
    (lambda t: t + "\n[planet]\naspect_ratio = { prior = 'uniform', low = 0.1, high = 0.9 }\n", "planet.aspect_ratio"),
    (lambda t: t + "\n[planet]\nmas = 1.0\n", "planet.mas"),
    (lambda t: t + "\n[sampler]\nwalkers = 'many'\n", "sampler.walkers"),
    (lambda t: t + "\n[sampler]\nwalkers = 4\n", "sampler.walkers"),
    (lambda t: t + "\nbogus = 1\n", "bogus"),
    (lambda t: t + "\n[likelihood]\nnode_subpixels = 0\n", "likelihood.node_subpixels"),
    (lambda t: t + "\n[likelihood]\nback_node_stride = 9\n", "likelihood.back_node_stride"),
    (lambda t: t.replace("[data]", "[data\n"), "TOML"),
])
def test_bad_configs_name_the_key(edit, needle):
    with pytest.raises(ConfigError) as err:
        parse_config(edit(MINIMAL), "bad.toml")
    msg = str(err.value)
    assert needle in msg and "\n" not in msg and msg.startswith("bad.toml")


def test_missing_file():
    with pytest.raises(ConfigError, match="not found"):
        load_config("/nonexistent/kinkfit.toml")


def test_reference_lists_every_key():
    ref = config_reference()
    for key in ("data.cube", "disk.inclination", "wake.damping",
                "sampler.walkers", "planet.mass", "synth.truth.mass"):
        assert f"`{key}`" in ref


_values = st.one_of(st.integers(-10**6, 10**6), st.floats(allow_nan=True),
                    st.text(max_size=12), st.booleans(),
                    st.lists(st.integers(), max_size=3))


@settings(max_examples=300, deadline=None)
@given(section=st.sampled_from(["disk", "wake", "sampler", "trace", "data"]),
       key=st.sampled_from(["inclination", "damping", "walkers", "min_snr",
                            "distance", "seed", "surface_aspect", "nonsense"]),
       value=_values)
def test_fuzzed_values_give_valid_config_or_config_error(section, key, value):
    # property: any value either validates or raises ConfigError, never
    # another exception (robustness contract, DEVELOPERS.md)
    import tomllib  # noqa: F401  (value encoding below)
    import json
    if isinstance(value, float) and not np.isfinite(value):
        enc = "nan" if np.isnan(value) else ("inf" if value > 0 else "-inf")
    else:
        enc = json.dumps(value)
    text = MINIMAL + f"\n[{section}]\n{key} = {enc}\n" if section != "data" \
        and section != "disk" else MINIMAL.replace(f"[{section}]",
                                                   f"[{section}]\n{key} = {enc}")
    try:
        parse_config(text, "fuzz.toml")
    except ConfigError as exc:
        assert "\n" not in str(exc)
