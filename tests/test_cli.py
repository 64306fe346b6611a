"""The command line: check, --set, -q / -v / --debug, --version, several configs,
and the exit statuses of unexpected failures (1) and interrupts (130)."""

from __future__ import annotations

import os

import numpy as np
import pytest

import pcapipe
import pcapipe.engine
from pcapipe import cli
from conftest import make_config, run_cli, write_parquet, write_toml


def _config_file(path, cfg) -> str:
    return write_toml(path, cfg)


@pytest.fixture(scope="module")
def data_dir(tmp_path_factory):
    d = tmp_path_factory.mktemp("cli-data")
    x = np.random.default_rng(7).standard_normal((60, 5))
    write_parquet(str(d / "data"), x, files=2, row_group=10)
    return d


@pytest.fixture(scope="module")
def good_config(data_dir):
    cfg = make_config(str(data_dir / "data"), data_dir / "out-from-file", model={"components": 3})
    return _config_file(data_dir / "good.toml", cfg)


@pytest.fixture(scope="module")
def quiet_run(data_dir, good_config):
    """One run with ``-q`` and two ``--set`` overrides, shared by the tests below."""
    out = data_dir / "out-from-set"
    proc = run_cli("run", good_config, "-q", "--set", "model.components=2",
                   "--set", f"output.directory={out}")
    return proc, str(out)


def _errors(stderr: str) -> list[str]:
    return [line for line in stderr.splitlines() if line.startswith("error:")]


def test_set_overrides_components_and_directory(quiet_run, data_dir):
    proc, out = quiet_run
    assert proc.returncode == 0, proc.stderr
    res = pcapipe.load(out)
    assert res.manifest["components"] == 2
    assert list(res.loadings.columns) == ["PC1", "PC2"]
    # The directory named in the file was overridden, so it was never created.
    assert not os.path.exists(data_dir / "out-from-file")
    assert proc.stdout.startswith(out)


def test_quiet_silences_info(quiet_run):
    proc, _ = quiet_run
    assert proc.returncode == 0
    assert proc.stderr == ""


def test_verbose_shows_debug(data_dir, good_config):
    out = data_dir / "out-verbose"
    proc = run_cli("run", good_config, "-v", "--set", f"output.directory={out}")
    assert proc.returncode == 0, proc.stderr
    assert "DEBUG: " in proc.stderr
    assert "INFO: method: " in proc.stderr


def test_describe(quiet_run):
    proc, out = quiet_run
    assert proc.returncode == 0
    desc = run_cli("describe", out)
    assert desc.returncode == 0, desc.stderr
    table = desc.stdout.split("--- k = 2 retained above; not retained below ---")
    assert len(table) == 2  # the spectrum continues past k = 2, below the rule
    assert "PC1" in table[0] and "PC2" in table[0] and "PC3" not in table[0]
    assert "PC3" in table[1] and "PC5" in table[1]  # all 5 eigenvalues (covariance method)
    assert "60 rows x 5 features" in desc.stdout


def test_check_prints_plan_and_writes_nothing(data_dir, good_config):
    before = sorted(os.listdir(data_dir))
    proc = run_cli("check", good_config)
    assert proc.returncode == 0, proc.stderr
    text = proc.stdout
    # 2 files of 3 row groups each (30 rows, row_group=10); 60 rows; f0..f4
    assert "files       2" in text and "6 blocks" in text
    assert "rows        60" in text
    assert "features    5: f0, f1, f2, f3, f4" in text
    assert "method      " in text
    assert "memory      ~" in text
    assert "nothing was written" in text
    assert sorted(os.listdir(data_dir)) == before
    assert not os.path.exists(data_dir / "out-from-file")
    assert not os.path.exists(str(data_dir / "out-from-file") + ".incomplete")


def test_check_bad_config_exit_2(data_dir):
    cfg = make_config(str(data_dir / "data"), data_dir / "never", model={"components": 99})
    proc = run_cli("check", _config_file(data_dir / "too-many.toml", cfg))
    assert proc.returncode == 2
    assert len(_errors(proc.stderr)) == 1 and "model.components" in proc.stderr
    assert not os.path.exists(data_dir / "never")


def test_debug_shows_traceback(data_dir):
    cfg = make_config(str(data_dir / "nothere"), data_dir / "never")
    proc = run_cli("run", _config_file(data_dir / "nomatch.toml", cfg), "--debug")
    assert proc.returncode == 2
    assert "Traceback" in proc.stderr
    assert "InputError" in proc.stderr
    assert proc.stderr.splitlines()[-1].startswith("error: input.paths:")


