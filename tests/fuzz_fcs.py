"""A seeded mutator of FCS files, shared by the fuzz test and tests/benchmarks/fuzz_benchmark.py.

Seeds: the files fcsparser ships (read in place) and the demo tubes in
``sample_events/``.  Each case applies one structure-aware mutation (HEADER
bytes or offsets, TEXT bytes, a keyword's value or case, a removed keyword,
truncation, appended bytes, $TOT/$PAR/$PnB/$PnR/$PnE/$PnG values) to one seed
and writes the result to a scratch folder.  :func:`classify` reads it with
:func:`core.fcs.read_fcs` and sorts the outcome:

* ``read`` -- an EventFile; ``shift`` -- a read whose values differ from the
  seed's although the mutation only moved DATA offsets (a silent shift), or
  whose event count differs after a changed $TOT (events silently lost);
* ``error`` -- an FcsFileError whose message names the file;
* ``foreign`` -- any other exception, or an FcsFileError that does not name the
  file or reports an internal error; ``hang`` -- longer than the time limit.
"""

from __future__ import annotations

import glob
import os
import random
import re
import signal
import time

import numpy as np

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

HOSTILE_VALUES = ["0", "-1", "1", "2", "7", "1e300", "-1e300", "1e-320", "4294967296", "18446744073709551617",
                  "400,1", "1e300,1", "4,0", "0,0", "-3,2", "nan", "inf", "-inf", "", " ", "abc", "9" * 40,
                  "1.5", "3,2,1", "i", "f", "d", "l", "A", "C", "4,3,2,1", "1,2", "2,1", "1,2,3", "65", "8", "16",
                  "24", "32", "64", "12", "99999999999"]
KEYWORDS = ["$TOT", "$PAR", "$DATATYPE", "$MODE", "$BYTEORD", "$NEXTDATA", "$BEGINDATA", "$ENDDATA",
            "$P1B", "$P1R", "$P1E", "$P1G", "$P2B", "$P2R", "$P2E", "$P2G", "$P1N", "$SPILLOVER"]
OFFSET_KINDS = ("header data offsets", "keyword data offsets")


def seed_files() -> list:
    """fcsparser's FCS files and the demo tubes, smallest first (paths, read in place)."""
    import fcsparser

    base = os.path.join(os.path.dirname(fcsparser.__file__), "tests", "data")
    files = glob.glob(os.path.join(base, "**", "*.fcs"), recursive=True)
    files += glob.glob(os.path.join(REPO, "sample_events", "*.fcs"))
    return sorted(files, key=os.path.getsize)


def _text_bounds(raw: bytes):
    try:
        t0, t1 = int(raw[10:18]), int(raw[18:26])
        if 58 <= t0 < t1 < len(raw):
            return t0, t1
    except ValueError:
        pass
    return None


def _set_keyword(raw: bytes, key: str, value: str, rng: random.Random) -> bytes:
    """Replace the value of ``key`` (any case) in TEXT; lengths may change (offsets then lie)."""
    bounds = _text_bounds(raw)
    if bounds is None:
        return raw
    t0, t1 = bounds
    text = raw[t0:t1 + 1]
    d = re.escape(text[:1])
    pat = re.compile(d + re.escape(key.encode()) + d + b"(.*?)" + d, re.IGNORECASE | re.DOTALL)
    m = pat.search(text)
    if not m:
        return raw
    new = text[:m.start(1)] + value.encode() + text[m.end(1):]
    if rng.random() < 0.5 and len(new) != len(text):  # keep offsets valid by padding/trimming the end
        new = (new + b" " * len(text))[:len(text)] if len(new) < len(text) else new
    return raw[:t0] + new + raw[t1 + 1:]


