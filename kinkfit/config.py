"""TOML configuration -> frozen, typed, unit-checked settings.

A config is data, not a script.  Every key is declared once in the schema
below (name, unit, default, check); unknown keys, missing keys, wrong types
and wrong units are :class:`~kinkfit.errors.ConfigError` naming the file and
the key.  A quantity is written either as a plain number in the documented
unit or as a string with an explicit unit (``radius = "120 au"``), which is
converted.  Paths are relative to the config file's folder.

The complete key reference is generated from this schema by
:func:`config_reference` (the README's table is made with it).
"""

from __future__ import annotations

import difflib
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from astropy import units as u

from .errors import ConfigError
from .params import DAMPING_PARAMETER, PARAMETERS, parameters_for
from .priors import Fixed, Prior, make_prior

__all__ = [
    "KinkfitConfig", "DataSettings", "DiskSettings", "WakeSettings",
    "TraceSettings", "LikelihoodSettings", "SamplerSettings",
    "OutputSettings", "SynthSettings", "load_config", "parse_config",
    "config_reference", "LINES",
]

#: Rest frequencies in Hz (CDMS catalogue, from memory; see PHYSICS.md §2)
LINES = {
    "12CO(2-1)": 230.538000e9,
    "12CO(3-2)": 345.7959899e9,
    "13CO(2-1)": 220.3986842e9,
    "C18O(2-1)": 219.5603541e9,
}

_REQUIRED = object()

# unit strings are astropy-parsable; None = not a quantity
_Q = "quantity"


@dataclass(frozen=True)
class _Field:
    name: str
    kind: str                     # quantity | int | float | str | bool | list | choice | path | prior
    default: Any = _REQUIRED
    unit: str | None = None
    choices: tuple = ()
    low: float | None = None      # inclusive bounds in `unit`
    high: float | None = None
    open_low: bool = False
    doc: str = ""


def _f(name, kind, default=_REQUIRED, unit=None, doc="", **kw):
    return _Field(name, kind, default, unit, doc=doc, **kw)


