"""Command-line arguments shared by the faces that run the engine (``tempofield
analyze`` and ``tempofield batch``), built from the one option table
:data:`tempofield.engine.options.OPTIONS`, so the two commands cannot drift apart.
"""

from __future__ import annotations

import argparse

from tempofield.engine.options import DEFAULT_RATE_RANGE_BPM, OPTIONS

DEFAULT_RATE_RANGE = DEFAULT_RATE_RANGE_BPM  # the runner's name for it


def _flag(name: str) -> str:
    return "--" + name.replace("_", "-")


def add_analysis_arguments(p: argparse.ArgumentParser) -> None:
    """Arguments shared by every command that runs the engine (also used by the runner)."""
    p.add_argument("--frame-interval", type=float, metavar="S",
                   help="seconds between frames (overrides the file's metadata; required if it has none)")
    p.add_argument("--pixel-size", type=float, metavar="UM",
                   help="pixel edge in micrometres (overrides the file's metadata)")
    p.add_argument("--rate-range", type=float, nargs=2, metavar=("LO", "HI"), default=None,
                   help=f"band of rates to look for, beats per minute (default: the --specimen preset's band, "
                        f"else {DEFAULT_RATE_RANGE_BPM[0]:g} {DEFAULT_RATE_RANGE_BPM[1]:g})")
    p.add_argument("--channel", type=int, help="channel index for multi-channel stacks")
    p.add_argument("--plane", type=int, help="focal plane (Z) index for multi-plane stacks")
    group = p.add_argument_group("analysis options")
    for opt in OPTIONS:
        if not opt.cli:
            continue
        if opt.kind is bool:  # --name and --no-name; unset leaves the default (or a batch config's value)
            group.add_argument(_flag(opt.name), dest=opt.name, action=argparse.BooleanOptionalAction,
                               default=None, help=f"{opt.help} (default {'on' if opt.default else 'off'})")
        else:
            group.add_argument(_flag(opt.name), dest=opt.name, type=str, default=None,
                               metavar=opt.kind.__name__.upper(), help=f"{opt.help} (default {opt.default})")


def options_from_args(args) -> dict:
    """The analysis options a user set on the command line (validated later by the engine)."""
    return {o.name: getattr(args, o.name) for o in OPTIONS if getattr(args, o.name, None) is not None}
