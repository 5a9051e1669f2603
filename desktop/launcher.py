"""The ``boscage`` console command.

    boscage [PATH ...]                 open the window (FCS files or folders)
    boscage batch ...                  run a recipe over a folder (no window;
                                       see ``boscage batch --help``)
    boscage --screenshot OUT.png PATH  open PATH, fit with the default recipe,
                                       render the window (--size WxH, default 1400x900) to OUT.png

Qt is imported lazily so ``boscage batch`` works on machines without a display.
"""

from __future__ import annotations

import argparse
import sys

from core import RESEARCH_USE_NOTE, __version__


def _parse(argv: list[str]) -> argparse.Namespace:
    parser = argparse.ArgumentParser(
        prog="boscage",
        description="Look at flow cytometry events through an additive tree density. "
        + RESEARCH_USE_NOTE,
        epilog="Run 'boscage batch --help' for the folder batch command.",
    )
    parser.add_argument("paths", nargs="*", help="FCS files or folders of FCS files to open")
    parser.add_argument("--screenshot", metavar="OUT.png",
                        help="open PATH, fit with the default recipe, save a 1400 x 900 "
                        "picture of the window to OUT.png and exit")
    parser.add_argument("--size", default="1400x900", metavar="WxH",
                        help="window size of the --screenshot picture (default 1400x900)")
    parser.add_argument("--version", action="version", version=f"boscage {__version__}")
    return parser.parse_args(argv)


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``boscage`` command; returns the process exit code."""
    if argv is None:
        argv = sys.argv[1:]
    argv = list(argv)
    if argv and argv[0] == "batch":
        from core.batch import main as batch_main  # no Qt on this path

        result = batch_main(argv[1:])
        return int(result or 0)

    args = _parse(argv)
    # imported here: desktop.app loads Qt, which the batch path must not import
    from desktop.app import run_gui, run_screenshot

    if args.screenshot:
        if not args.paths:
            print("boscage: --screenshot needs a PATH to open", file=sys.stderr)
            return 2
        try:
            size = tuple(int(v) for v in args.size.lower().split("x"))
            assert len(size) == 2 and min(size) > 0
        except (ValueError, AssertionError):
            print(f"boscage: --size must be WIDTHxHEIGHT, e.g. 1280x720; got {args.size}", file=sys.stderr)
            return 2
        return run_screenshot(args.screenshot, args.paths, size=size)
    return run_gui(args.paths)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
