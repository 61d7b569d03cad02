"""The walkthrough notebook runs, from a temporary folder, and shows real results.

``notebooks/walkthrough.ipynb`` is executed with nbclient in a fresh kernel
(``MPLBACKEND=agg``, ``TMPDIR`` inside pytest's ``tmp_path`` so the notebook's
own temporary folder is there too).  A probe cell appended to the in-memory
copy prints the notebook's variables as JSON; the assertions read them.

* ``test_walkthrough_without_fit`` runs every cell not tagged ``fit`` (cube,
  montage, background disk, ridges, gallery, deviation map, forecast): fast;
  skipped once the full run below is part of the default suite.
* ``test_walkthrough_full`` runs the whole notebook with the sampler cell
  (tagged ``parameters``) shrunk further.  It needs the fast wake emulator:
  with the direct model every walker evaluation costs ~0.1-0.3 s and the start
  search alone takes minutes, so it is marked slow while the direct model is
  the default of ``kinkfit.wake.emulator.make_fit_model``.
"""

from __future__ import annotations

import inspect
import json
from pathlib import Path

import pytest

nbformat = pytest.importorskip("nbformat")
nbclient = pytest.importorskip("nbclient")

REPO = Path(__file__).resolve().parents[1]
NOTEBOOK = REPO / "notebooks" / "walkthrough.ipynb"

PROBE_BASE = r"""
import json as _json
_probe = {
    "n_traced": int(len(ridges)),
    "n_deviations": int(len(deviations.offset_arcsec)),
    "inclination_deg": float(geometry.inclination_deg),
    "position_angle_deg": float(geometry.position_angle_deg),
    "mstar_msun": float(geometry.mstar_msun),
    "vsys_kms": float(geometry.vsys_kms),
    "work": str(work),
    "nchan": int(cube.nchan),
}
if forecast_from_config is not None:
    _probe["forecast_min_mass"] = float(forecast.min_mass_any()[0, 0])
"""

PROBE_FIT = r"""
_probe.update({
    "summary_names": [str(n) for n in summary["name"]],
    "summary_units": [str(u) for u in summary["unit"]],
    "summary_median": [float(v) for v in summary["median"]],
    "summary_p16": [float(v) for v in summary["p16"]],
    "summary_p84": [float(v) for v in summary["p84"]],
    "results": {k: str(v) for k, v in run.results.items()},
    "out_folder": str(run.output_folder),
    "output_files": sorted(p.name for p in run.output_folder.iterdir()),
    "comparison": None if run.comparison is None else str(run.comparison),
    "baseline_ndim": int(baseline_fit.ndim),
    "planet_ndim": int(planet_fit.ndim),
})
"""

PROBE_PRINT = 'print("PROBE" + _json.dumps(_probe))'

# the tiny sampler of the full test (walkers >= 2 x 5 free parameters,
# emcee's requirement for the stretch move; common practice, no source)
TINY_SAMPLER = """
WALKERS = 10
MAX_STEPS = 30
CHECK_EVERY = 15
SEED = 11
DAMPING = ["viscous", "none"]
KINK_MODEL = "first-order"
"""


def _emulator_is_default() -> bool:
    try:
        from kinkfit.wake.emulator import make_fit_model
    except ImportError:  # pragma: no cover
        return False
    default = inspect.signature(make_fit_model).parameters["method"].default
    return default == "emulator"


def _load():
    return nbformat.read(NOTEBOOK, as_version=4)


def _tags(cell):
    return set(cell.get("metadata", {}).get("tags", []))


def _execute(nb, tmp_path, monkeypatch):
    """Run ``nb`` in a kernel started in ``tmp_path``; return the probe dict."""
    run_dir = tmp_path / "run"
    tmp_dir = tmp_path / "tmp"
    run_dir.mkdir()
    tmp_dir.mkdir()
    monkeypatch.setenv("MPLBACKEND", "agg")
    monkeypatch.setenv("TMPDIR", str(tmp_dir))
    client = nbclient.NotebookClient(
        nb, timeout=600, kernel_name="python3",
        resources={"metadata": {"path": str(run_dir)}})
    client.execute()
    text = "".join(o.get("text", "") for o in nb.cells[-1].outputs
                   if o.get("output_type") == "stream")
    line = [ln for ln in text.splitlines() if ln.startswith("PROBE")]
    assert line, f"probe cell printed nothing: {text!r}"
    probe = json.loads(line[-1][len("PROBE"):])
    # figures reach the reader as PNG images, whatever the backend
    probe["png_outputs"] = sum("image/png" in o.get("data", {})
                               for c in nb.cells if c.cell_type == "code"
                               for o in c.outputs)
    return probe, tmp_dir


def test_notebook_is_stored_without_outputs():
    # the notebook is committed clean: no outputs, no execution counts
    nb = _load()
    nbformat.validate(nb)
    code = [c for c in nb.cells if c.cell_type == "code"]
    assert len(code) >= 8
    for c in code:
        assert c.outputs == [], c.source[:60]
        assert c.execution_count is None, c.source[:60]
    tagged = [c for c in code if "parameters" in _tags(c)]
    assert len(tagged) == 1, "exactly one sampler-settings cell"
    assert "WALKERS" in tagged[0].source and "MAX_STEPS" in tagged[0].source


