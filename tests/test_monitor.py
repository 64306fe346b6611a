"""Per-row T2, SPE, alarms and contributions: unit checks against numpy, and whole runs
(scores/ parts, Result.monitor, Result.contributions, pcapipe project --explain)."""

import glob
import os

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
from conftest import make_config, write_parquet
from scipy import stats

import pcapipe
from pcapipe.cli import main
from pcapipe.alarms import count_alarms
from pcapipe.limits import spe_limit_box, t2_limit_new, t2_limit_training
from pcapipe.monitor import contributions, row_statistics

STAT_RTOL = 1e-10  # the assignment's bound for T2 and SPE against numpy on the full data


# -- unit -------------------------------------------------------------------------
def test_row_statistics_equal_numpy(rng):
    x = rng.standard_normal((50, 8))
    v, _ = np.linalg.qr(rng.standard_normal((8, 3)))
    lam = np.array([4.0, 2.0, 0.5])
    scores, t2, spe = row_statistics(x, v, lam)
    ref_scores = x @ v
    np.testing.assert_allclose(t2, np.sum(ref_scores**2 / lam, axis=1), rtol=1e-13)
    np.testing.assert_allclose(spe, np.linalg.norm(x - ref_scores @ v.T, axis=1) ** 2, rtol=1e-13)


def test_spe_of_a_row_in_the_model_plane_has_no_cancellation_noise(rng):
    v, _ = np.linalg.qr(rng.standard_normal((30, 4)))
    x = (v @ rng.standard_normal((4, 20)) * 1e3).T  # rows of norm ~2e3 lying in the plane
    _, _, spe = row_statistics(x, v, np.ones(4))
    residual_norm2 = np.linalg.norm(x - (x @ v) @ v.T, axis=1) ** 2
    np.testing.assert_allclose(spe, residual_norm2, rtol=1e-12, atol=0)
    # ||x||^2 ~ 4e6: the difference of squares would leave ~eps * 4e6 ~ 1e-9 of noise; the
    # residual vector's square is ~(eps * 2e3)^2 ~ 1e-25
    cancel = np.abs(np.sum(x**2, axis=1) - np.sum((x @ v) ** 2, axis=1))
    assert spe.max() < 1e-18
    assert cancel.max() > 1e3 * spe.max()


def test_contributions_sum_to_the_statistics(rng):
    x = rng.standard_normal((40, 9))
    v, _ = np.linalg.qr(rng.standard_normal((9, 2)))
    lam = np.array([3.0, 1.5])
    _, t2, spe = row_statistics(x, v, lam)
    ct2, cspe = contributions(x, v, lam)
    np.testing.assert_allclose(ct2.sum(axis=1), t2, rtol=1e-12)
    np.testing.assert_allclose(cspe.sum(axis=1), spe, rtol=1e-12)
    assert (cspe >= 0).all()


# -- whole runs ---------------------------------------------------------------------
def _data(rng, n=3000, d=10):
    """Two factors (on f0-f2 and on f3-f5) over independent noise; distinct eigenvalues."""
    z = rng.standard_normal((n, 2)) * [3.0, 2.0]
    x = 0.3 * rng.standard_normal((n, d)) * np.linspace(1.0, 1.5, d)
    x[:, :3] += z[:, :1] * [1.0, 0.9, 0.8]
    x[:, 3:6] += z[:, 1:] * [1.0, 0.8, 0.7]
    return x + np.arange(d) * 10.0


def _numpy_reference(x, k, scale):
    """Per-row T2 and SPE from numpy.linalg.eigh of numpy.cov (ddof=1) of the full data."""
    mean = x.mean(axis=0)
    xc = x - mean
    if scale:
        xc = xc / x.std(axis=0, ddof=1)
    w, v = np.linalg.eigh(np.cov(xc, rowvar=False))
    w, v = w[::-1][:k], v[:, ::-1][:, :k]
    t = xc @ v
    t2 = np.sum(t**2 / w, axis=1)
    spe = np.linalg.norm(xc - t @ v.T, axis=1) ** 2
    return t2, spe, np.linalg.eigvalsh(np.cov(xc, rowvar=False))[::-1]


def _run(tmp_path, x, tag, files=2, **sections):
    data = tmp_path / f"data-{tag}"
    write_parquet(data, x, files=files, row_group=700)
    return pcapipe.run(make_config(str(data / "*.parquet"), tmp_path / f"out-{tag}", **sections))