# ---------------------------------------------------------------- schema ---
_SCHEMA: dict[str, tuple[_Field, ...]] = {
    "data": (
        _f("cube", "path", doc="FITS line cube (relative to the config)"),
        _f("distance", _Q, unit="pc", low=0, open_low=True,
           doc="distance to the star"),
        _f("centre_ra", _Q, None, unit="deg",
           doc="RA of the offset origin (default: image centre)"),
        _f("centre_dec", _Q, None, unit="deg",
           doc="Dec of the offset origin (default: image centre)"),
        _f("line_free_channels", "list", None,
           doc="channel indices used for the noise (default: outer 10%)"),
    ),
    "disk": (
        _f("stellar_mass", _Q, unit="solMass", low=0, open_low=True,
           doc="stellar mass (start value of the background fit)"),
        _f("inclination", _Q, unit="deg", low=0, high=89.999,
           doc="inclination, 0 = face on"),
        _f("position_angle", _Q, unit="deg", low=-360, high=360,
           doc="PA of the red-shifted major axis, east of north"),
        _f("rotation", "choice", "counterclockwise",
           choices=("counterclockwise", "clockwise"),
           doc="sense of rotation on the sky"),
        _f("systemic_velocity", _Q, unit="km/s",
           doc="systemic velocity (LSRK, radio)"),
        _f("centre_offset", "list", [0.0, 0.0],
           doc="disk centre (east, north) offset, arcsec"),
        _f("inner_radius", _Q, 0.0, unit="au", low=0,
           doc="inner edge of the modelled emission"),
        _f("outer_radius", _Q, unit="au", low=0, open_low=True,
           doc="outer edge of the modelled emission"),
        _f("surface_aspect", _Q, 0.0, unit="", low=0, high=1.0,
           doc="emitting-layer z/r at the reference radius (front surface)"),
        _f("surface_flaring", _Q, 1.0, unit="", low=0, high=3.0,
           doc="power-law index of z(r)"),
        _f("surface_reference_radius", _Q, 100.0, unit="au", low=0,
           open_low=True, doc="reference radius of the surface law"),
        _f("surface_taper", _Q, None, unit="au", low=0, open_low=True,
           doc="Gaussian taper radius of z(r) (default: none)"),
        _f("fit_background", "bool", True,
           doc="fit the background disk to the traced ridges"),
        _f("refit_with_planet", "int", 1, low=0, high=3,
           doc="rounds of refitting the background disk with the best "
               "planet's kinks taken out, before sampling (forward kink "
               "model; 0: off)"),
    ),
    "wake": (
        _f("aspect_ratio", _Q, 0.08, unit="", low=0, high=0.5,
           open_low=True, doc="h/r at the planet (prior: planet.aspect_ratio)"),
        _f("sound_speed_index", _Q, 0.25, unit="", low=-0.5, high=1.5,
           doc="q in c ∝ r^-q"),
        _f("surface_density_index", _Q, 1.0, unit="", low=-1.0, high=3.0,
           doc="p in Sigma ∝ r^-p"),
        _f("adiabatic_index", _Q, 1.4, unit="", low=1.0, high=3.0,
           doc="gamma of the gas"),
        _f("damping", "list", ["none"],
           doc="damping assumption(s): none, viscous, efold; several "
               "give one fit each for comparison"),
        _f("baseline", "bool", True,
           doc="also fit the planet-free baseline"),
    ),
    "trace": (
        _f("surfaces", "list", ["front"], doc="surfaces to trace"),
        _f("min_snr", _Q, 4.0, unit="", low=1.0,
           doc="minimum peak SNR of a traced point"),
        _f("points_per_beam", _Q, 1.0, unit="", low=0.1, high=4.0,
           doc="ridge points kept per beam FWHM along the ridge"),
        _f("debias", "bool", True,
           doc="remove beam-smearing bias with a traced background model"),
        _f("max_sigma_beams", _Q, 0.15, unit="", low=0, open_low=True,
           high=10.0,
           doc="largest 1-sigma position error of a kept point, in beam "
               "FWHM (docs/physics/tracing.md)"),
    ),
    "likelihood": (
        _f("kind", "choice", "gaussian", choices=("gaussian", "student-t"),
           doc="residual distribution"),
        _f("dof", _Q, 4.0, unit="", low=1.0,
           doc="degrees of freedom of the student-t option"),
        _f("kink_model", "choice", "forward", choices=("forward", "first-order"),
           doc="model kink: the traced peak of the beam-smeared model "
               "channel (forward) or the first-order shift at the point"),
        _f("background_prior", _Q, 3.0, unit="", low=0.0,
           doc="marginalise the planet fit over the background disk, with "
               "a Gaussian prior this many fitted sigmas wide (0: fixed)"),
        _f("node_subpixels", "int", 1, low=1, high=4,
           doc="forward kink model: wake sampled at n x n points per pixel "
               "(2 for massive planets on pixels coarser than ~h_p r_p / 3, "
               "~4x the cost, chosen by node_check = adapt; "
               "docs/physics/response.md)"),
        _f("back_node_stride", "int", 2, low=1, high=4,
           doc="forward kink model: back-layer nodes on every n-th pixel "
               "(1 with node_subpixels >= 2)"),
        _f("node_check", "choice", "adapt", choices=("adapt", "warn", "off"),
           doc="compare the forward model's nodes with one step finer "
               "sub-pixel nodes at the background refit's best planet (mass "
               "+30%; massive prior planets without a refit); when the model "
               "difference exceeds the point errors (delta chi2 > 1) use the "
               "finer nodes (adapt) or only say so (warn)"),
    ),
    "sampler": (
        _f("walkers", "int", 32, low=4, doc="emcee walkers"),
        _f("max_steps", "int", 5000, low=10, doc="step limit"),
        _f("check_every", "int", 100, low=10,
           doc="steps between convergence checks"),
        _f("autocorr_multiple", _Q, 50.0, unit="", low=1.0,
           doc="stop when steps > this x tau"),
        _f("tau_tolerance", _Q, 0.01, unit="", low=0.0, high=1.0,
           doc="stop when tau changed by less than this fraction"),
        _f("seed", "int", 1, low=0, doc="random seed"),
        _f("workers", "int", 1, low=1, doc="processes for the likelihood"),
        _f("progress", "bool", True, doc="show a progress bar"),
    ),
    "output": (
        _f("folder", "path", "kinkfit_out", doc="output folder"),
        _f("overwrite", "bool", False,
           doc="replace existing results instead of refusing"),
    ),
    "synth": (
        _f("seed", "int", 0, low=0, doc="noise seed"),
        _f("npix", "int", 128, low=8, doc="pixels per side"),
        _f("pixel_size", _Q, 0.05, unit="arcsec", low=0, open_low=True,
           doc="pixel size"),
        _f("nchan", "int", 40, low=2, doc="channels"),
        _f("channel_width", _Q, 0.2, unit="km/s", low=0, open_low=True,
           doc="channel width"),
        _f("velocity_centre", _Q, None, unit="km/s",
           doc="centre of the band (default: systemic)"),
        _f("beam_major", _Q, 0.12, unit="arcsec", low=0, open_low=True,
           doc="beam FWHM major axis"),
        _f("beam_minor", _Q, 0.10, unit="arcsec", low=0, open_low=True,
           doc="beam FWHM minor axis"),
        _f("beam_pa", _Q, 0.0, unit="deg", doc="beam PA east of north"),
        _f("peak_snr", _Q, 20.0, unit="", low=0, open_low=True,
           doc="peak brightness / noise rms"),
        _f("line", "choice", "12CO(2-1)", choices=tuple(LINES),
           doc="molecular line (sets the rest frequency)"),
        _f("ra", _Q, 165.0, unit="deg", doc="phase centre RA"),
        _f("dec", _Q, -34.0, unit="deg", doc="phase centre Dec"),
        _f("peak_brightness", _Q, 0.05, unit="", low=0, open_low=True,
           doc="peak intensity of the front surface, Jy/beam"),
        _f("brightness_radius", _Q, 120.0, unit="au", low=0, open_low=True,
           doc="characteristic radius of the brightness profile"),
        _f("back_ratio", _Q, 0.5, unit="", low=0, high=1.0,
           doc="back / front surface brightness"),
        _f("temperature", _Q, 40.0, unit="K", low=0, open_low=True,
           doc="gas temperature at 100 au (thermal line width)"),
        _f("temperature_index", _Q, 0.5, unit="", low=-1, high=2,
           doc="T ∝ r^-index"),
        _f("turbulence", _Q, 0.05, unit="km/s", low=0,
           doc="turbulent line width (1-sigma)"),
        _f("planet", "bool", True, doc="inject the [synth.truth] planet"),
    ),
    "synth.truth": (
        _f("mass", _Q, unit="jupiterMass", low=0, doc="planet mass"),
        _f("radius", _Q, unit="au", low=0, open_low=True,
           doc="orbital radius"),
        _f("azimuth", _Q, unit="deg", low=-360, high=360,
           doc="azimuth from the red-shifted major axis"),
        _f("damping", "choice", "none", choices=tuple(DAMPING_PARAMETER),
           doc="damping of the injected wake"),
        _f("alpha", _Q, 0.0, unit="", low=0, high=1, doc="viscous alpha"),
        _f("efold", _Q, np.inf, unit="", low=0, open_low=True,
           doc="e-folding length / r_p"),
    ),
}

