"""The command line ``boscage batch ...``: parser, terminal progress, exit codes.

The ``boscage`` launcher delegates ``batch`` here without Qt; ``python -m
core.batch`` runs it too.  Imports only :func:`core.batch.run.run_batch` and
small core modules.
"""

from __future__ import annotations

import argparse
import sys
import time
from typing import Any, Sequence

from .. import RESEARCH_USE_NOTE
from ..errors import BoscageError
from .run import run_batch


def _fmt_seconds(s: float) -> str:
    s = int(round(s))
    h, rem = divmod(s, 3600)
    m, sec = divmod(rem, 60)
    return f"{h}:{m:02d}:{sec:02d}" if h else f"{m}:{sec:02d}"


class TerminalProgress:
    """A plain-text progress bar with ETA on a stream (stderr); one line per file when not a terminal.

    Files finished in an earlier run (rows marked ``skipped``) do not count
    towards the speed the ETA is computed from.
    """

    def __init__(self, stream=None, width: int = 30):
        self.stream = stream or sys.stderr
        self.width = width
        self.t0 = time.perf_counter()
        self.t_base = self.t0      # when the files that count for the ETA started
        self.base_step = 0         # files done before that (skipped ones)
        self.failed = 0
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())

    def __call__(self, step: int, total: int | None, row: Any = None) -> bool:
        skipped = isinstance(row, dict) and bool(row.get("skipped"))
        now = time.perf_counter()
        if row is None or skipped:
            self.base_step, self.t_base = step, now
        elif row.get("status") == "error":
            self.failed += 1
        total = total or 0
        new = step - self.base_step
        eta = "--:--"
        if total and step >= total:
            eta = "0:00"
        elif total and new > 0:
            eta = _fmt_seconds((now - self.t_base) / new * (total - step))
        filled = int(self.width * step / total) if total else 0
        bar = "#" * filled + "-" * (self.width - filled)
        name = row.get("file", "") if isinstance(row, dict) else ""
        status = ("done earlier" if skipped else row.get("status", "")) if isinstance(row, dict) else ""
        text = (f"[{bar}] {step}/{total} files, {self.failed} failed, elapsed {_fmt_seconds(now - self.t0)}, "
                f"ETA {eta}  {name} {status}").rstrip()
        if self.tty:
            self.stream.write("\r" + text[:160].ljust(120))
            if total and step >= total:
                self.stream.write("\n")
        else:
            self.stream.write(text + "\n")
        self.stream.flush()
        return True


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="boscage batch",
        description=f"Run one recipe over every FCS file in a folder. {RESEARCH_USE_NOTE}")
    p.add_argument("input_dir", metavar="INPUT_DIR", help="folder holding the *.fcs files")
    p.add_argument("--out", required=True, metavar="OUT_DIR", help="output folder (created if missing)")
    p.add_argument("--recipe", metavar="R.json", help="recipe file (default: the default recipe of the first file)")
    p.add_argument("--control", metavar="FILE", help="control FCS file to contrast every file with")
    p.add_argument("--workers", type=int, metavar="N", help="worker processes (default: CPU cores)")
    p.add_argument("--scheduler", metavar="ADDRESS", help="address of a Dask distributed scheduler")
    p.add_argument("--force", action="store_true", help="redo files already finished in an earlier run")
    p.add_argument("--csv", action="store_true",
                   help="with --control, also write each file's enriched events as CSV (transformed values)")
    return p


def main(argv: Sequence[str] | None = None) -> int:
    """``boscage batch ...``; returns the exit code (0 ok, 1 a file failed, 2 bad arguments, 130 Ctrl-C)."""
    parser = build_parser()
    try:
        args = parser.parse_args(list(sys.argv[1:] if argv is None else argv))
    except SystemExit as exc:  # argparse printed the problem already
        return 0 if exc.code == 0 else 2
    if args.workers is not None and args.workers < 1:
        print("boscage batch: --workers must be at least 1", file=sys.stderr)
        return 2
    bar = TerminalProgress(sys.stderr)
    try:
        result = run_batch(args.input_dir, args.out, recipe=args.recipe, control=args.control,
                           workers=args.workers, scheduler=args.scheduler, force=args.force, progress=bar,
                           csv=args.csv)
    except KeyboardInterrupt:
        print("\nboscage batch: stopped; finished files are kept", file=sys.stderr)
        return 130
    except BoscageError as exc:
        print(f"boscage batch: {exc}", file=sys.stderr)
        return 2
    except OSError as exc:  # a failing disk or folder mid-run: a sentence, not a traceback
        print(f"boscage batch: {exc.filename or args.out}: {exc.strerror or exc}; finished files are kept "
              "and a re-run completes the rest", file=sys.stderr)
        return 1
    print(f"\n{result.n_ok} of {len(result.rows)} files ok, {result.n_failed} failed"
          + (f", {result.n_skipped} finished earlier and skipped" if result.n_skipped else "")
          + (" (stopped by the user)" if result.interrupted else "")
          + f"; summary: {result.summary_path}", file=sys.stderr)
    print(RESEARCH_USE_NOTE, file=sys.stderr)
    return result.exit_code
