"""The ``pcapipe`` command line.

Exit status: 0 done; 2 bad config or bad input (one ``error:`` line on
stderr naming the file, column or key and what to do; the traceback only
with ``--debug``); 3 the compute infrastructure failed during the run
(scheduler lost, workers keep dying; resumable); 1 unexpected failure;
130 interrupted.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import logging
import os
import sys
import textwrap
import traceback
import warnings

from ._version import __version__
from .errors import ConfigError, InfrastructureError, NotConvergedWarning, PcapipeError

__all__ = ["main", "build_parser", "exit_status"]

log = logging.getLogger("pcapipe")


_EPILOG = "Options -v/--verbose, -q/--quiet and --debug go before or after the command."


def _command(sub, name: str, common, summary: str, description: str, examples: list[str]):
    """A subcommand whose --help says what it does, in full, with examples."""
    epilog = "examples:\n" + "\n".join(f"  {e}" for e in examples) + "\n\n" + _EPILOG
    return sub.add_parser(name, parents=[common], help=summary, description=textwrap.fill(description, 78),
                          epilog=epilog,
                          formatter_class=argparse.RawDescriptionHelpFormatter)


def _verbosity(parser, default) -> None:
    parser.add_argument("-v", "--verbose", action="store_true", default=default,
                        help="also show debug messages (which pass, how long, cluster details)")
    parser.add_argument("-q", "--quiet", action="store_true", default=default,
                        help="show only warnings and errors (no progress or summary messages)")
    parser.add_argument("--debug", action="store_true", default=default,
                        help="on an error, print its traceback before the one-line message")


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="pcapipe", formatter_class=argparse.RawDescriptionHelpFormatter,
        description="Leading principal components of Parquet data larger than memory, from a TOML config.",
        epilog="examples:\n  pcapipe run configs/demo.toml\n  pcapipe describe runs/demo\n"
               "  pcapipe COMMAND --help      (what each command does, its arguments, examples)\n\n" + _EPILOG)
    p.add_argument("--version", action="version", version=f"pcapipe {__version__}")
    _verbosity(p, False)
    # The same options after the command; SUPPRESS keeps a value given before it.
    common = argparse.ArgumentParser(add_help=False)
    _verbosity(common, argparse.SUPPRESS)
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    r = _command(sub, "run", common, "run one or more configs",
                 "Read the Parquet inputs of each config, compute the principal components and write the "
                 "run directory (manifest.json, spectrum.parquet, loadings.parquet, features.parquet, "
                 "scores/, report.html). Several configs run one after another; one that fails does not "
                 "stop the others.",
                 ["pcapipe run configs/demo.toml",
                  "pcapipe run configs/demo.toml --set model.components=8 --set output.directory=runs/k8",
                  "pcapipe run configs/demo.toml --resume      (continue after an interruption)"])
    r.add_argument("configs", nargs="+", metavar="CONFIG",
                   help="TOML config file(s); relative paths inside resolve against the config's directory")
    r.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
                   help="override a config key, repeatable; the value is read as TOML (a bare word is a "
                        "string), e.g. --set model.components=10 --set compute.scheduler=local-cluster")
    r.add_argument("--resume", action="store_true",
                   help="continue an interrupted run from the checkpoint in <output.directory>.incomplete")

    c = _command(sub, "check", common, "validate and plan only; writes nothing",
                 "Validate the config, read the Parquet footers (no data), and print the files, rows, "
                 "features, the method auto would choose and why, and a memory estimate. With a tcp:// "
                 "scheduler it contacts the cluster (waiting up to compute.connect_timeout) and lists its "
                 "workers.",
                 ["pcapipe check configs/demo.toml",
                  "pcapipe check configs/demo.toml --set compute.scheduler=tcp://head:8786"])
    c.add_argument("config", metavar="CONFIG", help="TOML config file")
    c.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
                   help="override a config key, as for run, e.g. --set model.method=matrix-free")

    d = _command(sub, "describe", common, "spectrum table and top loadings of a run",
                 "Print a finished run's spectrum (the k retained components, then more eigenvalues "
                 "below a rule) and the features of largest loading on each component, with their "
                 "correlation with the component's scores.",
                 ["pcapipe describe runs/demo",
                  "pcapipe describe runs/demo --top 3 --beyond 0",
                  "pcapipe describe runs/demo --json > demo.json"])
    d.add_argument("run_dir", metavar="RUN_DIR", help="a run directory written by pcapipe run")
    d.add_argument("--top", type=int, default=5, metavar="N",
                   help="features listed per component, largest |loading| first (default 5; 0: none)")
    d.add_argument("--beyond", type=int, default=10, metavar="N",
                   help="eigenvalues shown past the k retained ones (default 10; all are in spectrum.parquet)")
    d.add_argument("--json", action="store_true",
                   help="print JSON instead: every eigenvalue listed and the top loadings (NaN as null)")

    pr = _command(sub, "project", common, "scores of new Parquet files",
                  "Compute the scores of new rows with a run's preprocessing (means, scales, weights) and "
                  "loadings, with Hotelling's T2, SPE and their alarms against the run's control limits; "
                  "one part-NNNNN.parquet per input file, rows in file order, with the run's keep columns "
                  "when present. Prints how many rows crossed each limit.",
                  ["pcapipe project runs/demo new/*.parquet --out runs/demo-new",
                   "pcapipe project runs/demo data_demo/reefer-000.parquet --out /tmp/scores --explain 5"])
    pr.add_argument("run_dir", metavar="RUN_DIR", help="the run whose model is applied")
    pr.add_argument("inputs", nargs="+", metavar="INPUT",
                    help="Parquet files, directories or globs holding the run's feature columns")
    pr.add_argument("--out", required=True, metavar="DIR",
                    help="directory for the part-NNNNN.parquet files (must not overlap the inputs)")
    pr.add_argument("--explain", type=int, default=0, metavar="N",
                    help="list the N rows farthest beyond the control limits with their top features")

    rp = _command(sub, "report", common, "build report.html and figures for a run",
                  "Draw the figures (scree plot, cumulative variance, loadings, scores scatter, "
                  "convergence, control chart) as PNG files and a self-contained report.html in the run "
                  "directory. Needs matplotlib (the plot extra).",
                  ["pcapipe report runs/demo",
                   "pcapipe report runs/demo --color-by voyage --time timestamp"])
    rp.add_argument("run_dir", metavar="RUN_DIR", help="a run directory written by pcapipe run")
    rp.add_argument("--color-by", default=None, metavar="COLUMN",
                    help="a keep column colouring the PC1-PC2 scatter: categories get a legend, numbers "
                         "and times a colour scale")
    rp.add_argument("--time", default=None, metavar="COLUMN",
                    help="keep column for the control chart's x-axis (default: monitor.time, else row order)")
    return p


def _setup_logging(args) -> None:
    level = logging.DEBUG if args.verbose else logging.WARNING if args.quiet else logging.INFO
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter("%(levelname)s: %(message)s" if args.verbose else "%(message)s"))
    log.handlers[:] = [handler]
    log.setLevel(level)
    log.propagate = False
    _quiet_libraries(args.verbose)


# dask.distributed's own loggers (its defaults, distributed.yaml) and the event loop's.
_LIBRARY_LOGGERS = ("distributed", "distributed.client", "distributed.gc", "bokeh", "tornado",
                    "tornado.application", "asyncio")


def _quiet_libraries(verbose: bool) -> None:
    """Keep dask.distributed's tracebacks off stderr: a lost scheduler is said once, in the error line.

    distributed sets its loggers' levels from dask's config when it is first
    imported (later, when a cluster is used), so the config is set as well as
    the loggers that exist now.
    """
    import dask

    levels = {name: "critical" for name in _LIBRARY_LOGGERS}
    if verbose:
        levels.update({"distributed": "info", "distributed.client": "warning"})
    dask.config.set({"logging": {k: v for k, v in levels.items() if k != "asyncio"}})
    for name, level in levels.items():
        logging.getLogger(name).setLevel(level.upper())


def _cmd_run(args) -> int:
    from .config import load_config
    from .engine import run

    if len(args.configs) == 1:
        _report_run(run(args.configs[0], args.overrides, resume=args.resume))
        return 0
    shared = [o for o in args.overrides if o.partition("=")[0].strip() == "output.directory"]
    if shared:
        # Every config would write (or overwrite) the same run directory.
        raise ConfigError(f"--set {shared[0]}: one output directory for {len(args.configs)} configs; "
                          "set output.directory in each config file instead")
    # Several configs: a bad one must not stop the others; the worst outcome
    # decides the exit status (a bug, 1, outranks a failed cluster, 3, which
    # outranks bad input, 2).  Configs with the same [compute] section share
    # one scheduler connection.
    status, done = 0, 0
    with contextlib.ExitStack() as stack:
        runners: dict = {}
        for path in args.configs:
            try:
                cfg = load_config(path, args.overrides)
                _report_run(run(path, args.overrides, resume=args.resume,
                                runner=_runner_for(cfg, runners, stack)))
                done += 1
            except Exception as e:  # noqa: BLE001 - reported like main() does, then go on
                status = min((s for s in (status, exit_status(e)) if s), key=_RANK.index)
                _print_error(args, e, prefix=path)
    log.info("%d of %d configs succeeded", done, len(args.configs))
    return status


_RANK = (1, 3, 2)  # worst first


def exit_status(e: BaseException) -> int:
    """The exit status for an error: 3 infrastructure, 2 the user's to fix, 1 a bug."""
    if isinstance(e, InfrastructureError):
        return 3
    return 2 if isinstance(e, PcapipeError) else 1


