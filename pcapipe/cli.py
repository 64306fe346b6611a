"""The ``pcapipe`` command line.

Exit status: 0 done; 2 bad config or bad input (one ``error:`` line on
stderr naming the file, column or key and what to do; the traceback only
with ``--debug``); 1 unexpected failure; 130 interrupted.
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
import traceback

from ._version import __version__
from .errors import PcapipeError

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

    pr = sub.add_parser("project", parents=[common], help="scores of new Parquet files")
    pr.add_argument("run_dir", metavar="RUN_DIR")
    pr.add_argument("inputs", nargs="+", metavar="INPUT")
    pr.add_argument("--out", required=True, metavar="DIR", help="directory for part-NNNNN.parquet")

    rp = sub.add_parser("report", parents=[common], help="build report.html and figures for a run")
    rp.add_argument("run_dir", metavar="RUN_DIR")
    rp.add_argument("--color-by", default=None, metavar="COLUMN", help="keep column colouring the scatter")
    return p


def _setup_logging(args) -> None:
    level = logging.DEBUG if args.verbose else logging.WARNING if args.quiet else logging.INFO
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter("%(levelname)s: %(message)s" if args.verbose else "%(message)s"))
    log.handlers[:] = [handler]
    log.setLevel(level)
    log.propagate = False
    logging.getLogger("distributed").setLevel(logging.WARNING if not args.verbose else logging.INFO)


def _cmd_run(args) -> int:
    from .engine import run

    failed = 0
    for path in args.configs:
        try:
            res = run(path, args.overrides, resume=args.resume)
        except PcapipeError as e:
            if len(args.configs) == 1:
                raise
            failed += 1
            print(f"error: {path}: {e}", file=sys.stderr)
            continue
        m = res.manifest
        state = "converged" if m["converged"] else "NOT all converged"
        print(f"{res.directory}: {m['n_components']} components of {m['n_samples']} rows x "
              f"{m['n_features']} features, {m['method']}, {state}, "
              f"{m['timings']['total_seconds']:.1f} s")
    if len(args.configs) > 1:
        print(f"{len(args.configs) - failed} of {len(args.configs)} configs succeeded", file=sys.stderr)
    return 2 if failed else 0


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
        print(describe_text(res, args.top))
    return 0


def _cmd_project(args) -> int:
    from .project import project_to_directory
    from .result import load

    res = load(args.run_dir)
    written = project_to_directory(res, args.inputs, args.out)
    print(f"wrote {len(written)} part file(s) to {args.out}")
    return 0


def _cmd_report(args) -> int:
    from .report import write_report
    from .result import load

    res = load(args.run_dir)
    path = write_report(res, color_by=args.color_by)
    print(f"wrote {path}")
    return 0


_COMMANDS = {"run": _cmd_run, "check": _cmd_check, "describe": _cmd_describe,
             "project": _cmd_project, "report": _cmd_report}


def main(argv=None) -> int:
    """Entry point of the ``pcapipe`` command; returns the exit status."""
    parser = build_parser()
    args = parser.parse_args(argv)
    _setup_logging(args)
    try:
        return _COMMANDS[args.command](args)
    except PcapipeError as e:
        if args.debug:
            traceback.print_exc()
        print(f"error: {e}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 130
    except Exception as e:  # a bug: say so plainly, traceback on request
        if args.debug:
            traceback.print_exc()
        print(f"error: unexpected failure: {type(e).__name__}: {e} (run again with --debug for the "
              "traceback, and please report it)", file=sys.stderr)
        return 1
