"""Speed of FCS reading and writing; prints a table (no assertions).

Run: python tests/benchmarks/fcs_benchmark.py [--events 1000000]
     python tests/benchmarks/fcs_benchmark.py --memory 5000000 [--channels 30]

Rows: every readable file fcsparser ships (read in place) and synthetic float32
files of growing size written by write_fcs, each read by read_fcs and by
fcsparser.parse alone (the difference is our checks and $PnE/$PnG decoding).

``--memory N``: one float32 file of N events x ``--channels`` channels, read in
fresh processes by read_fcs and by fcsparser.parse: seconds and the peak
resident memory the read added to the process (peak resident memory, reset
after the imports, minus the resident memory then), best of ``--repeat``.
``core`` comes from PYTHONPATH when it is set, so an older checkout can be
measured in the same run.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
import warnings

import fcsparser
import numpy as np

sys.path.append(os.path.abspath(os.path.join(os.path.dirname(__file__), "..", "..")))

from core.errors import FcsFileError  # noqa: E402
from core.fcs import read_fcs, write_fcs  # noqa: E402


def _best_of(fn, repeat=3):
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def _fcsparser(path):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fcsparser.parse(path, channel_naming="$PnN", dtype=None, encoding="latin-1")


def _memory_child(reader: str, path: str) -> None:
    """Print seconds and MB the read added (peak RSS minus RSS after the imports) as JSON."""
    import json

    import fcsparser.api  # noqa: F401  (both readers use it: imported before the base is taken)
    import pandas  # noqa: F401
    # the peak resident memory is reset here (Linux: "5" to clear_refs), since a forked child
    # starts with its parent's peak, and read afterwards as VmHWM
    with open("/proc/self/clear_refs", "w") as fh:
        fh.write("5")
    base = _status_mb("VmRSS")
    t0 = time.perf_counter()
    kept = read_fcs(path).data if reader == "read_fcs" else _fcsparser_frame(path)
    seconds = time.perf_counter() - t0
    print(json.dumps({"seconds": seconds, "added_mb": _status_mb("VmHWM") - base, "held_mb": kept.nbytes / 2 ** 20}))


def _status_mb(key: str) -> float:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(key + ":"):
                return int(line.split()[1]) / 1024.0
    return float("nan")


def _fcsparser_frame(path):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fcsparser.parse(path, channel_naming="$PnN", dtype=None, encoding="latin-1")[1].to_numpy()


def memory_rows(n: int, d: int, repeat: int) -> None:
    import json
    import subprocess
    import core
    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, f"synthetic_{n}x{d}.fcs")
        rng = np.random.default_rng(0)
        write_fcs(path, rng.lognormal(6.0, 1.5, size=(n, d)).astype(np.float32), [f"C{j}" for j in range(d)])
        print(f"core from {os.path.dirname(core.__file__)}; {n:,} events x {d} channels float32, "
              f"{os.path.getsize(path) / 2 ** 20:.0f} MB")
        print(f"{'reader':10s} {'seconds':>8s} {'added MB':>9s} {'held MB':>8s}")
        for reader in ("read_fcs", "fcsparser"):
            runs = [json.loads(subprocess.run([sys.executable, os.path.abspath(__file__), "--child", reader, path],
                                              capture_output=True, text=True, check=True).stdout)
                    for _ in range(repeat)]
            print(f"{reader:10s} {min(r['seconds'] for r in runs):8.2f} {min(r['added_mb'] for r in runs):9.0f} "
                  f"{runs[0]['held_mb']:8.0f}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--events", type=int, default=1_000_000, help="largest synthetic file")
    parser.add_argument("--memory", type=int, default=0, help="events of the memory comparison")
    parser.add_argument("--channels", type=int, default=30)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--child", nargs=2, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        _memory_child(*args.child)
        return
    if args.memory:
        memory_rows(args.memory, args.channels, args.repeat)
        return

    rows = []
    root = os.path.join(os.path.dirname(fcsparser.__file__), "tests", "data")
    for folder, _, files in sorted(os.walk(root)):
        for name in sorted(files):
            if name.endswith(".txt"):
                continue
            path = os.path.join(folder, name)
            try:
                ef = read_fcs(path)
            except FcsFileError:
                continue
            rows.append((name[:38], ef.n_events, ef.n_channels, os.path.getsize(path),
                         _best_of(lambda: read_fcs(path)), _best_of(lambda: _fcsparser(path)),
                         float("nan")))

    rng = np.random.default_rng(0)
    with tempfile.TemporaryDirectory() as tmp:
        n = 10_000
        while n <= args.events:
            data = rng.normal(1000.0, 300.0, size=(n, 12))
            path = os.path.join(tmp, f"synthetic_{n}.fcs")
            t_write = _best_of(lambda: write_fcs(path, data, [f"C{j}" for j in range(12)],
                                                 overwrite=True), repeat=2)
            rows.append((f"synthetic float32 {n} events", n, 12, os.path.getsize(path),
                         _best_of(lambda: read_fcs(path)), _best_of(lambda: _fcsparser(path)),
                         t_write))
            n *= 10

    head = f"{'file':40s} {'events':>9s} {'ch':>3s} {'MB':>7s} {'read_fcs s':>11s} " \
           f"{'fcsparser s':>12s} {'write_fcs s':>12s} {'read MB/s':>10s}"
    print(head)
    print("-" * len(head))
    for name, n_ev, n_ch, size, t_ours, t_ref, t_w in rows:
        print(f"{name:40s} {n_ev:9d} {n_ch:3d} {size / 1e6:7.2f} {t_ours:11.4f} {t_ref:12.4f} "
              f"{t_w:12.4f} {size / 1e6 / t_ours:10.1f}")


if __name__ == "__main__":
    main()
