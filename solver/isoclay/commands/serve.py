"""`isoclay serve`: run the solver service (ZeroMQ) for the Blender add-on or headless clients.

The options and the start live in isoclay.service.launch, shared with `python -m isoclay.service.server`.
"""

from __future__ import annotations

import argparse

from ..service.launch import DESCRIPTION, add_arguments

__all__ = ["DESCRIPTION", "add_arguments", "add_parser", "run"]


def add_parser(subparsers):
    parser = subparsers.add_parser("serve", help="run the solver service for the Blender add-on",
                                   description=DESCRIPTION, formatter_class=argparse.RawDescriptionHelpFormatter)
    add_arguments(parser)
    parser.set_defaults(needs_torch=False)  # the server process never imports torch; workers do
    return parser


def run(args, ui) -> int:
    from ..service import launch

    return launch.run(args, ui.info if ui is not None else launch.say_on_stderr)
