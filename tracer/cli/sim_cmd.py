"""``tracer sim``: run the simulated bench as a standalone server."""
from __future__ import annotations

import argparse


def register(subparsers) -> None:
    from simulated_instrument import cli

    parser = subparsers.add_parser("sim", help="start the simulated bench as a standalone server",
                                   description=cli.DESCRIPTION, epilog=cli.epilog())
    cli.add_arguments(parser)
    parser.set_defaults(func=_run)


def _run(args: argparse.Namespace) -> int:
    from simulated_instrument import cli

    return cli.run(args)