def test_version():
    proc = run_cli("--version")
    assert proc.returncode == 0
    assert proc.stdout.strip() == f"pcapipe {pcapipe.__version__}"


def test_several_configs_bad_one_does_not_stop_the_good_one(data_dir, tmp_path):
    bad = make_config(str(data_dir / "data"), tmp_path / "bad-out", model={"componets": 2})
    bad_path = _config_file(tmp_path / "bad.toml", bad)
    good = make_config(str(data_dir / "data"), tmp_path / "good-out", model={"components": 2})
    good_path = _config_file(tmp_path / "good.toml", good)
    proc = run_cli("run", bad_path, good_path, "--set", "model.seed=3")
    assert proc.returncode == 2
    errors = _errors(proc.stderr)
    assert len(errors) == 1
    assert errors[0].startswith(f"error: {bad_path}: model.componets")
    assert "Traceback" not in proc.stderr
    assert pcapipe.load(tmp_path / "good-out").manifest["config"]["model"]["seed"] == 3
    assert not os.path.exists(tmp_path / "bad-out")
    # Default verbosity: info lines, unprefixed.
    assert "\nmethod: " in proc.stderr and "1 of 2 configs succeeded" in proc.stderr


@pytest.mark.usefixtures("restore_logging")
def test_several_configs_refuse_one_shared_output_directory(monkeypatch, capsys):
    monkeypatch.setattr(pcapipe.engine, "run", _raising(AssertionError("must not run")))
    assert cli.main(["run", "a.toml", "b.toml", "--set", "output.directory=runs/x"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: --set output.directory=runs/x: one output directory for 2 configs")
    assert "set output.directory in each config file" in err


# ------------------------------------------------------------ in-process
# main() is called directly so that monkeypatch can reach the engine.


def _raising(exc):
    def run(*args, **kwargs):
        raise exc
    return run


@pytest.mark.usefixtures("restore_logging")
@pytest.mark.parametrize("exc, status, expected", [
    # a bug: exit 1, said plainly, with the way to get the traceback
    (RuntimeError("boom"), 1, "error: unexpected failure: RuntimeError: boom (run again with --debug"),
    # a user error from deep inside: exit 2, the message as it is
    (pcapipe.InputError("x.parquet: column 'a' is bad; fix it"), 2, "error: x.parquet: column 'a' is bad; fix it"),
    # a multi-line library message is folded into the one error line
    (OSError("first line\nsecond line"), 1, "error: unexpected failure: OSError: first line second line"),
])
def test_exit_status_of_failures(monkeypatch, capsys, exc, status, expected):
    monkeypatch.setattr(pcapipe.engine, "run", _raising(exc))
    assert cli.main(["run", "any.toml"]) == status
    err = capsys.readouterr().err
    assert err.splitlines() == [err.splitlines()[0]]
    assert err.startswith(expected)
    assert "Traceback" not in err


@pytest.mark.usefixtures("restore_logging")
def test_unexpected_failure_debug_traceback(monkeypatch, capsys):
    monkeypatch.setattr(pcapipe.engine, "run", _raising(RuntimeError("boom")))
    assert cli.main(["run", "any.toml", "--debug"]) == 1
    err = capsys.readouterr().err
    assert "Traceback" in err and "RuntimeError: boom" in err
    assert err.splitlines()[-1].startswith("error: unexpected failure")


@pytest.mark.usefixtures("restore_logging")
def test_keyboard_interrupt_130(monkeypatch, capsys):
    monkeypatch.setattr(pcapipe.engine, "run", _raising(KeyboardInterrupt()))
    assert cli.main(["run", "any.toml"]) == 130
    assert "interrupted" in capsys.readouterr().err


def _two_configs(directory):
    """a.toml and b.toml, valid configs (their inputs need not exist: run() is replaced)."""
    for name in ("a", "b"):
        (directory / f"{name}.toml").write_text(f'[input]\npaths = ["x.parquet"]\n[output]\ndirectory = "{name}"\n')
    return ["run", str(directory / "a.toml"), str(directory / "b.toml")]


def _name(cfg) -> str:
    # run() gets the config's path (so that --resume can re-apply stored overrides)
    return os.path.basename(getattr(cfg, "source", cfg))


@pytest.mark.usefixtures("restore_logging")
def test_interrupt_stops_several_configs(monkeypatch, capsys, tmp_path):
    calls = []

    def run(cfg, *args, **kwargs):
        calls.append(_name(cfg))
        raise KeyboardInterrupt

    monkeypatch.setattr(pcapipe.engine, "run", run)
    monkeypatch.chdir(tmp_path)
    assert cli.main(_two_configs(tmp_path)) == 130
    assert calls == ["a.toml"]


@pytest.mark.usefixtures("restore_logging")
def test_several_configs_bug_in_one_others_still_run(monkeypatch, capsys, tmp_path):
    calls = []

    def run(cfg, *args, **kwargs):
        calls.append(_name(cfg))
        if _name(cfg) == "a.toml":
            raise RuntimeError("boom")
        raise pcapipe.ConfigError("model.x: unknown key")

    monkeypatch.setattr(pcapipe.engine, "run", run)
    monkeypatch.chdir(tmp_path)
    # a bug (1) outranks bad input (2) in the exit status
    _two_configs(tmp_path)
    assert cli.main(["run", "a.toml", "b.toml"]) == 1
    assert calls == ["a.toml", "b.toml"]
    errors = _errors(capsys.readouterr().err)
    assert errors == ["error: a.toml: unexpected failure: RuntimeError: boom (run again with --debug for "
                      "the traceback, and please report it)",
                      "error: b.toml: model.x: unknown key"]


@pytest.mark.usefixtures("restore_logging")
def test_several_configs_share_one_scheduler_connection(monkeypatch, tmp_path, rng):
    import pcapipe.compute

    write_parquet(tmp_path / "d", rng.standard_normal((60, 4)))
    opened = []
    real_enter = pcapipe.compute.Runner.__enter__

    def counting_enter(self):
        opened.append(self.cfg.scheduler)
        return real_enter(self)

    monkeypatch.setattr(pcapipe.compute.Runner, "__enter__", counting_enter)
    paths = []
    for name in ("a", "b"):
        path = tmp_path / f"{name}.toml"
        path.write_text(f'[input]\npaths = ["d/*.parquet"]\n[model]\ncomponents = 2\n'
                        f'[compute]\nprogress = false\n[output]\ndirectory = "{name}"\nreport = false\n')
        paths.append(str(path))
    assert cli.main(["run", *paths, "-q"]) == 0
    assert opened == ["threads"]  # one connection for both configs with the same [compute]
    assert pcapipe.load(tmp_path / "a").manifest["components"] == pcapipe.load(tmp_path / "b").manifest["components"] == 2


# -- help, options anywhere, the plot-extra hint ---------------------------------------------------
def _subparsers():
    parser = cli.build_parser()
    return next(a for a in parser._actions if a.dest == "command").choices


@pytest.mark.parametrize("name", ["run", "check", "describe", "project", "report"])
def test_help_describes_every_argument_and_gives_examples(name):
    sub = _subparsers()[name]
    for action in sub._actions:
        assert action.help and len(action.help) > 10, f"{name} {action.option_strings or action.dest}"
    assert len(sub.description) > 60
    examples = sub.epilog.split("examples:\n")[1].split("\n\n")[0].splitlines()
    assert examples and all(line.strip().startswith(f"pcapipe {name}") for line in examples)
    shown = run_cli(name, "--help")
    assert shown.returncode == 0 and "examples:" in shown.stdout and examples[0].strip() in shown.stdout


@pytest.mark.parametrize("argv", [
    ["-q", "describe", "RUN"],          # before the command
    ["describe", "RUN", "-q"],          # after its arguments
    ["describe", "-q", "RUN"],          # between
])
def test_quiet_is_accepted_anywhere(argv):
    args = cli.build_parser().parse_args(argv)
    assert args.quiet is True and args.verbose is False and args.run_dir == "RUN"


def test_verbose_before_the_command_reaches_the_logger(quiet_run):
    _, out = quiet_run
    proc = run_cli("-v", "describe", out, "--top", "0")
    assert proc.returncode == 0 and "DEBUG: " not in proc.stdout
    proc = run_cli("describe", out, "--top", "0", "-q")
    assert proc.returncode == 0 and proc.stderr == ""


_NO_PLOT = ("import sys; sys.modules['matplotlib'] = None; from pcapipe.cli import main; "
            "sys.exit(main(sys.argv[1:]))")


def test_without_matplotlib_the_install_hint_is_said_once_for_a_source_checkout(data_dir, good_config):
    import subprocess
    import sys

    out = data_dir / "no-plot"
    done = subprocess.run([sys.executable, "-c", _NO_PLOT, "run", good_config, "--set", "output.report=true",
                           "--set", f"output.directory={out}"], capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    assert done.stderr.count("pip install") == 1
    assert 'pip install ".[plot]"' in done.stderr and "pcapipe[plot]" not in done.stderr  # a source checkout
    done = subprocess.run([sys.executable, "-c", _NO_PLOT, "report", str(out)], capture_output=True, text=True,
                          timeout=300)
    assert done.returncode == 2
    assert done.stderr.count("pip install") == 1 and done.stderr.startswith("error: ")