_TOP_LEVEL = ("title", "data", "disk", "wake", "planet", "trace",
              "likelihood", "sampler", "output", "synth")
_REQUIRED_SECTIONS = ("data", "disk")


# ------------------------------------------------------------ dataclasses ---
@dataclass(frozen=True)
class DataSettings:
    """Input cube and observing facts.  Lengths: pc; angles: deg."""
    cube: Path
    distance_pc: float
    centre_ra_deg: float | None
    centre_dec_deg: float | None
    line_free_channels: tuple[int, ...] | None


@dataclass(frozen=True)
class DiskSettings:
    """Background disk start values (angles deg, velocity km/s, radii au)."""
    stellar_mass_msun: float
    inclination_deg: float
    position_angle_deg: float
    rotation: int
    systemic_velocity_kms: float
    centre_offset_arcsec: tuple[float, float]
    inner_radius_au: float
    outer_radius_au: float
    surface_aspect: float
    surface_flaring: float
    surface_reference_radius_au: float
    surface_taper_au: float | None
    fit_background: bool
    refit_with_planet: int = 1

    def geometry(self, distance_pc: float):
        """The :class:`kinkfit.geometry.DiskGeometry` these settings describe."""
        from .geometry import DiskGeometry, EmittingSurface
        surface = EmittingSurface(self.surface_aspect, self.surface_flaring,
                                  self.surface_reference_radius_au,
                                  self.surface_taper_au)
        return DiskGeometry(
            mstar_msun=self.stellar_mass_msun, distance_pc=distance_pc,
            inclination_deg=self.inclination_deg,
            position_angle_deg=self.position_angle_deg,
            rotation=self.rotation,
            x0_arcsec=self.centre_offset_arcsec[0],
            y0_arcsec=self.centre_offset_arcsec[1],
            vsys_kms=self.systemic_velocity_kms, front=surface, back=None,
            r_max_au=self.outer_radius_au, r_min_au=self.inner_radius_au)