@pytest.mark.parametrize("method,scale,missing", [
    ("covariance", False, "fail"),
    ("covariance", True, "fail"),
    ("matrix-free", False, "fail"),
    ("matrix-free", True, "fail"),
    ("covariance", True, "drop-rows"),
    ("matrix-free", False, "impute-mean"),
])
def test_t2_and_spe_in_scores_equal_numpy_on_the_full_data(tmp_path, rng, method, scale, missing):
    x = _data(rng)
    k = 3
    gaps = None
    if missing != "fail":
        gaps = [(5, 1), (77, 4), (1500, 9), (2999, 0)]
        x = x.copy()
        for i, j in gaps:
            x[i, j] = np.nan
    res = _run(tmp_path, x, f"{method}-{scale}-{missing}",
               model={"components": k, "method": method, "scale": scale, "tolerance": 1e-13},
               input={"missing": missing})
    ref_x = x
    if missing == "drop-rows":
        ref_x = x[np.isfinite(x).all(axis=1)]
    elif missing == "impute-mean":
        ref_x = np.where(np.isfinite(x), x, np.nanmean(x, axis=0))
    t2, spe, every = _numpy_reference(ref_x, k, scale)
    s = res.scores().compute()
    assert list(s.columns[-4:]) == ["t2", "spe", "t2_alarm", "spe_alarm"]
    got_t2, got_spe = s["t2"].to_numpy(), s["spe"].to_numpy()
    if missing == "drop-rows":
        dropped = np.zeros(len(x), bool)
        dropped[[i for i, _ in gaps]] = True
        assert np.isnan(got_t2[dropped]).all() and not s["t2_alarm"].to_numpy()[dropped].any()
        got_t2, got_spe = got_t2[~dropped], got_spe[~dropped]
    np.testing.assert_allclose(got_t2, t2, rtol=STAT_RTOL)
    np.testing.assert_allclose(got_spe, spe, rtol=STAT_RTOL)
    # the limits: Tracy-Young-Mason and Box from the numpy eigenvalues, computed here with scipy.stats
    lim = res.limits
    n = ref_x.shape[0]
    assert lim["t2_training"] == pytest.approx((n - 1) ** 2 / n * stats.beta(k / 2, (n - k - 1) / 2).ppf(0.99))
    assert lim["t2"] == pytest.approx(k * (n - 1) * (n + 1) / (n * (n - k)) * stats.f(k, n - k).ppf(0.99))
    th1, th2 = every[k:].sum(), np.sum(every[k:] ** 2)
    exact_spe = th2 / th1 * stats.chi2(th1**2 / th2).ppf(0.99)
    # d = 10 fits in one solver block (k + oversample), so even matrix-free knows theta2 exactly;
    # the estimated case is the test below
    assert not lim["estimated"]
    assert lim["spe"] == pytest.approx(exact_spe, rel=1e-10)
    alarms = s["t2_alarm"].to_numpy() == (s["t2"].to_numpy() > lim["t2_training"])
    assert alarms.all()
    # counted by the score writer as it writes, summed over the parts: the same as reading them back
    a, b = s["t2_alarm"].to_numpy(), s["spe_alarm"].to_numpy()
    assert res.manifest["monitor"]["training_alarms"] == {"rows": len(s), "t2_alarms": int(a.sum()),
                                                         "spe_alarms": int(b.sum()), "any_alarm": int((a | b).sum())}
    assert res.manifest["monitor"]["training_alarms"] == count_alarms(os.path.join(res.directory, "scores"))


def test_matrix_free_spe_limit_agrees_with_the_exact_one_within_its_stated_precision(tmp_path, rng):
    # a spread-out tail (the usual case for sensor noise): theta2 is well determined by the probes
    d, n = 60, 4000
    lam = np.r_[40.0, 20.0, 10.0, rng.uniform(0.5, 1.5, d - 3)]
    q, _ = np.linalg.qr(rng.standard_normal((d, d)))
    x = (rng.standard_normal((n, d)) * np.sqrt(lam)) @ q.T
    cov = _run(tmp_path, x, "cov", model={"components": 3, "method": "covariance"}, output={"scores": False})
    mf = _run(tmp_path, x, "mf", model={"components": 3, "method": "matrix-free"}, output={"scores": False})
    exact, est = cov.limits, mf.limits
    assert est["theta"][0] == pytest.approx(exact["theta"][0], rel=1e-9)  # theta1 is exact for both
    prec = est["precision"]
    assert prec["spe_low"] <= exact["spe"] <= prec["spe_high"]
    # the stated range is useful, not vacuous: within 10% of the limit on either side
    assert prec["spe_high"] / prec["spe_low"] < 1.2
    assert abs(est["theta"][1] - exact["theta"][1]) <= 3 * prec["theta2_std_error"]