def _runner_for(cfg, runners: dict, stack):
    """One open Runner per distinct [compute] section; a failed connection is not retried."""
    from .compute import Runner

    known = runners.get(cfg.compute)
    if isinstance(known, PcapipeError):
        raise known  # the same dead address: do not wait connect_timeout again
    if known is None:
        try:
            known = runners[cfg.compute] = stack.enter_context(Runner(cfg.compute))
        except PcapipeError as e:
            runners[cfg.compute] = e
            raise
    return known


def _report_run(res) -> None:
    m = res.manifest
    state = "converged" if m["converged"] else "NOT all converged"
    print(f"{res.directory}: {m['components']} components of {m['rows']} rows x "
          f"{m['features']} features, {m['method']}, {state}, "
          f"{m['timings']['total_seconds']:.1f} s")


def _cmd_check(args) -> int:
    from .terminal import check

    text, error = check(args.config, args.overrides)
    print(text, flush=True)
    if error is not None:
        raise error  # the same error line (and exit status) as run
    return 0


def _cmd_describe(args) -> int:
    from .terminal import describe_json, describe_text
    from .result import load

    res = load(args.run_dir)
    if args.json:
        print(json.dumps(describe_json(res, args.top), indent=2))
    else:
        print(describe_text(res, args.top, args.beyond))
    return 0


