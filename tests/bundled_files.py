"""The FCS files fcsparser ships (its tests/data folder), iterated in place and chosen by
what they are (FCS version, storage, events, channels, keywords), never by file name.

``bundled()`` describes every file fcsparser's own parser reads; ``pick(**props)``
returns the path of the one file with those properties (a test fails loudly when a
future fcsparser ships none or several).
"""

from __future__ import annotations

import functools
import os
import warnings

import fcsparser

DATA = os.path.join(os.path.dirname(fcsparser.__file__), "tests", "data")


@functools.lru_cache(maxsize=1)
def bundled() -> tuple:
    """One dict per file fcsparser parses: path, version, datatype ("I"/"F"/"D"), events,
    channels, log_amplified (some $PnE f1 > 0), spill ($SPILLOVER/SPILL present), names."""
    out = []
    for folder, _, names in sorted(os.walk(DATA)):
        for fname in sorted(names):
            path = os.path.join(folder, fname)
            try:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    meta = fcsparser.parse(path, meta_data_only=True, reformat_meta=False, encoding="latin-1")
            except Exception:  # noqa: BLE001 - not FCS at all (broken on purpose)
                continue
            n = int(meta["$PAR"])
            pne = [str(meta.get(f"$P{i}E", "0,0")) for i in range(1, n + 1)]
            out.append({
                "path": path, "version": _text(meta["__header__"]["FCS format"]),
                "datatype": str(meta["$DATATYPE"]).strip().upper(), "events": int(meta["$TOT"]),
                "channels": n, "names": [str(meta.get(f"$P{i}N", "")).strip() for i in range(1, n + 1)],
                "log_amplified": any(float(e.split(",")[0] or 0) > 0 for e in pne),
                "spill": any(k in meta for k in ("$SPILLOVER", "SPILL", "$SPILL")),
                "size": os.path.getsize(path)})
    return tuple(out)


def _text(v) -> str:
    return (v.decode("ascii", "replace") if isinstance(v, bytes) else str(v)).strip()


def pick(**props) -> str:
    """Path of the one bundled file whose properties equal ``props`` (callables are predicates)."""
    hits = [f for f in bundled()
            if all(v(f[k]) if callable(v) else f[k] == v for k, v in props.items())]
    assert len(hits) == 1, f"{len(hits)} bundled files have {props}: " + \
        ", ".join(f"{h['version']} {h['datatype']} {h['events']} events" for h in hits)
    return hits[0]["path"]
