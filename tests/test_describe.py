"""Tests of pcapipe.terminal: ``pcapipe describe`` (text and --json) and ``pcapipe check``."""

import json
import os
import re

import numpy as np
import pyarrow.parquet as pq
import pytest

import pcapipe
from conftest import known_spectrum, make_config, run_cli, write_parquet, write_toml
from pcapipe.errors import InputError, NotConvergedWarning
from pcapipe.formats import sig
from pcapipe.terminal import check_report, describe_json, describe_text

_COLUMNS = ["eigenvalue", "share", "cumulative_share", "residual", "std_error"]
# significant digits printed per column (pcapipe.formats.SPECTRUM_DIGITS: 4, 3, 4, 3, 3)
# -> the relative slack of a printed value
_PRINTED = {"eigenvalue": 5e-4, "share": 5e-3, "cumulative_share": 5e-4, "residual": 5e-3, "std_error": 5e-3}


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("describe")
    rng = np.random.default_rng(2024)
    x = known_spectrum(800, 9, [9, 5, 3, 2, 1, 0.6, 0.4, 0.2, 0.1], rng) * np.linspace(0.5, 4, 9)
    write_parquet(tmp / "in", x, files=2)
    cfg = make_config(str(tmp / "in" / "*.parquet"), tmp / "run", model={"components": 4, "scale": True})
    return pcapipe.run(cfg).directory


def _table_rows(text):
    """The spectrum rows of describe's text: name and five numbers per component."""
    lines = text.splitlines()
    start = next(i for i, line in enumerate(lines) if line.split()[:2] == ["component", "eigenvalue"])
    rows = []
    for line in lines[start + 1:]:
        if line.startswith("--- k = "):  # the rule between retained and not retained
            continue
        if not re.match(r"PC\d+ ", line):
            break
        name, *values = line.split()
        numbers = [np.nan if v == "-" else float(v.rstrip("%")) / (100 if v.endswith("%") else 1) for v in values[:5]]
        rows.append((name, numbers, values[5:]))
    return lines[start].split(), rows


def test_describe_table_matches_spectrum_parquet(run_dir):
    text = describe_text(pcapipe.load(run_dir), top=3)
    header, rows = _table_rows(text)
    assert header == ["component", "eigenvalue", "share", "cumulative", "residual", "std_error", "retained"]
    table = pq.read_table(os.path.join(run_dir, "spectrum.parquet")).to_pandas()
    assert [r[0] for r in rows] == list(table["component"])
    for (name, values, flags), (_, want) in zip(rows, table.iterrows()):
        assert flags == (["yes"] if want["retained"] else [])  # every component converged: no "*"
        for col, got in zip(_COLUMNS, values):
            assert got == pytest.approx(want[col], rel=_PRINTED[col], nan_ok=True), (name, col)
    assert len(rows) == 9 and table["retained"].sum() == 4  # every eigenvalue (covariance method), k = 4
    assert "--- k = 4 retained above; not retained below ---" in text
    assert "all 9 eigenvalues listed: their sum is the total variance" in text


def test_describe_top_loadings_are_the_largest_in_loadings_parquet(run_dir):
    res = pcapipe.load(run_dir)
    text = describe_text(res, top=3)
    loadings = pq.read_table(os.path.join(run_dir, "loadings.parquet")).to_pandas().set_index("feature")
    block = text.split("top 3 loadings per component")[1].splitlines()[2:]
    assert len(block) == 3 * loadings.shape[1]
    current = None
    seen = {}
    for line in block:
        parts = line.split()
        if len(parts) == 4:
            current = parts.pop(0)
        seen.setdefault(current, []).append((parts[0], float(parts[1]), float(parts[2])))
    for pc, items in seen.items():
        col = loadings[pc]
        want = col.abs().sort_values(ascending=False, kind="stable").index[:3]
        assert [f for f, _, _ in items] == list(want)
        for f, v, r in items:
            assert v == pytest.approx(col[f], abs=5e-4)  # printed with 3 decimals
            assert r == pytest.approx(res.correlation_loadings.loc[f, pc], abs=5e-4)