def _cmd_project(args) -> int:
    from .project import project_to_directory
    from .result import load

    res = load(args.run_dir)
    written = project_to_directory(res, args.inputs, args.out)
    print(f"wrote {len(written)} part file(s) to {args.out}")
    if res.manifest.get("limits"):
        from .alarms import count_alarms
        from .terminal_monitor import alarm_line, explain_text

        print(alarm_line(count_alarms(written), res.limits))
        if args.explain > 0:
            print(explain_text(res, written, args.inputs, args.explain))
    return 0


def _cmd_report(args) -> int:
    from .report import write_report
    from .result import load

    res = load(args.run_dir)
    path = write_report(res, color_by=args.color_by, time=args.time)
    print(f"wrote {path}")
    return 0


_COMMANDS = {"run": _cmd_run, "check": _cmd_check, "describe": _cmd_describe,
             "project": _cmd_project, "report": _cmd_report}


def _one_line(text: str) -> str:
    # Library messages (pyarrow's especially) can span lines; the contract is one.
    return " ".join(str(text).split())


def _print_error(args, e: BaseException, prefix: str = "") -> None:
    """The one ``error:`` line for ``e`` (after its traceback with --debug)."""
    if getattr(args, "debug", False):
        traceback.print_exception(e)
    message = _one_line(e) or type(e).__name__
    if not isinstance(e, PcapipeError):
        message = (f"unexpected failure: {type(e).__name__}: {message} (run again with --debug for the "
                   "traceback, and please report it)")
    if prefix and not message.startswith(prefix):
        message = f"{prefix}: {message}"
    print(f"error: {message}", file=sys.stderr)


def main(argv=None) -> int:
    """Entry point of the ``pcapipe`` command; returns the exit status."""
    parser = build_parser()
    args = parser.parse_args(argv)
    _setup_logging(args)
    try:
        with warnings.catch_warnings():
            # The engine logs each NotConvergedWarning already; once is enough.
            warnings.simplefilter("ignore", NotConvergedWarning)
            # Overflow in the moments is detected and reported in one error line naming the column.
            warnings.filterwarnings("ignore", "overflow encountered", RuntimeWarning)
            return _COMMANDS[args.command](args)
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        # the reader of our output went away (`pcapipe describe ... | head`): nothing is wrong
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 0
    except Exception as e:  # see exit_status
        _print_error(args, e)
        return exit_status(e)
