"""Command line: `ratebook run | check | demo`.

Exit codes (DESIGN §3): 0 success; 1 unexpected internal error; 2 usage or config error; 3 input
data failed validation; 4 release refused. Errors print one clear line plus details; a traceback
only with --debug.
"""

from __future__ import annotations

import argparse
import sys
import time
import traceback
from pathlib import Path

from pipeline import __version__
from pipeline.errors import RatebookError

EXIT_OK, EXIT_INTERNAL, EXIT_USAGE = 0, 1, 2


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # usage errors are exit 2, as argparse does, with our wording
        self.print_usage(sys.stderr)
        print(f"ratebook: error: {message}", file=sys.stderr)
        raise SystemExit(EXIT_USAGE)


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="ratebook", description="Publish survey proportions with design-based intervals, "
                                                  "reliability flags and disclosure control.")
    parser.add_argument("--version", action="version", version=f"ratebook {__version__}")
    # --debug and --quiet work before or after the command; SUPPRESS keeps a subcommand's default
    # from overwriting a flag given before it
    common = argparse.ArgumentParser(add_help=False)
    for flags_parser, default in ((parser, False), (common, argparse.SUPPRESS)):
        flags_parser.add_argument("--debug", action="store_true", default=default, help="show a traceback on errors")
        flags_parser.add_argument("--quiet", action="store_true", default=default,
                                  help="print only errors and the final summary")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)

    run = sub.add_parser("run", parents=[common], help="run the whole pipeline and publish a release")
    run.add_argument("config", help="path to the YAML config")
    run.add_argument("--release-id", help="release folder name (default: NAME-YYYYMMDD)")
    run.add_argument("--replace", action="store_true", help="overwrite an existing release with the same id")

    check = sub.add_parser("check", parents=[common], help="validate the config and the input data; publish nothing")
    check.add_argument("config", help="path to the YAML config")

    demo = sub.add_parser("demo", parents=[common], help="write the fictional demo survey")
    demo.add_argument("--out", default="data/raw", help="folder for the demo files (default: data/raw)")
    demo.add_argument("--persons", type=int, default=40_000, help="sampled persons, about (default: 40000)")
    demo.add_argument("--seed", type=int, default=20261202, help="random seed (default: 20261202)")
    demo.add_argument("--format", choices=["parquet", "csv"], action="append",
                      help="microdata format; repeat for both (default: parquet)")
    return parser


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        if args.command == "run":
            return _run(args)
        if args.command == "check":
            return _check(args)
        return _demo(args)
    except RatebookError as exc:
        if args.debug:
            traceback.print_exc()
        print(f"ratebook: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("ratebook: interrupted; nothing was published", file=sys.stderr)
        return 130
    except Exception as exc:  # a bug: say so plainly
        if args.debug:
            traceback.print_exc()
        print(f"ratebook: internal error: {type(exc).__name__}: {exc} (run with --debug for the traceback)",
              file=sys.stderr)
        return EXIT_INTERNAL


def _reporter(quiet: bool):
    """Stage lines on stderr; on a terminal, a live row counter too. Quiet: nothing."""
    from pipeline.runner import Reporter

    if quiet:
        return Reporter(), (lambda: None)
    if not sys.stderr.isatty():
        return Reporter(stage=lambda text: print(f"ratebook: {text}", file=sys.stderr, flush=True)), (lambda: None)
    from rich.console import Console
    from rich.progress import Progress, SpinnerColumn, TextColumn, TimeElapsedColumn

    progress = Progress(SpinnerColumn(), TextColumn("{task.description}"),
                        TextColumn("{task.completed:,} rows"), TimeElapsedColumn(),
                        console=Console(stderr=True), transient=True)
    progress.start()
    task = progress.add_task("starting", total=None)
    return (Reporter(stage=lambda text: progress.update(task, description=text),
                     rows=lambda n: progress.advance(task, n)),
            progress.stop)


def _run(args) -> int:
    from pipeline.runner import run

    reporter, stop = _reporter(args.quiet)
    try:
        summary = run(args.config, release_id=args.release_id, replace=args.replace, reporter=reporter)
    finally:
        stop()
    s = summary.statuses
    print(f"release {summary.release_id} written to {summary.release_dir}")
    print(f"  cells: {summary.cells:,} ({s['published']:,} published, {s['caution']:,} caution, "
          f"{s['suppressed']:,} suppressed)")
    print(f"  rows:  {summary.rows_read:,} read = {summary.rows_accepted:,} accepted + "
          f"{summary.rows_rejected:,} rejected")
    print(f"  time:  {summary.seconds:.1f} s")
    return EXIT_OK


def _check(args) -> int:
    from pipeline.config import load_config
    from pipeline.runner import check_inputs

    reporter, stop = _reporter(args.quiet)
    config = load_config(args.config)
    try:
        found = check_inputs(config, reporter)
    finally:
        stop()
    print(f"config {config.path.name}: valid")
    for count in found.files:
        print(f"  {count.path.name}: {count.read:,} read = {count.accepted:,} accepted + {count.rejected:,} rejected")
    lines = found.reject_summary(limit=50)
    if lines:
        print("  would be rejected:")
        for line in lines:
            print(f"    {line}")
    print("input data: valid; nothing was published")
    return EXIT_OK


def _demo(args) -> int:
    from pipeline.demo import write_demo

    from pipeline.errors import ConfigError

    started = time.perf_counter()
    formats = tuple(dict.fromkeys(args.format or ["parquet"]))
    try:
        summary = write_demo(Path(args.out), persons=args.persons, seed=args.seed, formats=formats)
    except ValueError as exc:  # the generator validates its own arguments
        raise ConfigError(f"demo: {exc}") from None
    print(f"demo survey written to {Path(args.out).resolve()} in {time.perf_counter() - started:.1f} s")
    print(f"  {summary}")
    return EXIT_OK


if __name__ == "__main__":
    raise SystemExit(main())