def test_describe_json_matches_the_tables_and_is_strict_json(run_dir):
    res = pcapipe.load(run_dir)
    out = json.loads(json.dumps(describe_json(res, top=2), allow_nan=False))
    table = pq.read_table(os.path.join(run_dir, "spectrum.parquet")).to_pandas()
    assert [c["component"] for c in out["spectrum"]] == list(table["component"])
    for got, (_, want) in zip(out["spectrum"], table.iterrows()):
        for col in [*_COLUMNS, "retained", "converged"]:
            assert got[col] == want[col] or (got[col] is None and np.isnan(want[col])), col  # NaN -> null
    assert out["components"] == 4 and out["scale"] is True and out["center"] is True
    for pc, items in out["top_loadings"].items():
        assert len(items) == 2
        assert items[0]["loading"] == res.loadings.loc[items[0]["feature"], pc]
        assert abs(items[0]["loading"]) == res.loadings[pc].abs().max()
        assert items[0]["correlation"] == pytest.approx(res.correlation_loadings.loc[items[0]["feature"], pc],
                                                       rel=1e-15)


def test_describe_marks_components_that_did_not_converge(tmp_path):
    rng = np.random.default_rng(5)
    # a flat spectrum converges slowly; one iteration leaves most pairs unconverged
    x = known_spectrum(400, 30, np.linspace(2.0, 1.0, 30), rng)
    write_parquet(tmp_path / "in", x)
    cfg = make_config(str(tmp_path / "in" / "*.parquet"), tmp_path / "run",
                      model={"components": 4, "method": "matrix-free", "max_iterations": 1, "oversample": 1})
    with pytest.warns(NotConvergedWarning):
        res = pcapipe.run(cfg)
    spec = res.spectrum
    bad = [pc for pc, ok in spec.loc[spec["retained"], "converged"].items() if not ok]
    estimates = [pc for pc, ok in spec.loc[~spec["retained"], "converged"].items() if not ok]
    assert bad and estimates == ["PC5"]  # oversample 1: one Ritz value beyond k, not converged
    text = describe_text(res, top=0)
    assert f"NOT converged: {', '.join(bad)}" in text
    _, rows = _table_rows(text)
    assert [name for name, _, flags in rows if flags[-1:] == ["*"]] == bad
    assert [name for name, _, flags in rows if flags[-1:] == ["~"]] == estimates
    assert "* retained but did not reach the tolerance" in text and "~ an estimate" in text
    rest = res.manifest["variance"]["not_listed"]
    assert rest == pytest.approx(res.manifest["total_variance"] - spec["eigenvalue"].sum(), rel=1e-12)
    assert f"variance not listed: {sig(rest, 3)}" in text
    assert "loadings per component" not in text  # top=0: no loadings section


def test_describe_rejects_a_negative_top(run_dir):
    with pytest.raises(InputError, match="--top"):
        describe_text(pcapipe.load(run_dir), top=-1)


def test_cli_describe_text_and_json(run_dir):
    done = run_cli("describe", run_dir, "--top", "2")
    assert done.returncode == 0, done.stderr
    assert done.stdout.startswith(run_dir)
    _, rows = _table_rows(done.stdout)
    assert [r[0] for r in rows] == [f"PC{i}" for i in range(1, 10)]
    done = run_cli("describe", run_dir, "--top", "0", "--beyond", "2")
    _, rows = _table_rows(done.stdout)
    assert [r[0] for r in rows] == [f"PC{i}" for i in range(1, 7)]  # k = 4 and 2 beyond
    assert "... 3 more eigenvalue(s) in spectrum.parquet (describe --beyond 5 shows all)" in done.stdout
    done = run_cli("describe", run_dir, "--json", "--top", "1")
    assert done.returncode == 0, done.stderr
    out = json.loads(done.stdout)
    assert out["directory"] == run_dir and len(out["top_loadings"]["PC1"]) == 1


def test_check_report_plans_without_writing(tmp_path):
    rng = np.random.default_rng(0)
    write_parquet(tmp_path / "in", rng.standard_normal((300, 4)), files=3, row_group=50)
    cfg = make_config(str(tmp_path / "in" / "*.parquet"), tmp_path / "run", model={"components": 2})
    text = check_report(cfg)
    fields = dict(re.split(r"\s{2,}", line, maxsplit=1) for line in text.splitlines()[:-1])
    assert fields["rows"] == "300"
    assert fields["features"].startswith("4: f0, f1, f2, f3")
    assert fields["files"].startswith("3 (") and "6 blocks" in fields["files"]
    assert fields["method"].split(":")[0] in ("covariance", "matrix-free")
    assert text.splitlines()[-1] == "ok: nothing was written"
    assert not os.path.exists(tmp_path / "run")