@dataclass(frozen=True)
class WakeSettings:
    """Disk thermodynamics at the planet and the damping assumptions."""
    aspect_ratio: float
    sound_speed_index: float
    surface_density_index: float
    adiabatic_index: float
    damping: tuple[str, ...]
    baseline: bool


@dataclass(frozen=True)
class TraceSettings:
    surfaces: tuple[str, ...]
    min_snr: float
    points_per_beam: float
    debias: bool
    #: largest 1-sigma position error of a kept point, beam FWHM
    max_sigma_beams: float = 0.15


@dataclass(frozen=True)
class LikelihoodSettings:
    kind: str
    dof: float
    kink_model: str = "forward"
    background_prior: float = 3.0
    node_subpixels: int = 1
    back_node_stride: int = 2
    node_check: str = "adapt"


@dataclass(frozen=True)
class SamplerSettings:
    walkers: int
    max_steps: int
    check_every: int
    autocorr_multiple: float
    tau_tolerance: float
    seed: int
    workers: int
    progress: bool


@dataclass(frozen=True)
class OutputSettings:
    folder: Path
    overwrite: bool


@dataclass(frozen=True)
class SynthTruth:
    """Planet injected into a synthetic cube (mass Mjup, radius au, deg)."""
    mass_mjup: float
    radius_au: float
    azimuth_deg: float
    damping: str
    alpha: float
    efold: float


@dataclass(frozen=True)
class SynthSettings:
    """Observing setup and emission of a synthetic cube (see ``[synth]``)."""
    seed: int
    npix: int
    pixel_arcsec: float
    nchan: int
    channel_width_kms: float
    velocity_centre_kms: float | None
    beam_major_arcsec: float
    beam_minor_arcsec: float
    beam_pa_deg: float
    peak_snr: float
    line: str
    rest_frequency_hz: float
    ra_deg: float
    dec_deg: float
    peak_brightness: float
    brightness_radius_au: float
    back_ratio: float
    temperature_k: float
    temperature_index: float
    turbulence_kms: float
    planet: bool
    truth: SynthTruth | None