@pytest.fixture(scope="module")
def model_run(tmp_path_factory):
    """A covariance run on 20 000 rows of the two-factor data, k = 2."""
    tmp = tmp_path_factory.mktemp("model")
    rng = np.random.default_rng(2024)
    x = _data(rng, n=20000)
    data = tmp / "data"
    write_parquet(data, x, files=2, row_group=5000, keep={"tick": np.arange(len(x))})
    cfg = make_config(str(data / "*.parquet"), tmp / "out", model={"components": 2, "method": "covariance"},
                      input={"keep": ["tick"]}, monitor={"time": "tick"})
    return pcapipe.run(cfg), tmp


def _frame(x):
    return pd.DataFrame(x, columns=[f"f{j}" for j in range(x.shape[1])])


def test_new_rows_under_the_model_cross_the_99_percent_limits_one_percent_of_the_time(model_run):
    res, _ = model_run
    rng = np.random.default_rng(99)
    n = 20000
    out = res.monitor(_frame(_data(rng, n=n)))
    # 4 binomial standard deviations of a 1% share in 20 000 rows: +-0.28 percentage points;
    # the limits' own sampling error from fitting on 20 000 rows is far smaller
    bound = 4 * np.sqrt(0.01 * 0.99 / n)
    assert abs(out["t2_alarm"].mean() - 0.01) < bound
    assert abs(out["spe_alarm"].mean() - 0.01) < bound


def test_injected_faults_are_flagged_and_the_contributions_name_the_shifted_features(model_run):
    res, _ = model_run
    rng = np.random.default_rng(5)
    base = _data(rng, n=400)
    spe_fault = base[:200].copy()
    spe_fault[:, 3] += 2.0  # f3 and f4 move against their common factor: a discarded direction
    spe_fault[:, 4] -= 2.0
    t2_fault = base[200:].copy()
    t2_fault[:, :3] += 7 * 3.0 * np.array([1.0, 0.9, 0.8])  # 7 standard deviations of the first factor
    s_out, t_out = res.monitor(_frame(spe_fault)), res.monitor(_frame(t2_fault))
    assert s_out["spe_alarm"].mean() > 0.99 and s_out["t2_alarm"].mean() < 0.05
    assert t_out["t2_alarm"].mean() > 0.99 and t_out["spe_alarm"].mean() < 0.05
    c_spe = res.contributions(_frame(spe_fault))["spe"]
    top2 = [set(row.nlargest(2).index) for _, row in c_spe.iterrows()]
    assert np.mean([t == {"f3", "f4"} for t in top2]) > 0.95
    c_t2 = res.contributions(_frame(t2_fault))["t2"]
    top3 = [set(row.abs().nlargest(3).index) for _, row in c_t2.iterrows()]
    assert np.mean([t == {"f0", "f1", "f2"} for t in top3]) > 0.95
    np.testing.assert_allclose(c_t2.sum(axis=1), t_out["t2"], rtol=1e-10)


def test_contributions_of_training_rows_by_position_match_the_rows_themselves(model_run):
    res, tmp = model_run
    rows = [3, 9999, 10000, 19999]  # both files, first and last rows
    paths = sorted(glob.glob(str(tmp / "data" / "*.parquet")))
    full = pd.concat([pq.read_table(p).to_pandas() for p in paths], ignore_index=True)
    by_pos = res.contributions(rows)
    by_frame = res.contributions(full.iloc[rows])
    np.testing.assert_allclose(by_pos.to_numpy(), by_frame.to_numpy(), rtol=1e-13)
    scores = res.scores().compute()
    np.testing.assert_allclose(by_pos["spe"].sum(axis=1), scores["spe"].to_numpy()[rows], rtol=1e-10)