def mutate(raw: bytes, rng: random.Random) -> tuple:
    """One mutation of the file bytes ``raw``: (new bytes, kind)."""
    kind = rng.choice(["header bytes", "header data offsets", "keyword data offsets", "text bytes",
                       "keyword value", "keyword case", "remove keyword", "truncate", "append",
                       "text offsets", "data bytes"])
    b = bytearray(raw)
    bounds = _text_bounds(raw)
    if kind == "header bytes":
        for _ in range(rng.randint(1, 4)):
            b[rng.randrange(min(58, len(b)))] = rng.choice([0x20, 0x30, 0x39, rng.randrange(256)])
    elif kind == "header data offsets" and len(b) >= 58:
        field = rng.choice([26, 34])
        try:
            value = int(b[field:field + 8]) + rng.choice([-10, -4, -3, -2, -1, 1, 2, 3, 10, -10 ** 6, 10 ** 6])
        except ValueError:
            value = rng.randrange(10 ** 8)
        b[field:field + 8] = f"{max(0, value) % 10 ** 8:>8d}".encode()
    elif kind == "keyword data offsets":
        key = rng.choice(["$BEGINDATA", "$ENDDATA"])
        bounds2 = _text_bounds(raw)
        if bounds2:
            m = re.search(rb"(?i)" + re.escape(key.encode()) + rb".(\s*\d+)", raw[bounds2[0]:bounds2[1] + 1])
            if m:
                old = int(m.group(1))
                new = f"{max(0, old + rng.choice([-3, -1, 1, 3])):>{len(m.group(1))}d}"[-len(m.group(1)):]
                return _set_keyword(raw, key, new, rng), kind
    elif kind == "text bytes" and bounds:
        for _ in range(rng.randint(1, 6)):
            b[rng.randint(*bounds)] = rng.choice([ord("/"), ord("|"), ord("$"), 0, 0xFF, rng.randrange(256)])
    elif kind == "keyword value":
        key = rng.choice(KEYWORDS)
        return _set_keyword(raw, key, rng.choice(HOSTILE_VALUES), rng), f"{kind} {key}"
    elif kind == "keyword case" and bounds:
        t0, t1 = bounds
        seg = bytes(b[t0:t1 + 1])
        b[t0:t1 + 1] = seg.lower() if rng.random() < 0.5 else seg.swapcase()
    elif kind == "remove keyword":
        return _set_keyword(raw, rng.choice(KEYWORDS), "", rng), kind
    elif kind == "truncate":
        return bytes(b[:rng.randrange(len(b) + 1)]), kind
    elif kind == "append":
        return bytes(b) + bytes(rng.randrange(256) for _ in range(rng.randint(1, 64))), kind
    elif kind == "text offsets" and len(b) >= 58:
        field = rng.choice([10, 18])
        b[field:field + 8] = f"{rng.choice([0, 1, 57, 58, 59, rng.randrange(len(b) + 100)]):>8d}".encode()
    elif kind == "data bytes" and len(b) > 100:
        for _ in range(rng.randint(1, 16)):
            b[rng.randrange(len(b) // 2, len(b))] = rng.randrange(256)
    return bytes(b), kind


class _Timeout(Exception):
    pass


def _alarm(signum, frame):
    raise _Timeout()


def classify(path: str, reference=None, kind: str = "", limit: float = 5.0) -> tuple:
    """Read ``path``; return (outcome, seconds, detail) as described in the module docstring."""
    from core.errors import FcsFileError
    from core.fcs import read_fcs

    use_alarm = hasattr(signal, "SIGALRM")
    if use_alarm:
        old = signal.signal(signal.SIGALRM, _alarm)
        signal.setitimer(signal.ITIMER_REAL, limit)
    t0 = time.perf_counter()
    try:
        ef = read_fcs(path)
        outcome, detail = "read", ""
        if (kind in OFFSET_KINDS and reference is not None and ef.data.shape == reference.shape
                and not np.array_equal(ef.data, reference, equal_nan=True)):
            outcome, detail = "shift", "values differ after an offset change"
        elif (kind == "keyword value $TOT" and reference is not None
              and ef.data.shape[0] != reference.shape[0]):
            outcome, detail = "shift", f"{ef.data.shape[0]} events read instead of {reference.shape[0]}"
    except _Timeout:
        outcome, detail = "hang", f"longer than {limit} s"
    except FcsFileError as exc:
        named = os.path.basename(path) in str(exc)
        outcome = "error" if named and "internal error" not in str(exc) else "foreign"
        detail = str(exc)[:200]
    except Exception as exc:  # the fuzz counts these
        outcome, detail = "foreign", f"{type(exc).__name__}: {exc}"[:200]
    finally:
        if use_alarm:
            signal.setitimer(signal.ITIMER_REAL, 0)
            signal.signal(signal.SIGALRM, old)
    return outcome, time.perf_counter() - t0, detail


def run_cases(n_cases: int, seed: int, scratch: str, limit: float = 5.0, max_seed_bytes: int | None = None,
              on_case=None) -> dict:
    """Mutate and read ``n_cases`` files (seeded); return counts per outcome and the slowest read."""
    from core.errors import FcsFileError
    from core.fcs import read_fcs

    rng = random.Random(seed)
    seeds = [p for p in seed_files() if max_seed_bytes is None or os.path.getsize(p) <= max_seed_bytes]
    raws, refs, described = [], [], []
    for p in seeds:
        with open(p, "rb") as fh:
            raws.append(fh.read())
        try:
            ef = read_fcs(p)
            refs.append(ef.data)
            # seeds are named by what they are (some file names carry makers' names)
            described.append(f"{ef.version} {ef.keywords.get('$DATATYPE', '?')} "
                             f"{ef.n_events}x{ef.n_channels}")
        except FcsFileError:
            refs.append(None)
            described.append(f"unreadable seed of {len(raws[-1])} bytes")
    counts = {"read": 0, "error": 0, "foreign": 0, "hang": 0, "shift": 0}
    examples: dict = {}
    slowest = 0.0
    os.makedirs(scratch, exist_ok=True)
    for case in range(n_cases):
        k = case % len(raws)
        data, kind = mutate(raws[k], rng)
        path = os.path.join(scratch, f"case {case % 50}.fcs")
        with open(path, "wb") as fh:
            fh.write(data)
        outcome, seconds, detail = classify(path, refs[k], kind, limit)
        counts[outcome] += 1
        slowest = max(slowest, seconds)
        if outcome not in ("read", "error"):
            examples.setdefault(outcome, []).append((described[k], kind, detail))
        if on_case is not None:
            on_case(case, outcome)
    return {"counts": counts, "slowest": slowest, "examples": examples, "n_seeds": len(seeds)}
