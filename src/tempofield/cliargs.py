"""Command-line arguments shared by the faces that run the engine (``tempofield
analyze`` and ``tempofield batch``), built from the one option table
:data:`tempofield.engine.options.OPTIONS`, so the two commands cannot drift apart.
"""

from __future__ import annotations

import argparse

from tempofield.engine.options import DEFAULT_RATE_RANGE_BPM, OPTIONS

DEFAULT_RATE_RANGE = DEFAULT_RATE_RANGE_BPM  # the runner's name for it


#: Help of --channel and --plane (also used by ``tempofield convert``).
CHANNEL_HELP = ("which channel to analyse in a multi-channel stack, counted from 0: the first channel is 0, the "
                "second 1")
PLANE_HELP = ("which focal plane (Z) to analyse in a multi-plane stack, counted from 0: the first plane is 0, "
              "the second 1")


def flag_of(name: str) -> str:
    """The command-line flag of an analysis option: ``memory_budget_mb`` -> ``--memory-budget-mb``."""
    return "--" + name.replace("_", "-")


def add_analysis_arguments(p: argparse.ArgumentParser) -> None:
    """Arguments shared by every command that runs the engine (also used by the runner)."""
    p.add_argument("--frame-interval", type=float, metavar="S",
                   help="seconds between frames, e.g. 0.02 for 50 frames per second (overrides the file's "
                        "metadata; required if it has none, as for a folder of single-frame files)")
    p.add_argument("--pixel-size", type=float, metavar="UM",
                   help="pixel edge in micrometres (overrides the file's metadata)")
    p.add_argument("--rate-range", type=float, nargs=2, metavar=("LO", "HI"), default=None,
                   help=f"band of rates to look for, beats per minute (default: the --specimen preset's band, "
                        f"else {DEFAULT_RATE_RANGE_BPM[0]:g} {DEFAULT_RATE_RANGE_BPM[1]:g})")
    p.add_argument("--channel", type=int, metavar="N", help=CHANNEL_HELP)
    p.add_argument("--plane", type=int, metavar="N", help=PLANE_HELP)
    group = p.add_argument_group("analysis options")
    for opt in OPTIONS:
        if not opt.cli:
            continue
        if opt.kind is bool:  # --name and --no-name; unset leaves the default (or a batch config's value)
            group.add_argument(flag_of(opt.name), dest=opt.name, action=argparse.BooleanOptionalAction,
                               default=None, help=f"{opt.help} (default {'on' if opt.default else 'off'})")
        else:
            group.add_argument(flag_of(opt.name), dest=opt.name, type=str, default=None,
                               metavar=opt.kind.__name__.upper(), help=f"{opt.help} (default {opt.default})")


def options_from_args(args) -> dict:
    """The analysis options a user set on the command line (validated later by the engine)."""
    return {o.name: getattr(args, o.name) for o in OPTIONS if getattr(args, o.name, None) is not None}
