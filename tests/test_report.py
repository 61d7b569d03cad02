"""Tests of kinkfit.report and kinkfit.plots.posterior."""

import re

import numpy as np
import pytest
from astropy import units as u
from astropy.table import Table
from scipy import stats

from kinkfit.constants import MJUP_PER_MSUN
from kinkfit.plots.posterior import (corner_figure, displacement_figure,
                                     trace_figure)
from kinkfit.report import (baseline_comparison, summary_table, write_report,
                            write_summary)
from kinkfit.results import read_result, write_result

from standin import standin_result


@pytest.fixture(scope="module")
def fits(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("rep")
    planet = standin_result(tmp, max_steps=300)[0]
    base = standin_result(tmp, max_steps=100, baseline=True, walkers=4)[0]
    return planet, base


def test_percentiles_match_numpy(fits):
    res = fits[0]
    t = summary_table(res)
    # oracles: numpy.percentile and scipy.stats.scoreatpercentile
    want = np.percentile(res.samples, [16, 50, 84], axis=0)
    np.testing.assert_array_equal(t["p16"], want[0])
    np.testing.assert_array_equal(t["median"], want[1])
    np.testing.assert_array_equal(t["p84"], want[2])
    for j in range(res.ndim):
        assert np.isclose(t["median"][j],
                          stats.scoreatpercentile(res.samples[:, j], 50))
    np.testing.assert_allclose(t["err_plus"], want[2] - want[1])
    np.testing.assert_array_equal(t["map"], res.map_theta)
    assert list(t["name"]) == list(res.param_names)


def test_ecsv_round_trip_with_units(fits, tmp_path):
    res = fits[0]
    paths = write_summary(res, tmp_path)
    assert [p.suffix for p in paths] == [".ecsv", ".csv", ".tex", ".md"]
    t = summary_table(res)
    back = Table.read(paths[0], format="ascii.ecsv")
    # oracle: astropy ECSV reader keeps full float precision and meta
    for col in ("median", "p16", "p84", "map"):
        np.testing.assert_array_equal(back[col], t[col])
    assert back.meta["damping"] == "none"
    assert back.meta["fixed"] == {"aspect_ratio": 0.08}
    # every unit string parses with astropy and converts consistently
    row = back[list(back["name"]).index("mass")]
    q = u.Quantity(row["median"], u.Unit(row["unit"]))
    assert np.isclose(q.to_value(u.M_sun), row["median"] * MJUP_PER_MSUN)
    for s in back["unit"]:
        u.Unit(s)
    csv = Table.read(paths[1], format="ascii.csv")
    np.testing.assert_allclose(csv["median"], t["median"], rtol=1e-4)
    tex = paths[2].read_text()
    assert r"\begin{table}" in tex and "conditional on the wake model" in tex
    assert r"$M_p\ [M_{\rm J}]$" in tex
    md = paths[3].read_text()
    assert md.count("\n") == res.ndim + 2 and "`radius`" in md


def test_corner_and_trace_axes(fits):
    res = fits[0]
    fig = corner_figure(res)
    assert len(fig.axes) == res.ndim ** 2
    fig2 = corner_figure(res, truths={"mass": 2.0})
    assert len(fig2.axes) == res.ndim ** 2
    tr = trace_figure(res)
    assert len(tr.axes) == res.ndim + 1
    assert tr.axes[-1].get_xlabel() == "step"
    d = displacement_figure(res)
    assert len(d.axes) == 2 and "arcsec" in d.axes[0].get_ylabel()
    one = corner_figure(fits[1])
    assert len(one.axes) == 1


def test_baseline_comparison_prefers_injected_planet(fits):
    planet, base = fits
    c = baseline_comparison(planet, base)
    want = (max(planet.pointwise_loglike.sum(1).max(), planet.map_loglike)
            - max(base.pointwise_loglike.sum(1).max(), base.map_loglike))
    assert np.isclose(c["delta_loglike_max"], want)
    # BIC = k ln n - 2 ln L (Schwarz 1978)
    assert np.isclose(c["delta_bic"],
                      3 * np.log(60) - 2 * c["delta_loglike_max"])
    # a 2.5-sigma-per-point signal is strongly preferred over no planet
    assert c["delta_bic"] < -10


def test_report_from_file_alone(fits, tmp_path):
    planet, base = fits
    p = write_result(tmp_path / "fit.h5", planet)
    b = write_result(tmp_path / "base.h5", base)
    res = read_result(p)
    paths = write_report(res, tmp_path / "out", baseline=read_result(b),
                         source=p.name)
    names = sorted(x.name for x in paths)
    assert names == sorted(["summary.ecsv", "summary.csv", "summary.tex",
                            "summary.md", "corner.png", "trace.png",
                            "displacements.png", "report.md"])
    for x in paths:
        assert x.stat().st_size > 0
    text = (tmp_path / "out" / "report.md").read_text()
    for phrase in ("conditional on the model", "planet-free baseline",
                   "not a detection by itself", "vertical shear instability",
                   "M_th = (h_p/r_p)^3 M*", "ΔBIC", "N/τ_max",
                   "Acceptance fraction", "damping assumption", "fit.h5"):
        assert phrase in text, phrase
    tau = res.tau
    assert f"{tau[0]:.1f}" in text
    # thermal mass (h/r)^3 M* in Jupiter masses, M* = 1.1, h/r = 0.08
    assert f"{0.08 ** 3 * 1.1 / MJUP_PER_MSUN:.4g} M_Jup" in text
    # no template placeholder left unfilled
    assert not re.search(r"\$[a-z_]+", text)


def test_report_without_baseline_warns(fits, tmp_path):
    write_report(fits[0], tmp_path)
    text = (tmp_path / "report.md").read_text()
    assert "No planet-free baseline is stored" in text
    write_report(fits[1], tmp_path / "b")
    assert "*is* the planet-free baseline" in (tmp_path / "b" / "report.md"
                                               ).read_text()
