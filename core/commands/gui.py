"""``longrun gui [FILE] [--screenshot OUT.png] [--size WxH]``: the desktop app."""
from __future__ import annotations

import argparse
import re

from ..errors import OptionError

HELP = "open the desktop app (on FILE, or a sample model the first time)"
DESCRIPTION = (
    "Open Longrun's editor and analysis window. With --screenshot, lay the window out (no display "
    "needed with QT_QPA_PLATFORM=offscreen), wait for the first analysis, save the picture and exit."
)


def _size(text: str) -> tuple[int, int]:
    m = re.fullmatch(r"\s*(\d+)\s*[xX×]\s*(\d+)\s*", text)
    if not m:
        raise argparse.ArgumentTypeError(f"{text!r} is not a size such as 1400x900")
    w, h = int(m.group(1)), int(m.group(2))
    if not (200 <= w <= 10000 and 150 <= h <= 10000):
        raise argparse.ArgumentTypeError(f"{text!r}: width must be 200-10000 and height 150-10000 pixels")
    return w, h


def add_arguments(parser):
    parser.add_argument("file", metavar="FILE", nargs="?", default=None,
                        help="chain file (.json) or matrix (.csv) to open")
    parser.add_argument("--screenshot", metavar="OUT.png", default=None,
                        help="save a picture of the window to OUT.png and exit")
    parser.add_argument("--size", metavar="WxH", type=_size, default=None,
                        help="window size in pixels (default 1400x900 for screenshots)")
    parser.add_argument("--panel", metavar="NAME", default=None,
                        help="with --screenshot: bring this panel to the front (longrun, simulation, plan, "
                        "findings, matrix, checks)")
    parser.add_argument("--run-plan", action="store_true",
                        help="with --screenshot: run the plan in the simulation panel to the end first")


def run(args) -> int:
    try:
        from app.main import run_gui
    except ImportError as exc:  # PySide6 missing or broken Qt libraries
        raise OptionError(f"the desktop app cannot start: {exc}") from None
    if (args.panel or args.run_plan) and not args.screenshot:
        raise OptionError("--panel and --run-plan go with --screenshot")
    return run_gui(args.file, screenshot=args.screenshot, size=args.size, panel=args.panel, run_plan=args.run_plan)
