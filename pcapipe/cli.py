"""The ``pcapipe`` command line.

Exit status: 0 done; 2 bad config or bad input (one ``error:`` line on
stderr naming the file, column or key and what to do; the traceback only
with ``--debug``); 1 unexpected failure; 130 interrupted.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import logging
import os
import sys
import traceback
import warnings

from ._version import __version__
from .errors import ConfigError, NotConvergedWarning, PcapipeError

__all__ = ["main", "build_parser"]

log = logging.getLogger("pcapipe")


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="pcapipe", description="Leading principal components of Parquet data "
                                "larger than memory, from a TOML config.")
    p.add_argument("--version", action="version", version=f"pcapipe {__version__}")
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("-v", "--verbose", action="store_true", help="debug messages")
    common.add_argument("-q", "--quiet", action="store_true", help="warnings and errors only")
    common.add_argument("--debug", action="store_true", help="show the traceback of errors")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    r = sub.add_parser("run", parents=[common], help="run one or more configs")
    r.add_argument("configs", nargs="+", metavar="CONFIG", help="TOML config file(s), run in turn")
    r.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
                   help="override a config key, e.g. --set model.components=10 (value parsed as TOML)")
    r.add_argument("--resume", action="store_true", help="continue an interrupted run from its checkpoint")

    c = sub.add_parser("check", parents=[common], help="validate and plan only; writes nothing")
    c.add_argument("config", metavar="CONFIG")
    c.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE")

    d = sub.add_parser("describe", parents=[common], help="spectrum table and top loadings of a run")
    d.add_argument("run_dir", metavar="RUN_DIR")
    d.add_argument("--top", type=int, default=5, help="loadings shown per component (default 5)")
    d.add_argument("--json", action="store_true", help="machine-readable output")
    d.add_argument("--beyond", type=int, default=10, metavar="N",
                   help="eigenvalues shown past the k retained ones (default 10; all are in spectrum.parquet)")

    pr = sub.add_parser("project", parents=[common], help="scores of new Parquet files")
    pr.add_argument("run_dir", metavar="RUN_DIR")
    pr.add_argument("inputs", nargs="+", metavar="INPUT")
    pr.add_argument("--out", required=True, metavar="DIR", help="directory for part-NNNNN.parquet")
    pr.add_argument("--explain", type=int, default=0, metavar="N",
                    help="list the N rows farthest beyond the control limits with their top features")

    rp = sub.add_parser("report", parents=[common], help="build report.html and figures for a run")
    rp.add_argument("run_dir", metavar="RUN_DIR")
    rp.add_argument("--color-by", default=None, metavar="COLUMN", help="keep column colouring the scatter")
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
    # distributed logs lost workers and schedulers with tracebacks; the error: line says it once
    logging.getLogger("distributed").setLevel(logging.INFO if args.verbose else logging.CRITICAL)


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
    # decides the exit status (a bug, 1, outranks bad input, 2).  Configs with
    # the same [compute] section share one scheduler connection.
    status, done = 0, 0
    with contextlib.ExitStack() as stack:
        runners: dict = {}
        for path in args.configs:
            try:
                cfg = load_config(path, args.overrides)
                _report_run(run(cfg, resume=args.resume, runner=_runner_for(cfg, runners, stack)))
                done += 1
            except PcapipeError as e:
                status = status or 2
                _print_error(args, e, prefix=path)
            except Exception as e:  # noqa: BLE001 - reported like main() does, then go on
                status = 1
                _print_error(args, e, prefix=path)
    log.info("%d of %d configs succeeded", done, len(args.configs))
    return status


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
    from .terminal import check_report

    print(check_report(args.config, args.overrides))
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
            return _COMMANDS[args.command](args)
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        # the reader of our output went away (`pcapipe describe ... | head`): nothing is wrong
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 0
    except Exception as e:  # PcapipeError: the user's to fix (2); anything else is a bug (1)
        _print_error(args, e)
        return 2 if isinstance(e, PcapipeError) else 1