# -- check with a tcp:// scheduler -----------------------------------------------------------------
def _check_config(tmp_path, scheduler, timeout=10.0):
    rng = np.random.default_rng(0)
    write_parquet(tmp_path / "in", rng.standard_normal((200, 4)), files=2)
    cfg = make_config(str(tmp_path / "in" / "*.parquet"), tmp_path / "run", model={"components": 2},
                      compute={"scheduler": scheduler, "connect_timeout": timeout})
    path = tmp_path / "check.toml"
    write_toml(path, cfg)
    return path


@pytest.mark.cluster
def test_check_contacts_the_scheduler_and_lists_its_workers(tmp_path):
    from distributed import LocalCluster

    # Worker processes of their own: an in-process worker measures the whole pytest process against
    # its 512 MiB limit, and late in the suite that process is larger, so the workers shut down.
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, protocol="tcp://", host="127.0.0.1",
                      dashboard_address="127.0.0.1:0", memory_limit="512MiB") as cluster:
        done = run_cli("check", _check_config(tmp_path, cluster.scheduler_address))
    assert done.returncode == 0, done.stderr
    compute = next(line for line in done.stdout.splitlines() if line.startswith("compute"))
    assert compute == (f"compute     {cluster.scheduler_address}, contacted: 2 worker(s) on 1 host(s), "
                       "2 thread(s), 512.0 MiB per worker (the smallest limit)")  # config.format_size
    assert done.stdout.rstrip().endswith("ok: nothing was written")
    assert not (tmp_path / "run").exists()


def test_check_says_plainly_when_the_scheduler_does_not_answer(tmp_path):
    import socket

    with socket.socket() as s:  # a port nothing listens on once closed
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    done = run_cli("check", _check_config(tmp_path, f"tcp://127.0.0.1:{port}", timeout=1.0))
    assert done.returncode == 2
    compute = next(line for line in done.stdout.splitlines() if line.startswith("compute"))
    assert "NOT contacted" in compute and "this plan assumes 1 worker of 4.0 GiB" in compute
    assert done.stdout.rstrip().endswith("NOT ok: the cluster did not answer (see compute above); nothing was written")
    errors = [line for line in done.stderr.splitlines() if line.startswith("error: ")]
    assert len(errors) == 1 and "compute.scheduler" in errors[0] and f"127.0.0.1:{port}" in errors[0]


def test_check_says_what_run_refuses_about_local_cluster_memory(tmp_path):
    rng = np.random.default_rng(0)
    write_parquet(tmp_path / "in", rng.standard_normal((200, 4)), files=2)
    cfg = make_config(str(tmp_path / "in" / "*.parquet"), tmp_path / "run", model={"components": 2},
                      compute={"scheduler": "local-cluster", "workers": 2, "memory_limit": "128MiB"})
    path = write_toml(tmp_path / "check.toml", cfg)
    done = run_cli("check", path)
    last = done.stdout.rstrip().splitlines()[-1]
    assert last == ("NOT ok: 128.0 MiB per worker is below the local-cluster minimum of 256.0 MiB, which run "
                    "refuses: raise compute.memory_limit or lower compute.workers; nothing was written")
    ran = run_cli("run", path)  # run refuses it before starting a worker, with the same error line
    assert done.returncode == ran.returncode == 2
    errors = [line for line in done.stderr.splitlines() if line.startswith("error: ")]
    assert len(errors) == 1 and errors == [line for line in ran.stderr.splitlines() if line.startswith("error: ")]
    assert "compute.memory_limit" in errors[0] and not (tmp_path / "run").exists()
    # at the minimum, check is content (and starts no worker)
    ok = run_cli("check", path, "--set", "compute.memory_limit=256MiB")
    assert ok.returncode == 0 and ok.stdout.rstrip().endswith("ok: nothing was written")