@dataclass(frozen=True)
class KinkfitConfig:
    """A validated configuration.  ``text`` is the TOML as read."""
    path: Path | None
    text: str
    title: str
    data: DataSettings
    disk: DiskSettings
    wake: WakeSettings
    planet_priors: dict = field(hash=False)
    trace: TraceSettings = None
    likelihood: LikelihoodSettings = None
    sampler: SamplerSettings = None
    output: OutputSettings = None
    synth: SynthSettings | None = None

    def geometry(self):
        """Background geometry from the ``[disk]`` start values."""
        return self.disk.geometry(self.data.distance_pc)

    def parameter_set(self, damping: str, with_planet: bool = True):
        """:class:`kinkfit.params.ParameterSet` for one damping assumption."""
        priors = dict(self.planet_priors)
        priors.setdefault("aspect_ratio", Fixed(self.wake.aspect_ratio))
        return parameters_for(damping, priors, with_planet=with_planet,
                              file=self.path)


# ---------------------------------------------------------------- parsing ---
def _suggest(key, allowed):
    close = difflib.get_close_matches(key, list(allowed), n=1)
    return f" (did you mean '{close[0]}'?)" if close else ""


def _quantity(value, unit: str, key: str, file) -> float:
    """Number in `unit`, or string with unit -> float in `unit`."""
    if isinstance(value, bool) or not isinstance(value, (int, float, str)):
        raise ConfigError(f"{key} = {value!r}: expected a number"
                          + (f" in {unit}" if unit else "")
                          + (" or a string with a unit" if unit else ""),
                          file=file, key=key, value=value)
    if isinstance(value, str):
        try:
            q = u.Quantity(value)
        except (TypeError, ValueError):
            raise ConfigError(f"{key} = '{value}' is not a number with a "
                              f"unit", file=file, key=key, value=value)
        try:
            out = q.to_value(u.Unit(unit) if unit else u.dimensionless_unscaled)
        except u.UnitConversionError:
            raise ConfigError(f"{key} = '{value}' has the wrong unit "
                              f"(expected {unit or 'dimensionless'})",
                              file=file, key=key, value=value)
        return float(out)
    return float(value)


def _convert(fld: _Field, value, key: str, file):
    if fld.kind == _Q:
        x = _quantity(value, fld.unit, key, file)
        if not np.isfinite(x) and not (fld.name == "efold" and x == np.inf):
            raise ConfigError(f"{key} = {value!r} is not finite", file=file,
                              key=key, value=value)
        lo_bad = fld.low is not None and (x <= fld.low if fld.open_low
                                          else x < fld.low)
        hi_bad = fld.high is not None and x > fld.high
        if lo_bad or hi_bad:
            rng = (f"{'(' if fld.open_low else '['}"
                   f"{'-inf' if fld.low is None else f'{fld.low:g}'}, "
                   f"{'inf' if fld.high is None else f'{fld.high:g}'}]")
            raise ConfigError(f"{key} = {value!r} is outside the allowed "
                              f"range {rng} {fld.unit or ''}".rstrip(),
                              file=file, key=key, value=value)
        return x
    if fld.kind == "int":
        if isinstance(value, bool) or not isinstance(value, int):
            raise ConfigError(f"{key} = {value!r}: expected an integer",
                              file=file, key=key, value=value)
        if fld.low is not None and value < fld.low:
            raise ConfigError(f"{key} = {value} must be >= {fld.low:g}",
                              file=file, key=key, value=value)
        if fld.high is not None and value > fld.high:
            raise ConfigError(f"{key} = {value} must be <= {fld.high:g}",
                              file=file, key=key, value=value)
        return int(value)
    if fld.kind == "bool":
        if not isinstance(value, bool):
            raise ConfigError(f"{key} = {value!r}: expected true or false",
                              file=file, key=key, value=value)
        return value
    if fld.kind in ("str", "path"):
        if not isinstance(value, str) or not value:
            raise ConfigError(f"{key} = {value!r}: expected a non-empty "
                              f"string", file=file, key=key, value=value)
        return value
    if fld.kind == "choice":
        if value not in fld.choices:
            raise ConfigError(f"{key} = {value!r}: expected one of "
                              f"{', '.join(map(str, fld.choices))}"
                              + _suggest(str(value), fld.choices),
                              file=file, key=key, value=value)
        return value
    if fld.kind == "list":
        if isinstance(value, (str, int, float)) and not isinstance(value, bool):
            value = [value]
        if not isinstance(value, list):
            raise ConfigError(f"{key} = {value!r}: expected a list",
                              file=file, key=key, value=value)
        return list(value)
    raise AssertionError(fld.kind)  # pragma: no cover


