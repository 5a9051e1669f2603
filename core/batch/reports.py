"""The batch's reports in OUT_DIR: ``summary.csv``, ``populations.csv``,
``population_changes.csv`` and ``README.txt``, and the summary row's entries.

Tables are written whole and atomically (replacing the previous run's).
Imports only the standard library and small core modules.
"""

from __future__ import annotations

import csv
import io
import json
import os
import time
from typing import Any

from .. import RESEARCH_USE_NOTE, SOFTWARE_NAME, __version__
from ..atomic import atomic_write
from .layout import POPULATION_CHANGES_NAME, POPULATIONS_NAME, README_NAME

#: Events set aside by cleaning, one column per reason (core.prepare.REASONS), and the atoms check.
CLEANING_COLUMNS = ["set_aside_saturated", "set_aside_ceiling_pile", "set_aside_floor_pile",
                    "set_aside_non_finite", "atoms"]
BASE_COLUMNS = ["file", "events", "events_kept"] + CLEANING_COLUMNS + ["rare_events", "rare_percent"]
TAIL_COLUMNS = ["heldout_loglik", "seconds", "status", "message"]
#: summary.csv columns of a batch with a control (see :func:`enriched_summary`).
ENRICHED_COLUMNS = ["enriched", "enriched_percent", "enriched_ci_low_percent", "enriched_ci_high_percent",
                    "expected_false", "false_discovery_rate", "min_fold", "shift_warning"]
POPULATION_COLUMNS = ["file", "population", "profile", "count", "share_percent", "share_low_percent",
                      "share_high_percent", "rare", "caution", "matched"]
CHANGE_COLUMNS = ["file", "control", "population", "profile", "control_count", "control_percent",
                  "test_count", "test_percent", "fold", "fold_low", "fold_high", "p", "q", "change"]


def analysis_summary(an: Any) -> dict:
    """The summary row's entries of an :class:`core.analysis.Analysis` (counts, cleaning, regions, fit)."""
    row = {"events": an.n_events, "events_kept": an.n_kept, "rare_events": an.n_rare,
           "rare_percent": round(100.0 * an.n_rare / an.n_kept, 4) if an.n_kept else 0.0,
           "heldout_loglik": round(an.heldout_loglik, 6)}
    for reason, count in an.set_aside.items():
        row["set_aside_" + reason.replace(" ", "_").replace("-", "_")] = count
    row["atoms"] = "; ".join(f"{c} {100 * v:.3g} %" for c, v in an.atoms.items())
    for name, mask in an.region_masks.items():
        row[f"region:{name}"] = int(mask.sum())
    if an.contrast is not None:
        row.update(enriched_summary(an.contrast))
    return row


def enriched_summary(res: Any) -> dict:
    """The summary row's comparison entries from a :class:`core.contrast.ContrastResult`."""
    return {"enriched": res.count, "enriched_percent": round(100.0 * res.share, 4),
            "enriched_ci_low_percent": round(100.0 * res.share_ci[0], 4),
            "enriched_ci_high_percent": round(100.0 * res.share_ci[1], 4),
            "expected_false": round(res.expected_false, 2), "false_discovery_rate": res.rate,
            "min_fold": res.min_fold, "shift_warning": res.shift.text if res.shift is not None else ""}


def population_rows(an: Any) -> dict:
    """The row's ``populations`` (and, with a control, ``population_changes``) lists and
    ``rare_populations`` count, for :func:`write_population_tables`; empty without populations."""
    pops = getattr(an, "populations", None)
    if pops is None:
        return {}
    matched = "yes" if pops.info.get("matched") else "no"
    out: dict = {"populations": [
        {"population": r["id"] + 1, "profile": r["profile"], "count": r["count"],
         "share_percent": round(100 * r["share"], 4), "share_low_percent": round(100 * r["share_low"], 4),
         "share_high_percent": round(100 * r["share_high"], 4), "rare": "yes" if r["rare"] else "",
         "caution": "few events" if r["caution"] else "", "matched": matched} for r in pops.table]}
    out["rare_populations"] = sum(1 for r in pops.table if r["rare"])
    if getattr(an, "population_changes", None):
        out["population_changes"] = [
            {"population": c["id"] + 1, "profile": c.get("profile", ""), "control_count": c["control_count"],
             "control_percent": round(100 * c["control_share"], 4), "test_count": c["test_count"],
             "test_percent": round(100 * c["test_share"], 4), "fold": round(c["fold"], 4),
             "fold_low": round(c["fold_low"], 4), "fold_high": round(c["fold_high"], 4),
             "p": float(f"{c['p']:.4g}"), "q": float(f"{c['q']:.4g}"), "change": c["change"]}
            for c in an.population_changes]
    return out