def test_project_prints_alarm_counts_and_explains_the_worst_rows(model_run, capsys, restore_logging):
    res, tmp = model_run
    rng = np.random.default_rng(8)
    x = _data(rng, n=500)
    x[100:103, 7] += 5.0  # f7 breaks away from the model in three rows
    write_parquet(tmp / "new", x, keep={"tick": np.arange(500)})
    out_dir = tmp / "projected"
    assert main(["project", res.directory, str(tmp / "new"), "--out", str(out_dir), "--explain", "3"]) == 0
    text = capsys.readouterr().out
    parts = sorted(glob.glob(str(out_dir / "part-*.parquet")))
    s = pd.concat([pd.read_parquet(p) for p in parts])
    assert f"{int(s['spe_alarm'].sum())} (" in text and f"{int(s['t2_alarm'].sum())} of 500 rows" in text
    for row in (100, 101, 102):
        assert f"row {row} " in text
    assert text.count("spe: f7") == 3


def test_spe_uses_the_difference_of_squares_only_where_its_error_is_negligible(rng):
    # rows from far off the plane (difference of squares) to exactly in it (residual vector):
    # every one must agree with the residual vector's squared norm
    d = 200
    v, _ = np.linalg.qr(rng.standard_normal((d, 5)))
    inside = rng.standard_normal((60, 5)) @ v.T * 1e3
    off = rng.standard_normal((60, d))
    x = inside + off * np.logspace(-12, 3, 60)[:, None]
    _, _, spe = row_statistics(x, v, np.ones(5))
    ref = np.linalg.norm(x - (x @ v) @ v.T, axis=1) ** 2
    np.testing.assert_allclose(spe, ref, rtol=1e-10, atol=0)


def test_report_has_a_bounded_control_chart_and_names_the_features_of_a_fault(tmp_path):
    pytest.importorskip("matplotlib")  # the optional plot extra
    from pcapipe.report_monitor import chart_points, fig_control_chart

    rng = np.random.default_rng(21)
    x = _data(rng, n=4000)
    x[1000:1100, 3] += 2.5  # f3 and f4 break apart for 100 rows
    x[1000:1100, 4] -= 2.5
    data = tmp_path / "data"
    write_parquet(data, x, files=2, row_group=500, keep={"tick": np.arange(4000) * 10})
    cfg = make_config(str(data / "*.parquet"), tmp_path / "out", model={"components": 2},
                      input={"keep": ["tick"]}, monitor={"time": "tick"}, output={"report": True})
    res = pcapipe.run(cfg)
    assert "control" in res.manifest["report"]["figures"]
    assert os.path.isfile(os.path.join(res.directory, "control.png"))
    page = open(os.path.join(res.directory, "report.html")).read()
    section = page[page.index("<h2>Monitoring</h2>"):]
    first_row = section[section.index("<tbody>"):].split("</tr>")[0]
    assert "f3" in first_row and "f4" in first_row
    # bounded: 2 points per bin at most, and no excursion is lost
    points = chart_points(res.directory, "tick", bins=50)
    assert len(points) <= 100
    spe = res.scores().compute()["spe"].to_numpy()
    assert int(np.argmax(spe)) in set(points["row"])
    assert (points["time"] == points["row"] * 10).all()
    fig = fig_control_chart(points, res.limits, "tick")
    lines = {ln.get_gid(): ln.get_ydata()[0] for ax in fig.axes for ln in ax.lines if ln.get_gid()}
    assert lines == {"limit-t2": res.limits["t2_training"], "limit-spe": res.limits["spe"]}


def test_every_eigenvalue_is_used_only_when_it_is_the_whole_spectrum():
    from types import SimpleNamespace

    from pcapipe.alarms import every_eigenvalue, fit_limits

    lam = np.array([5.0, 3.0, 1.0, 0.5, 0.25])
    full = SimpleNamespace(values=lam[:2], extra_values=lam[2:], extra_converged=np.ones(3, bool))
    assert np.array_equal(every_eigenvalue(full, lam.sum()), lam)
    cut = SimpleNamespace(values=lam[:2], extra_values=lam[2:4], extra_converged=np.ones(2, bool))
    assert every_eigenvalue(cut, lam.sum()) is None  # a list cut short misses 0.25 of the trace
    ritz = SimpleNamespace(values=lam[:2], extra_values=lam[2:], extra_converged=np.zeros(3, bool))
    assert every_eigenvalue(ritz, lam.sum()) is None  # Ritz estimates are not exact
    rec = fit_limits("covariance", 0.99, 100, lam.sum(), lam[:2], np.eye(5)[:, :2], all_values=lam)
    # theta_i = sum over the discarded eigenvalues 1, 0.5, 0.25 of lambda^i
    assert rec["theta"] == pytest.approx([1.75, 1.3125, 1.140625])
    assert "spe_jackson_mudholkar" in rec
