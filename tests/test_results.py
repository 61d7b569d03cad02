"""Tests of kinkfit.results: exact round trip, atomic writes, bad files."""

import dataclasses
import hashlib
import os

import h5py
import numpy as np
import pytest

from kinkfit.config import SamplerSettings
from kinkfit.errors import ResultFileError
from kinkfit.likelihood import KinkLikelihood
from kinkfit.results import (SCHEMA_VERSION, FitResult, assemble_result,
                             file_sha256, read_result, write_result)
from kinkfit.sampling import run_sampler

from standin import TRUTH, standin_data, standin_model, standin_params


@pytest.fixture(scope="module")
def fit(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("fit")
    rng = np.random.default_rng(5)
    lik = KinkLikelihood(model=standin_model, param_set=standin_params(),
                         **standin_data(rng, npts=60))
    settings = SamplerSettings(walkers=10, max_steps=60, check_every=20,
                               autocorr_multiple=50.0, tau_tolerance=0.01,
                               seed=3, workers=1, progress=False)
    out = run_sampler(lik.log_prob, lik.param_set, settings, tmp / "ck.h5",
                      initial=lik.param_set.pack(TRUTH)[0])
    cube = tmp / "cube.fits"
    cube.write_bytes(b"SIMPLE  =                    T" + b" " * 100)
    res = assemble_result(out, lik, damping="none", config_text="[data]\n"
                          "cube = 'cube.fits'  # é ünïcode\n",
                          cube_path=str(cube), title="fictional test disk",
                          background={"stellar_mass": 1.1, "inclination": 35.0},
                          background_sigma={"stellar_mass": 0.02,
                                            "inclination": 0.5},
                          truths=TRUTH, comparison={"baseline_max_loglike": -3.5},
                          extra_data={"x_arcsec": rng.normal(size=60)},
                          forward_model={"node_subpixels": 2,
                                         "node_check_median_delta_chi2": 0.3},
                          max_pointwise=50)
    return res, lik, out


def assert_results_equal(a: FitResult, b: FitResult):
    for f in dataclasses.fields(FitResult):
        va, vb = getattr(a, f.name), getattr(b, f.name)
        if isinstance(va, np.ndarray):
            assert va.dtype == vb.dtype, f.name
            np.testing.assert_array_equal(va, vb, err_msg=f.name)
        elif isinstance(va, dict) and any(isinstance(v, np.ndarray)
                                          for v in va.values()):
            assert va.keys() == vb.keys(), f.name
            for k in va:
                assert va[k].dtype == vb[k].dtype, (f.name, k)
                np.testing.assert_array_equal(va[k], vb[k], err_msg=k)
        else:
            assert va == vb, f.name
            assert type(va) is type(vb), f.name


def test_round_trip_exact(fit, tmp_path):
    res, lik, out = fit
    p = write_result(tmp_path / "fit.h5", res)
    back = read_result(p)
    # self-consistency: write -> read returns the identical object
    assert_results_equal(res, back)
    assert back.ndim == 4 and back.npts == 60
    assert back.samples.shape[1] == 4
    assert back.pointwise_loglike.shape == (len(back.pointwise_index), 60)


def test_assembled_content(fit):
    res, lik, out = fit
    # MAP is the highest log-probability sample of the chain
    assert np.isclose(lik.log_prob(res.map_theta[None])[0], out.log_prob.max())
    assert np.isclose(res.map_loglike, lik.log_likelihood(res.map_theta)[0])
    # pointwise rows are the likelihood of the recorded samples (oracle:
    # KinkLikelihood.pointwise, itself checked against scipy.stats)
    np.testing.assert_allclose(res.pointwise_loglike,
                               lik.pointwise(res.samples[res.pointwise_index]))
    # checksum oracle: hashlib on the whole file
    want = hashlib.sha256(open(res.cube_path, "rb").read()).hexdigest()
    assert res.cube_sha256 == want == file_sha256(res.cube_path)
    assert res.fixed == {"aspect_ratio": 0.08}
    assert set(res.versions) >= {"numpy", "astropy", "emcee", "h5py"}
    assert res.param_priors[0].startswith("log-uniform")


def test_layout_has_documented_attrs(fit, tmp_path):
    res = fit[0]
    p = write_result(tmp_path / "fit.h5", res)
    with h5py.File(p, "r") as f:
        assert f.attrs["schema_version"] == SCHEMA_VERSION
        assert f["walkers/chain"].shape == res.chain.shape
        assert list(f["parameters"].attrs["names"]) == list(res.param_names)
        assert "version_astropy" in f["provenance"].attrs


def test_refuses_overwrite(fit, tmp_path):
    res = fit[0]
    p = tmp_path / "fit.h5"
    write_result(p, res)
    before = p.read_bytes()
    with pytest.raises(ResultFileError, match="overwrite"):
        write_result(p, res)
    assert p.read_bytes() == before
    write_result(p, dataclasses.replace(res, title="second"), overwrite=True)
    assert read_result(p).title == "second"


def test_atomic_on_failure(fit, tmp_path):
    res = fit[0]
    bad = dataclasses.replace(res, data=dict(res.data,
                                             zz_bad=np.array([object()])))
    p = tmp_path / "fit.h5"
    with pytest.raises(ResultFileError):
        write_result(p, bad)
    assert os.listdir(tmp_path) == []          # no partial or temp file
    write_result(p, res)
    with pytest.raises(ResultFileError):
        write_result(p, bad, overwrite=True)
    assert sorted(os.listdir(tmp_path)) == ["fit.h5"]
    assert_results_equal(read_result(p), res)  # old file untouched


def test_corrupt_and_foreign_files(fit, tmp_path):
    res = fit[0]
    with pytest.raises(ResultFileError, match="not found"):
        read_result(tmp_path / "missing.h5")
    junk = tmp_path / "junk.h5"
    junk.write_bytes(b"\x89HDF\r\n" + b"garbage" * 50)
    with pytest.raises(ResultFileError, match="HDF5"):
        read_result(junk)
    p = write_result(tmp_path / "fit.h5", res)
    trunc = tmp_path / "trunc.h5"
    trunc.write_bytes(p.read_bytes()[: p.stat().st_size // 2])
    with pytest.raises(ResultFileError):
        read_result(trunc)
    foreign = tmp_path / "foreign.h5"
    with h5py.File(foreign, "w") as f:
        f["data"] = np.arange(3)
    with pytest.raises(ResultFileError, match="not a kinkfit result"):
        read_result(foreign)
    newer = tmp_path / "newer.h5"
    newer.write_bytes(p.read_bytes())
    with h5py.File(newer, "a") as f:
        f.attrs["schema_version"] = SCHEMA_VERSION + 1
    with pytest.raises(ResultFileError, match="schema_version"):
        read_result(newer)
    holed = tmp_path / "holed.h5"
    holed.write_bytes(p.read_bytes())
    with h5py.File(holed, "a") as f:
        del f["walkers/chain"]
    with pytest.raises(ResultFileError, match="missing"):
        read_result(holed)


def test_rebuild_likelihood_from_file(fit, tmp_path):
    from kinkfit.results import likelihood_from_result, result_parameter_set
    res, lik, out = fit
    back = read_result(write_result(tmp_path / "fit.h5", res))
    ps = result_parameter_set(back)
    assert ps.free == lik.param_set.free
    assert [ps.prior(n) for n in ps.free] == [lik.param_set.prior(n)
                                              for n in ps.free]
    lik2 = likelihood_from_result(back, standin_model)
    # self-consistency: the rebuilt likelihood reproduces the stored
    # pointwise values and the chain's log-probabilities
    np.testing.assert_allclose(lik2.pointwise(back.samples[back.pointwise_index]),
                               back.pointwise_loglike, rtol=1e-12)
    np.testing.assert_allclose(lik2.log_prob(back.chain[-1]),
                               back.log_prob[-1], rtol=1e-12)
