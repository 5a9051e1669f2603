"""Batch throughput on the sample scenario: files per minute with 1 and 2 workers.

    python tests/benchmarks/batch_benchmark.py [--folder sample_events] [--repeat 1]
                                               [--n-trees N] [--markdown OUT.md] [--in-process]

Runs ``boscage batch`` over the folder (default recipe of the first file,
every file redone) as a fresh command per set-up, as a user would, so process
start-up, imports and loading the compiled kernels count alike (``--in-process``
calls ``core.batch.run_batch`` in this warm process instead):

* 1 worker, numba and BLAS limited to 1 thread;
* 1 worker, numba and BLAS with every core;
* 2 worker processes, cores // 2 threads each.

and prints wall and CPU seconds, files per minute, the 1-minute load average
after each set-up and the speed-up over the first set-up (target for 2 workers:
>= 1.7 x on 2 cores).  The speed-up only means something on a quiet machine:
when the load average is above the number of cores, other work takes the
second core and the CPU seconds tell more than the wall time.
"""

from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))
sys.path.insert(0, ROOT)

from core.batch import list_fcs_files, run_batch  # noqa: E402
from core.fcs import read_fcs  # noqa: E402
from core.recipe import default_recipe  # noqa: E402


def _run_command(folder: str, out: str, recipe_path: str, workers: int, threads: int) -> int:
    """``boscage batch`` in a fresh Python process; returns the number of files done."""
    import csv
    import subprocess

    env = dict(os.environ, NUMBA_NUM_THREADS=str(threads), OMP_NUM_THREADS=str(threads),
               OPENBLAS_NUM_THREADS=str(threads), MKL_NUM_THREADS=str(threads))
    code = ("import sys; from core.batch import main; "
            "sys.exit(main(sys.argv[1:]))")
    subprocess.run([sys.executable, "-c", code, folder, "--out", out, "--recipe", recipe_path,
                    "--workers", str(workers), "--force"], env=env, cwd=ROOT, check=False,
                   stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    with open(os.path.join(out, "summary.csv"), encoding="utf-8") as fh:
        return sum(1 for row in csv.DictReader(fh) if row.get("status") == "ok")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--folder", default=os.path.join(ROOT, "sample_events"))
    ap.add_argument("--repeat", type=int, default=1)
    ap.add_argument("--n-trees", type=int, default=None, help="engine n_trees (default: engine default)")
    ap.add_argument("--markdown")
    ap.add_argument("--in-process", action="store_true",
                    help="call run_batch in this (warm) process instead of a fresh command per set-up")
    args = ap.parse_args(argv)

    files = list_fcs_files(args.folder)
    recipe = default_recipe(read_fcs(files[0]))
    if args.n_trees:
        recipe.engine = dict(recipe.engine, n_trees=args.n_trees)
    cores = os.cpu_count() or 1
    setups = [("1 worker, 1 numba thread", 1, 1), (f"1 worker, {cores} numba threads", 1, cores),
              (f"2 workers, {max(1, cores // 2)} numba thread(s) each", 2, max(1, cores // 2))]
    tmp = tempfile.mkdtemp(prefix="boscage-batch-bench-")
    from core.recipe import save_recipe

    recipe_path = os.path.join(tmp, "recipe.json")
    save_recipe(recipe, recipe_path)
    # warm the numba cache so the first set-up does not pay compilation
    run_batch(args.folder, os.path.join(tmp, "warm"), recipe=recipe, workers=1, force=True)
    rows = []
    try:
        for label, workers, threads in setups:
            best = None
            for r in range(args.repeat):
                out = os.path.join(tmp, f"w{workers}t{threads}r{r}")
                c0 = os.times()
                t0 = time.perf_counter()
                if args.in_process:
                    res = run_batch(args.folder, out, recipe=recipe, workers=workers, numba_threads=threads,
                                    force=True)
                    n_ok = res.n_ok
                else:
                    # a fresh command, as a user runs it: start-up, imports and loading the
                    # compiled kernels count for every set-up alike
                    n_ok = _run_command(args.folder, out, recipe_path, workers, threads)
                sec = time.perf_counter() - t0
                c1 = os.times()
                # CPU seconds of this process and of its finished child processes
                cpu = (c1.user + c1.system + c1.children_user + c1.children_system
                       - c0.user - c0.system - c0.children_user - c0.children_system)
                assert n_ok == len(files), f"{len(files) - n_ok} files failed"
                if best is None or sec < best[0]:
                    best = (sec, cpu)
            rows.append([label, len(files), f"{best[0]:.1f}", f"{best[1]:.1f}", f"{60 * len(files) / best[0]:.2f}",
                         "%.1f" % os.getloadavg()[0]])
            print(rows[-1], file=sys.stderr, flush=True)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
        from core.batch.workers import limit_numba_threads
        limit_numba_threads(cores)
    base = float(rows[0][2])
    for row in rows:
        row.append(f"{base / float(row[2]):.2f} x")
    header = ["set-up", "files", "seconds", "CPU seconds", "files/min", "load after", "speed-up vs 1x1"]
    widths = [max(len(h), *(len(str(r[i])) for r in rows)) for i, h in enumerate(header)]
    print(f"\nBatch over {args.folder} ({len(files)} files; {cores} cores; engine "
          f"{recipe.engine}; best of {args.repeat})")
    print("  ".join(h.ljust(w) for h, w in zip(header, widths)))
    for row in rows:
        print("  ".join(str(v).ljust(w) for v, w in zip(row, widths)))
    print("CPU seconds: this process and its finished child processes; worker processes forked by the "
          "fork server are not its children, so a multi-worker set-up shows only its own process here")
    if args.markdown:
        with open(args.markdown, "w", encoding="utf-8") as fh:
            fh.write("| " + " | ".join(header) + " |\n|" + "---|" * len(header) + "\n")
            for row in rows:
                fh.write("| " + " | ".join(map(str, row)) + " |\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