def _section(raw: dict, name: str, file) -> dict:
    fields = {f.name: f for f in _SCHEMA[name]}
    if not isinstance(raw, dict):
        raise ConfigError(f"[{name}] must be a table", file=file, key=name)
    subtables = {k.split(".", 1)[1] for k in _SCHEMA if k.startswith(name + ".")}
    for key in raw:
        if key not in fields and key not in subtables:
            raise ConfigError(f"unknown key '{name}.{key}'"
                              + _suggest(key, list(fields) + list(subtables)),
                              file=file, key=f"{name}.{key}")
    out = {}
    for fname, fld in fields.items():
        key = f"{name}.{fname}"
        if fname in raw:
            out[fname] = _convert(fld, raw[fname], key, file)
        elif fld.default is _REQUIRED:
            raise ConfigError(f"missing required key '{key}'", file=file,
                              key=key)
        else:
            out[fname] = fld.default
    return out


def _planet_priors(raw: dict, file) -> dict[str, Prior]:
    if not isinstance(raw, dict):
        raise ConfigError("[planet] must be a table", file=file, key="planet")
    priors = {}
    for name, spec in raw.items():
        key = f"planet.{name}"
        if name not in PARAMETERS:
            raise ConfigError(f"unknown key '{key}'"
                              + _suggest(name, PARAMETERS), file=file, key=key)
        unit = PARAMETERS[name].unit
        if isinstance(spec, dict):
            allowed = {"prior", "low", "high", "mean", "sd", "value"}
            for k in spec:
                if k not in allowed:
                    raise ConfigError(f"unknown key '{key}.{k}'"
                                      + _suggest(k, allowed), file=file,
                                      key=f"{key}.{k}")
            if "prior" not in spec:
                raise ConfigError(f"missing required key '{key}.prior'",
                                  file=file, key=f"{key}.prior")
            nums = {k: _quantity(v, unit, f"{key}.{k}", file)
                    for k, v in spec.items() if k != "prior"}
            if "sd" in spec and isinstance(spec["sd"], str):
                pass  # sd carries the parameter's unit, converted above
            priors[name] = make_prior(str(spec["prior"]), key=key, file=file,
                                      **nums)
        else:
            value = _quantity(spec, unit, key, file)
            priors[name] = make_prior("fixed", value=value, key=key, file=file)
    return priors


