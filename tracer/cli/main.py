"""`tracer` command: one sub-command per module in this package.

Each sub-command module exposes ``register(subparsers)``, which adds its parser and sets
``func`` (a callable taking the parsed namespace and returning the exit status).
Modules that are not there yet are simply not offered.
"""
from __future__ import annotations

import argparse
import importlib
import logging
import sys

# Sub-command modules, in the order `tracer --help` lists them.
SUBCOMMAND_MODULES = (
    "tracer.cli.run_cmd",      # tracer run, tracer demo
    "tracer.cli.check_cmd",    # tracer check
    "tracer.cli.sim_cmd",      # tracer sim
    "tracer.cli.fit_cmd",      # tracer fit
    "tracer.cli.correct_cmd",  # tracer correct
    "tracer.cli.logbook_cmd",  # tracer logbook, tracer export
    "tracer.cli.gui_cmd",      # tracer gui
    "tracer.cli.bench_cmd",    # tracer bench
    "tracer.cli.reliability_cmd",  # tracer reliability
)

EXIT_OK = 0
EXIT_USAGE = 2


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="tracer",
        description="Bench I-V tracer: safe SMU sweeps of solar cells, live curves, "
        "diode-model fits and STC translation.",
    )
    from tracer import __version__

    parser.add_argument("--version", action="version", version=f"tracer {__version__}")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in SUBCOMMAND_MODULES:
        try:
            module = importlib.import_module(name)
        except ModuleNotFoundError as exc:
            if exc.name == name:
                continue  # sub-command not built yet
            raise
        module.register(subparsers)
    return parser


class _OneLineFormatter(logging.Formatter):
    """Warnings for a person at a terminal: one line each, the exception named but no
    traceback (a program that wants tracebacks configures logging before calling main)."""

    def format(self, record: logging.LogRecord) -> str:
        text = f"tracer: {record.levelname.lower()}: {record.getMessage()}"
        if record.exc_info and record.exc_info[1] is not None:
            exc = record.exc_info[1]
            text += f" ({type(exc).__name__}: {exc})"
        return text.replace("\n", " ")


def _configure_logging() -> None:
    """Unless the caller set up logging, warnings go to stderr as single lines."""
    root = logging.getLogger()
    if root.handlers:
        return
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(_OneLineFormatter())
    handler.setLevel(logging.WARNING)
    root.addHandler(handler)


def main(argv: list[str] | None = None) -> int:
    _configure_logging()
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return EXIT_USAGE
    return int(args.func(args) or 0)


if __name__ == "__main__":
    sys.exit(main())