def test_notebook_carries_the_caution():
    # PHYSICS.md section 8: other causes of kinks, a mass conditional on the
    # model, the no-planet comparison, no detection claimed from a posterior
    text = " ".join(c.source for c in _load().cells
                    if c.cell_type == "markdown").lower()
    for phrase in ("vertical shear instability", "winds",
                   "gravitational instability", "warps", "conditional",
                   "planet-free baseline", "never a detection", "invented"):
        assert phrase in text, phrase


def _check_base(probe, tmp_dir):
    """Assertions on the cells before the fit (cube, trace, forecast)."""
    assert probe["nchan"] == 36                 # configs/demo.toml [synth] nchan
    assert probe["n_traced"] > 0
    assert probe["n_deviations"] == probe["n_traced"]
    # background fit against the values the demo cube was made with
    # (configs/demo.toml [disk]); tolerances: several times the fit's own
    # 1-sigma errors on this cube (0.5 deg, 0.1 deg, 0.02 Msun, 0.003 km/s)
    assert abs(probe["inclination_deg"] - 38.0) < 3.0
    assert abs(probe["position_angle_deg"] - 112.0) < 1.0
    assert abs(probe["mstar_msun"] - 1.0) < 0.1
    assert abs(probe["vsys_kms"] - 5.6) < 0.03
    # the notebook's scratch folder is the test's temporary one, not the repo
    assert Path(probe["work"]).resolve().is_relative_to(tmp_dir.resolve())
    if "forecast_min_mass" in probe:
        m = probe["forecast_min_mass"]
        # grid of the notebook is 0.3-3 Mjup; a NaN would mean none detected
        assert m == m and 0.3 <= m <= 3.0


@pytest.mark.skipif(_emulator_is_default(),
                    reason="test_walkthrough_full runs these cells too")
def test_walkthrough_without_fit(tmp_path, monkeypatch):
    nb = _load()
    nb.cells = [c for c in nb.cells if "fit" not in _tags(c)]
    nb.cells.append(nbformat.v4.new_code_cell(PROBE_BASE + PROBE_PRINT))
    probe, tmp_dir = _execute(nb, tmp_path, monkeypatch)
    _check_base(probe, tmp_dir)
    # montage, gallery, deviation map, forecast amplitudes
    assert probe["png_outputs"] == 4


def test_walkthrough_full(tmp_path, monkeypatch):
    nb = _load()
    for c in nb.cells:
        if "parameters" in _tags(c):
            c.source = TINY_SAMPLER.strip()
    nb.cells.append(nbformat.v4.new_code_cell(PROBE_BASE + PROBE_FIT
                                              + PROBE_PRINT))
    probe, tmp_dir = _execute(nb, tmp_path, monkeypatch)
    _check_base(probe, tmp_dir)
    # montage, gallery, deviation map, corner plot, forecast amplitudes
    assert probe["png_outputs"] == 5
    # the summary table has the planet parameters with their units
    # (kinkfit.params canonical units: Mjup, au, deg)
    names = probe["summary_names"]
    units = dict(zip(names, probe["summary_units"]))
    for name in ("mass", "radius", "azimuth", "alpha", "jitter"):
        assert name in names
    assert units["mass"] in ("jupiterMass", "Mjup")
    assert units["radius"] == "AU" or units["radius"].lower() == "au"
    med = dict(zip(names, probe["summary_median"]))
    lo = dict(zip(names, probe["summary_p16"]))
    hi = dict(zip(names, probe["summary_p84"]))
    # medians inside the priors of configs/demo.toml and ordered percentiles
    assert 0.2 <= med["mass"] <= 5.0
    assert 50.0 <= med["radius"] <= 220.0
    assert -180.0 <= med["azimuth"] <= 180.0
    for n in names:
        assert lo[n] <= med[n] <= hi[n]
    # one result per damping assumption plus the baseline, all in tmp
    assert set(probe["results"]) == {"viscous", "none", "baseline"}
    out = Path(probe["out_folder"]).resolve()
    assert out.is_relative_to(tmp_dir.resolve())
    for p in probe["results"].values():
        assert Path(p).resolve().is_relative_to(out)
    for name in ("trace.h5", "fit_viscous.h5", "fit_none.h5",
                 "fit_baseline.h5", "viscous", "baseline"):
        assert name in probe["output_files"], name
    # kinkfit.compare is part of the package: the comparison must be there
    assert probe["comparison"] is not None
    assert Path(probe["comparison"]).is_file()
    assert "comparison" in probe["output_files"]
    # the baseline has the jitter only (no planet parameters)
    assert probe["baseline_ndim"] == 1
    assert probe["planet_ndim"] == 5


if not _emulator_is_default():
    # slow while the direct wake model is the default (module docstring)
    test_walkthrough_full = pytest.mark.slow(test_walkthrough_full)
