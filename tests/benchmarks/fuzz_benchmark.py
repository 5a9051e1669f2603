"""Longer fuzz run of the FCS reader and the model-file loader; prints tables.

    nice python tests/benchmarks/fuzz_benchmark.py                    # 6,000 FCS + 1,000 model files
    nice python tests/benchmarks/fuzz_benchmark.py --cases 20000 --seed 7 --model-cases 0

FCS part: seeded mutations of fcsparser's files and the demo tubes
(tests/fuzz_fcs.py), each read with a 5 s limit (SIGALRM).  Model part: a
small fitted model saved once, then bytes of the archive flipped, zeroed or
cut (1-8 per case), each loaded with the same limit; the only accepted
outcomes are a loaded model or ModelFileError.  Targets (issue 15): zero
exceptions that are not ours, zero reads or loads over 5 s, peak memory
(maximum resident set size of this process, ru_maxrss) under 1 GB.
"""

from __future__ import annotations

import argparse
import os
import random
import resource
import sys
import tempfile
import time

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__)))))

import numpy as np  # noqa: E402

from tests.fuzz_fcs import _alarm, _Timeout, run_cases  # noqa: E402


def peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # kB on Linux


def model_cases(n: int, seed: int, scratch: str, limit: float) -> dict:
    import signal

    from core.density import AdditiveTreeDensity
    from core.errors import ModelFileError

    X = np.random.default_rng(seed).normal(size=(400, 3))
    src = os.path.join(scratch, "model.npz")
    AdditiveTreeDensity(base="skewed", n_trees=8, patience=3, n_layers=2, random_state=0).fit(X).save(src)
    raw = open(src, "rb").read()
    rng = random.Random(seed)
    counts = {"loaded": 0, "error": 0, "foreign": 0, "hang": 0}
    examples = []
    slowest = 0.0
    path = os.path.join(scratch, "case.npz")
    for _ in range(n):
        b = bytearray(raw)
        how = rng.choice(["flip", "zero", "cut", "directory"])
        if how == "cut":
            b = b[:rng.randrange(len(b))]
        else:
            lo = raw.rfind(b"PK\x01\x02") - 2000 if how == "directory" else 0
            for _ in range(rng.randint(1, 8)):
                pos = rng.randrange(max(0, lo), len(b))
                b[pos] = 0 if how == "zero" else rng.randrange(256)
        with open(path, "wb") as fh:
            fh.write(bytes(b))
        old = signal.signal(signal.SIGALRM, _alarm)
        signal.setitimer(signal.ITIMER_REAL, limit)
        t0 = time.perf_counter()
        try:
            m = AdditiveTreeDensity.load(path)
            m.score_samples(X[:50])
            counts["loaded"] += 1
        except _Timeout:
            counts["hang"] += 1
        except ModelFileError:
            counts["error"] += 1
        except Exception as exc:  # counted: a foreign exception
            counts["foreign"] += 1
            examples.append(f"{how}: {type(exc).__name__}: {exc}"[:160])
        finally:
            signal.setitimer(signal.ITIMER_REAL, 0)
            signal.signal(signal.SIGALRM, old)
        slowest = max(slowest, time.perf_counter() - t0)
    return {"counts": counts, "slowest": slowest, "examples": examples}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cases", type=int, default=6000, help="mutated FCS files (default 6000)")
    ap.add_argument("--model-cases", type=int, default=1000, help="damaged model files (default 1000)")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--limit", type=float, default=5.0, help="seconds per case before it counts as a hang")
    args = ap.parse_args(argv)
    import warnings

    warnings.simplefilter("ignore")
    with tempfile.TemporaryDirectory(prefix="boscage-fuzz-") as scratch:
        t0 = time.perf_counter()
        fcs = run_cases(args.cases, args.seed, scratch, args.limit)
        t_fcs = time.perf_counter() - t0
        mem_fcs = peak_mb()
        t0 = time.perf_counter()
        model = model_cases(args.model_cases, args.seed, scratch, args.limit) if args.model_cases else None
        t_model = time.perf_counter() - t0
    c = fcs["counts"]
    print(f"FCS reader: {args.cases} mutated files from {fcs['n_seeds']} seed files, seed {args.seed}, "
          f"limit {args.limit:g} s per read")
    print()
    print("| outcome | files |")
    print("|:--|--:|")
    for key, label in (("read", "read"), ("error", "FcsFileError naming the file"),
                       ("foreign", "other exception (not ours)"), ("hang", f"over {args.limit:g} s"),
                       ("shift", "silent shift / lost events")):
        print(f"| {label} | {c[key]:,} |")
    print()
    print(f"slowest read {fcs['slowest']:.3f} s; {t_fcs:.1f} s in all; peak memory {mem_fcs:.0f} MB")
    for kind, items in fcs["examples"].items():
        for seed_name, mutation, detail in items[:5]:
            print(f"  {kind}: {mutation}: {detail}")
    if model is not None:
        m = model["counts"]
        print()
        print(f"Model files: {args.model_cases} damaged copies of one saved model (flipped, zeroed or cut "
              f"bytes), loaded and scored")
        print()
        print("| outcome | files |")
        print("|:--|--:|")
        for key, label in (("loaded", "loaded and scored"), ("error", "ModelFileError naming the file"),
                           ("foreign", "other exception (not ours)"), ("hang", f"over {args.limit:g} s")):
            print(f"| {label} | {m[key]:,} |")
        print()
        print(f"slowest load {model['slowest']:.3f} s; {t_model:.1f} s in all; peak memory {peak_mb():.0f} MB")
        for e in model["examples"][:5]:
            print(f"  foreign: {e}")
    bad = c["foreign"] + c["hang"] + c["shift"] + (model["counts"]["foreign"] + model["counts"]["hang"]
                                                   if model else 0)
    return 0 if bad == 0 and peak_mb() < 1024 else 1


if __name__ == "__main__":
    sys.exit(main())