def summary_columns(rows: list, recipe: Any, control: bool) -> list[str]:
    """summary.csv's columns: the fixed ones, one per region, the comparison's with a control."""
    regions = [f"region:{r.name}" for r in recipe.regions]
    extra = [k for row in rows for k in row if k.startswith("region:") and k not in regions]
    cols = BASE_COLUMNS + ["rare_populations"] + regions + sorted(set(extra))
    if control:
        cols += ENRICHED_COLUMNS
    return cols + TAIL_COLUMNS


def write_summary(path: str, rows: list, columns: list[str]) -> None:
    """``summary.csv`` (atomic, replaces the previous one)."""
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=columns, extrasaction="ignore", lineterminator="\n")
    w.writeheader()
    for row in rows:
        w.writerow({c: row.get(c, "") for c in columns})
    with atomic_write(path, "w", overwrite=True, encoding="utf-8") as fh:
        fh.write(buf.getvalue())


def write_population_tables(out_dir: str, rows: list, control: str | None) -> list[str]:
    """``populations.csv`` (one row per file and population) and, with a control,
    ``population_changes.csv`` (one row per file and control population); atomic."""
    written = []
    tables = [(POPULATIONS_NAME, POPULATION_COLUMNS, "populations", {})]
    if control:
        tables.append((POPULATION_CHANGES_NAME, CHANGE_COLUMNS, "population_changes",
                       {"control": os.path.basename(control)}))
    for name, columns, key, fixed in tables:
        lines = [dict(r, file=row["file"], **fixed) for row in rows for r in (row.get(key) or [])]
        path = os.path.join(out_dir, name)
        write_summary(path, lines, columns)
        written.append(path)
    return written


def write_readme(out_dir: str, recipe: Any, digest: str, recipe_source: str, control: str | None) -> None:
    """``README.txt``: the research-use caution, what each output holds, and the recipe used."""
    text = f"""{SOFTWARE_NAME} {__version__} batch output

{RESEARCH_USE_NOTE}

Recipe: recipe.json (digest {digest}; source: {recipe_source})
Control file: {control or "none"}
Written: {time.strftime("%Y-%m-%d %H:%M:%S %Z")}

File names: letters, digits, '-', '_', '.' and '+' are kept, white space
becomes '_', '%' becomes 'pct', any other character '-'; a name where a
character was replaced or dropped, that is too long, or that would equal
another ignoring case gets '_' and 8 hex digits of its original.

summary.csv     one row per input file: events, events kept after cleaning,
                events set aside per reason (saturated, ceiling pile, floor
                pile, non-finite), atoms (density channels where one value
                still holds more than 0.1 % of the kept events), rare events and their percentage of kept events, events in
                each region, with a control the enriched (new) events:
                count, percent of kept events with its 95 % interval, the
                expected number of false discoveries, the false discovery
                rate, the minimum fold and the whole-sample shift warning
                (empty when none); held-out
                log-likelihood of the density fit (nats per event), seconds,
                status (ok / error / cancelled) and the reason of an error.
populations.csv one row per input file and population (modes of the fitted
                density): profile, count, share with its 95 % interval, rare
                (share below the recipe's rare_share), caution (few events),
                matched (counted with the recipe's stored populations).
population_changes.csv  with a control: one row per file and population of
                the control, counted in both: shares, fold with its 95 %
                interval, exact test p, Benjamini-Hochberg q, grown/shrunk
                (q at most 5 % and a fold beyond the populations setting
                change_fold, default 1.5, or its inverse).
<stem>/         per input file: '<stem>_rare_population_<number>.fcs' per rare
                population (with a 'population' column), '<stem>_rare.fcs' (the rare events) and
                '<stem>_region_<name>.fcs' per region, with the ORIGINAL raw
                values plus the parameters 'log density', 'rarity percentile'
                and 'cleaning flag' (0 kept, 1 saturated, 2 non-finite,
                3 floor pile, 4 ceiling pile;
                removed events have log density 0 and rarity -1), and
                'done.json' (lets a re-run skip the file).  With a control
                also '<stem>_enriched.fcs' (and '.csv' with --csv): the
                events new against the control, with 'contrast score'
                (log density ratio, nats), 'contrast p' (conformal p-value)
                and 'contrast q' (Benjamini-Hochberg q-value); keywords
                BOSCAGE_CONTROL, BOSCAGE_FDR, BOSCAGE_MIN_FOLD and, when
                raised, BOSCAGE_SHIFT_WARNING.
.prepared-control/  with a control: the control's part densities and
                its events, fitted once for all files; rebuilt when the
                recipe or the control file changes.

Recipe used:
{json.dumps(recipe.to_dict(), indent=2, sort_keys=True)}
"""
    with atomic_write(os.path.join(out_dir, README_NAME), "w", overwrite=True, encoding="utf-8") as fh:
        fh.write(text)