def parse_config(text: str, path: str | Path | None = None) -> KinkfitConfig:
    """Validate TOML text; paths resolve relative to ``path``'s folder."""
    file = None if path is None else str(path)
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"not valid TOML: {exc}", file=file)
    for key in raw:
        if key not in _TOP_LEVEL:
            raise ConfigError(f"unknown section or key '{key}'"
                              + _suggest(key, _TOP_LEVEL), file=file, key=key)
    for name in _REQUIRED_SECTIONS:
        if name not in raw:
            raise ConfigError(f"missing required section [{name}]",
                              file=file, key=name)
    base = Path(path).resolve().parent if path is not None else Path.cwd()

    d = _section(raw["data"], "data", file)
    if (d["centre_ra"] is None) != (d["centre_dec"] is None):
        raise ConfigError("data.centre_ra and data.centre_dec go together",
                          file=file, key="data.centre_ra")
    lf = d["line_free_channels"]
    if lf is not None and not all(isinstance(c, int) and not isinstance(c, bool)
                                  for c in lf):
        raise ConfigError("data.line_free_channels must be a list of channel "
                          "indices", file=file, key="data.line_free_channels",
                          value=lf)
    data = DataSettings(cube=(base / d["cube"]).resolve(),
                        distance_pc=d["distance"],
                        centre_ra_deg=d["centre_ra"],
                        centre_dec_deg=d["centre_dec"],
                        line_free_channels=None if lf is None else tuple(lf))

    k = _section(raw["disk"], "disk", file)
    off = k["centre_offset"]
    if len(off) != 2 or not all(isinstance(v, (int, float))
                                and not isinstance(v, bool) for v in off):
        raise ConfigError("disk.centre_offset must be [east, north] in "
                          "arcsec", file=file, key="disk.centre_offset",
                          value=off)
    if k["outer_radius"] <= k["inner_radius"]:
        raise ConfigError("disk.outer_radius must exceed disk.inner_radius",
                          file=file, key="disk.outer_radius")
    disk = DiskSettings(
        stellar_mass_msun=k["stellar_mass"], inclination_deg=k["inclination"],
        position_angle_deg=k["position_angle"],
        rotation=+1 if k["rotation"] == "counterclockwise" else -1,
        systemic_velocity_kms=k["systemic_velocity"],
        centre_offset_arcsec=(float(off[0]), float(off[1])),
        inner_radius_au=k["inner_radius"], outer_radius_au=k["outer_radius"],
        surface_aspect=k["surface_aspect"],
        surface_flaring=k["surface_flaring"],
        surface_reference_radius_au=k["surface_reference_radius"],
        surface_taper_au=k["surface_taper"],
        fit_background=k["fit_background"],
        refit_with_planet=k["refit_with_planet"])

    w = _section(raw.get("wake", {}), "wake", file)
    damping = tuple(str(x) for x in w["damping"])
    for name in damping:
        if name not in DAMPING_PARAMETER:
            raise ConfigError(f"wake.damping: unknown assumption '{name}' "
                              f"(expected one of {', '.join(DAMPING_PARAMETER)})"
                              + _suggest(name, DAMPING_PARAMETER),
                              file=file, key="wake.damping", value=name)
    if not damping or len(set(damping)) != len(damping):
        raise ConfigError("wake.damping must list distinct assumptions",
                          file=file, key="wake.damping", value=damping)
    wake = WakeSettings(
        aspect_ratio=w["aspect_ratio"], sound_speed_index=w["sound_speed_index"],
        surface_density_index=w["surface_density_index"],
        adiabatic_index=w["adiabatic_index"], damping=damping,
        baseline=w["baseline"])

    priors = _planet_priors(raw.get("planet", {}), file)

    t = _section(raw.get("trace", {}), "trace", file)
    for s in t["surfaces"]:
        if s not in ("front", "back"):
            raise ConfigError(f"trace.surfaces: unknown surface '{s}' "
                              f"(expected front, back)", file=file,
                              key="trace.surfaces", value=s)
    trace = TraceSettings(tuple(t["surfaces"]), t["min_snr"],
                          t["points_per_beam"], t["debias"],
                          t["max_sigma_beams"])
    lk = _section(raw.get("likelihood", {}), "likelihood", file)
    likelihood = LikelihoodSettings(lk["kind"], lk["dof"], lk["kink_model"],
                                    lk["background_prior"],
                                    lk["node_subpixels"], lk["back_node_stride"],
                                    lk["node_check"])
    s = _section(raw.get("sampler", {}), "sampler", file)
    sampler = SamplerSettings(**s)
    o = _section(raw.get("output", {}), "output", file)
    output = OutputSettings(folder=(base / o["folder"]).resolve(),
                            overwrite=o["overwrite"])

    synth = None
    if "synth" in raw:
        sy = _section(raw["synth"], "synth", file)
        truth = None
        if "truth" in raw["synth"]:
            tr = _section(raw["synth"]["truth"], "synth.truth", file)
            truth = SynthTruth(tr["mass"], tr["radius"], tr["azimuth"],
                               tr["damping"], tr["alpha"], tr["efold"])
        if sy["planet"] and truth is None:
            raise ConfigError("synth.planet = true needs a [synth.truth] "
                              "table", file=file, key="synth.truth")
        if sy["beam_minor"] > sy["beam_major"]:
            raise ConfigError("synth.beam_minor exceeds synth.beam_major",
                              file=file, key="synth.beam_minor")
        synth = SynthSettings(
            seed=sy["seed"], npix=sy["npix"], pixel_arcsec=sy["pixel_size"],
            nchan=sy["nchan"], channel_width_kms=sy["channel_width"],
            velocity_centre_kms=sy["velocity_centre"],
            beam_major_arcsec=sy["beam_major"],
            beam_minor_arcsec=sy["beam_minor"], beam_pa_deg=sy["beam_pa"],
            peak_snr=sy["peak_snr"], line=sy["line"],
            rest_frequency_hz=LINES[sy["line"]], ra_deg=sy["ra"],
            dec_deg=sy["dec"], peak_brightness=sy["peak_brightness"],
            brightness_radius_au=sy["brightness_radius"],
            back_ratio=sy["back_ratio"], temperature_k=sy["temperature"],
            temperature_index=sy["temperature_index"],
            turbulence_kms=sy["turbulence"], planet=sy["planet"],
            truth=truth if sy["planet"] else None)

    title = raw.get("title", "")
    if not isinstance(title, str):
        raise ConfigError("title must be a string", file=file, key="title")
    cfg = KinkfitConfig(path=None if path is None else Path(path), text=text,
                        title=title, data=data, disk=disk, wake=wake,
                        planet_priors=priors, trace=trace,
                        likelihood=likelihood, sampler=sampler, output=output,
                        synth=synth)
    for name in damping:  # validates priors against physical ranges
        cfg.parameter_set(name)
    if cfg.sampler.walkers < 2 * cfg.parameter_set(damping[0]).ndim:
        raise ConfigError(f"sampler.walkers = {cfg.sampler.walkers} must be at "
                          f"least twice the number of free parameters "
                          f"({cfg.parameter_set(damping[0]).ndim})", file=file,
                          key="sampler.walkers", value=cfg.sampler.walkers)
    return cfg


def load_config(path: str | Path) -> KinkfitConfig:
    """Read and validate a TOML config file."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigError("config file not found", file=path)
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"cannot read config: {exc}", file=path)
    return parse_config(text, path)


def config_reference() -> str:
    """Markdown table of every config key, its unit, default and meaning."""
    rows = ["| key | unit | default | meaning |", "|---|---|---|---|"]
    for section, fields in _SCHEMA.items():
        for f in fields:
            default = "required" if f.default is _REQUIRED else (
                "—" if f.default is None else repr(f.default))
            unit = f.unit if f.unit else ""
            rows.append(f"| `{section}.{f.name}` | {unit} | {default} | "
                        f"{f.doc} |")
    for name, spec in PARAMETERS.items():
        rows.append(f"| `planet.{name}` | {spec.unit} | "
                    f"{spec.default_prior.describe()} | {spec.description}; a "
                    f"number fixes it, a table `{{prior=..., low=..., high=...}}` "
                    f"or `{{prior=\"normal\", mean=..., sd=...}}` sets a prior |")
    return "\n".join(rows)
