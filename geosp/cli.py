"""Command line: argument parsing and exit codes, nothing else (0 ok, 2 bad input, 1 bug)."""

from __future__ import annotations

import argparse
import logging
import signal
import sys
from pathlib import Path

from . import __version__
from .errors import GeospError, InputError

EPILOG = """\
examples:
  geosp demo --out demo_out            run the whole pipeline on the bundled demo area
  geosp init survey.toml               write a commented project-file template
  geosp check survey.toml              validate the inputs and print a summary
  geosp run survey.toml --out results  every stage; outputs in results/
  geosp detect survey.toml --out results --workers 2
  geosp run survey.toml --scheduler tcp://10.0.0.5:8786   run the source fits on a Dask cluster
  geosp forward results/interpretation.gpkg stations.csv --out predicted.gpkg
  geosp section upflow.toml --stations observed.csv --out section_out

exit codes: 0 success, 2 bad input or options, 1 internal error (a bug)
"""

STAGES = ("reduce", "grid", "detect", "fit", "publish")


_WORKERS_HELP = "processes for the survey model's blocks (default: [detect] workers, 1); results do not depend on it"


def build_parser():
    parser = argparse.ArgumentParser(
        prog="geosp", description="Self-potential survey reduction and fault-source interpretation.",
        epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--version", action="version", version=f"geosp {__version__}")
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--quiet", "-q", action="store_true", help="no progress bars or summaries")
    common.add_argument("--debug", action="store_true", help="show tracebacks")
    commands = parser.add_subparsers(dest="command", metavar="COMMAND")

    class _Commands:
        """Every command's --help opens with the sentence the command list shows."""

        @staticmethod
        def add_parser(name, *, help, **kwargs):
            return commands.add_parser(name, help=help, description=help[0].upper() + help[1:] + ".",
                                       **kwargs)

    sub = _Commands()

    p = sub.add_parser("demo", parents=[common], help="run the whole pipeline on the bundled demo area")
    p.add_argument("--out", default="geosp_demo", help="output folder (default: ./geosp_demo)")
    p.add_argument("--workers", type=_workers, default=None, help=_WORKERS_HELP)
    _threads_arg(p)

    p = sub.add_parser("run", parents=[common], help="run every stage and write every output")
    _project_args(p)
    p.add_argument("--workers", type=_workers, default=None, help=_WORKERS_HELP)
    p.add_argument("--scheduler", default=None, metavar="tcp://HOST:PORT",
                   help="run the survey model's blocks on this Dask distributed scheduler")
    _threads_arg(p)

    p = sub.add_parser("check", parents=[common], help="load and validate inputs; print a summary; write nothing")
    p.add_argument("project", type=Path, help="project file (TOML)")

    for stage in STAGES:
        p = sub.add_parser(stage, parents=[common], help=f"run the {stage} stage (earlier stages are reused "
                           "from the output folder, or run first)")
        _project_args(p)
        if stage == "detect":
            p.add_argument("--workers", type=_workers, default=None,
                           help=_WORKERS_HELP)
            p.add_argument("--scheduler", default=None, metavar="tcp://HOST:PORT",
                           help="run the survey model's blocks on this Dask distributed scheduler")
        _threads_arg(p)

    p = sub.add_parser("forward", parents=[common],
                       help="predicted SP of given sources at given stations (survey design)")
    p.add_argument("sources", type=Path, help="GeoPackage with a 'sources' layer as geosp writes it "
                   "(docs/outputs.md)")
    p.add_argument("stations", type=Path, help="stations: .gpkg/.shp/.geojson points, or CSV with x,y (same CRS "
                   "as the sources) or lon,lat")
    p.add_argument("--out", type=Path, default=None, help="output .gpkg or .csv (default: print a table)")
    p.add_argument("--layer", default="sources", help="sources layer name (default: sources)")

    p = sub.add_parser("section", parents=[common],
                       help="predicted SP of a heat or pressure model in a cross-section (or 3-D box model)")
    p.add_argument("model", type=Path, help="model description (TOML; see docs/flow-modelling.md)")
    p.add_argument("--stations", type=Path, default=None,
                   help="observed SP along the profile: CSV with columns x_m, sp_mv")
    p.add_argument("--out", type=Path, default=Path("section_out"), help="output folder (default: ./section_out)")

    p = sub.add_parser("init", parents=[common], help="write a commented project-file template")
    p.add_argument("project", type=Path, nargs="?", default=Path("project.toml"),
                   help="project file to write (default: project.toml; an existing file is never overwritten)")
    return parser


def _project_args(p):
    p.add_argument("project", type=Path, help="project file (TOML)")
    p.add_argument("--out", type=Path, default=None, help="output folder (default: geosp_output beside the project file)")


def _threads_arg(p):
    p.add_argument("--threads", type=_threads, default=1, metavar="N",
                   help="BLAS threads for the run's larger solves (default 1; gridding windows and "
                        "segment fits always use one, and parallel work comes from --workers)")


def _threads(text):
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"--threads takes a whole number, not {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError("--threads must be at least 1")
    return value


def _workers(text):
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"--workers takes a whole number, not {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError("--workers must be at least 1")
    return value


def _progress_factory(quiet):
    """A callable(label) -> callback(n_done, n_total) drawing a tqdm bar on a terminal."""
    if quiet or not sys.stderr.isatty():
        return lambda label: None
    from tqdm import tqdm

    def make(label):
        bar = {}

        def update(done, total, note=None):
            if "bar" not in bar:
                bar["bar"] = tqdm(total=total, desc=label, unit="step", file=sys.stderr, leave=False,
                                  bar_format="{desc}: {n_fmt} steps, {elapsed} {postfix}" if total is None
                                  else None)
            b = bar["bar"]
            b.n = done
            if note:
                b.set_postfix_str(note, refresh=False)
            b.refresh()
            if total is not None and done >= total:
                b.close()

        return update

    return make


def _dispatch(args, say, progress):
    from . import pipeline

    if args.command == "init":
        from .io.project import write_template

        say(f"geosp: wrote {write_template(args.project)}; edit the paths and column names, then "
            f"run 'geosp check {args.project}'.")
    elif args.command == "check":
        survey, summary = pipeline.check(pipeline.load_project(args.project))
        say(pipeline.format_summary(summary))
    elif args.command == "forward":
        out, table = pipeline.forward(args.sources, args.stations, out=args.out, layer=args.layer)
        say(f"geosp: wrote {out}" if out else table)
    elif args.command == "section":
        say(pipeline.format_section(*pipeline.section(args.model, stations=args.stations, out=args.out)))
    elif args.command == "demo":
        out, state = pipeline.demo(args.out, workers=args.workers, progress=progress, say=say,
                                   threads=args.threads)
        say(pipeline.format_run(out, state))
    else:
        stages = pipeline.ORDER if args.command == "run" else (args.command,)
        out, state = pipeline.execute(args.project, stages, out=args.out, workers=getattr(args, "workers", None),
                                      scheduler=getattr(args, "scheduler", None), progress=progress, say=say,
                                      threads=args.threads)
        say(pipeline.format_run(out, state))
    return 0


def os_problem(err):
    """One line for an operating-system error: the file, what is wrong, what to do."""
    import errno

    where = f"{err.filename}: " if err.filename else ""
    if isinstance(err, PermissionError):
        what, fix = "permission denied.", ("Make the file readable (an input) or the folder writable (--out) "
                                           "for your user, or choose another path.")
    elif err.errno in (errno.ENOSPC, getattr(errno, "EDQUOT", -1)):
        what, fix = "the disk is full (or your quota is used up).", (
            "Free some space or give --out a folder on another disk; the earlier outputs are unchanged.")
    elif err.errno == errno.ELOOP:
        what, fix = "too many levels of symbolic links (a link loop).", "Point the path at the real file."
    elif err.errno == errno.EROFS:
        what, fix = "the file system is read-only.", "Give --out a folder you can write to."
    elif isinstance(err, IsADirectoryError):
        what, fix = "is a folder, not a file.", "Name the file itself."
    elif isinstance(err, FileNotFoundError):
        what, fix = "does not exist.", "Check the path."
    else:
        what, fix = f"{err.strerror or err}.", "Check the path and the disk."
    return f"{where}{what} {fix}"


def main(argv=None):
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 0
    logging.basicConfig(level=logging.WARNING, format="geosp: %(message)s")
    say = (lambda *a: None) if getattr(args, "quiet", False) else (lambda *a: print(*a))
    try:
        return _dispatch(args, say, _progress_factory(args.quiet))
    except InputError as err:
        if args.debug:
            raise
        print(f"geosp: error: {err}", file=sys.stderr)
        return 2
    except BrokenPipeError:
        # The reader of our output (e.g. `| head`) went away: not an error of geosp.
        sys.stderr.close()
        return 0
    except KeyboardInterrupt:
        print("geosp: interrupted; outputs already written are complete, nothing half-written was kept.",
              file=sys.stderr)
        return 130
    except GeospError as err:
        if args.debug:
            raise
        print(f"geosp: failed: {err}", file=sys.stderr)
        return 1
    except OSError as err:  # the machine, not geosp: permissions, a full disk, a link loop
        if args.debug:
            raise
        print(f"geosp: error: {os_problem(err)}", file=sys.stderr)
        return 2
    except Exception as err:  # a bug
        if args.debug:
            raise
        print(f"geosp: internal error: {type(err).__name__}: {err}\n"
              "This is a bug in geosp. Re-run with --debug for the traceback and report it.", file=sys.stderr)
        return 1


def entry():
    """
    The ``geosp`` command. Once :func:`main` has returned, the outputs are
    complete; an interrupt during the interpreter's own shutdown would only
    print a traceback from a library's clean-up, so it is ignored from then on.
    """
    code = main()
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    sys.exit(code)


if __name__ == "__main__":
    entry()
