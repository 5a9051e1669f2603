"""Our own synthetic demo scenario: a few small FCS 3.1 files with known truth.

The scenario is invented for Boscage and reproducible from a seed.  It is not
measured data and stands for no real experiment.

* Panel "Hedgerow ten-colour" on 13 channels: FSC-A, SSC-A, ten fluorescence
  detectors FL1-A ... FL10-A (marker in $PnS: CD45, CD3, CD4, CD8, CD19, CD56,
  CD14, CD16, HLA-DR, CD34) and Time.  Ranges ($PnR) are 262144 (18 bits).
* Four tubes: "Tube A control" and three treated tubes (low, mid, high dose).
  Treatment expands an activated CD8 T-cell subset (HLA-DR+) and brings in a
  rare CD34+ CD45-dim population (0.1 %, 0.25 %, 0.45 % of events); the
  control has none.
* Populations are skewed (log-normal intensities and scatter) and correlated
  (a shared per-event factor couples size and marker brightness; FSC and SSC
  are correlated).  Negative markers carry autofluorescence.
* Each event's per-fluorochrome signal plus detector noise (the *pre-mix*
  values, instrument units) is mixed by the panel's spillover matrix
  (observed = premix @ S, stored in ``$SPILLOVER``), rounded to whole units
  (real files hold a grid of values) and clipped at the range, so a few
  aggregates are saturated (value = $PnR).

Files written by :func:`write_sample_events` (``python -m core.scenario OUT_DIR``):

* ``<folder>/tube_A_control.fcs`` ... ``tube_D_treated_high.fcs`` (FCS 3.1, float32);
* ``<folder>/truth/<file stem>.npz`` (``allow_pickle=False``): ``labels``
  (population name per event, in file order), ``rare`` (bool), ``saturated``
  (bool), ``population_names``, ``seed``, ``file_name``;
* ``<folder>/truth/summary.csv``: events per population and tube;
* ``<folder>/README.md``: what the files are.

Ground truth lives beside the files, never inside them.
"""

from __future__ import annotations

import argparse
import csv
import io
import os
import sys
import zipfile
from dataclasses import dataclass

import numpy as np

from . import RESEARCH_USE_NOTE, SOFTWARE_NAME, __version__
from .atomic import atomic_write
from .compensation import SpilloverMatrix, spillover_to_keyword
from .errors import ExportError

DEFAULT_SEED = 20261201
PANEL_NAME = "Hedgerow ten-colour"
RANGE = 262144.0
#: Acquisition clock: Time counts ticks of this many seconds ($TIMESTEP, FCS 3.1).
TIMESTEP = 0.01

DETECTORS = [f"FL{i}-A" for i in range(1, 11)]
MARKERS = ["CD45", "CD3", "CD4", "CD8", "CD19", "CD56", "CD14", "CD16", "HLA-DR", "CD34"]
CHANNEL_NAMES = ["FSC-A", "SSC-A", *DETECTORS, "Time"]
CHANNEL_LABELS = ["", "", *MARKERS, ""]
N_FLUOR = len(DETECTORS)
RARE_POPULATION = "rare CD34+ CD45dim"


@dataclass(frozen=True)
class TubeSpec:
    """One tube of the scenario."""

    file_stem: str
    name: str
    n_events: int
    rare_share: float        # share of events in the rare population
    activated_share: float   # share of events in the activated CD8 subset
    duration_s: float        # acquisition time


TUBES = (
    TubeSpec("tube_A_control", "Tube A control", 30000, 0.0, 0.010, 90.0),
    TubeSpec("tube_B_treated_low", "Tube B treated (low dose)", 30000, 0.0010, 0.030, 95.0),
    TubeSpec("tube_C_treated_mid", "Tube C treated (mid dose)", 35000, 0.0025, 0.060, 100.0),
    TubeSpec("tube_D_treated_high", "Tube D treated (high dose)", 40000, 0.0045, 0.090, 110.0),
)

# Populations: share (of what is left after the rare and activated subsets),
# FSC and SSC (median, coefficient of variation), FSC-SSC correlation,
# autofluorescence (log10 median), positive markers {marker: (log10 median, sd)}.
_POPULATIONS = (
    ("debris", 0.040, (12000, 0.55), (7000, 0.60), 0.5, 1.5, {}),
    ("T CD4", 0.250, (62000, 0.12), (16000, 0.22), 0.4, 1.7,
     {"CD45": (3.90, 0.12), "CD3": (3.55, 0.15), "CD4": (3.40, 0.15)}),
    ("T CD8", 0.120, (60000, 0.12), (15000, 0.22), 0.4, 1.7,
     {"CD45": (3.90, 0.12), "CD3": (3.60, 0.15), "CD8": (3.75, 0.18)}),
    ("B", 0.080, (58000, 0.12), (14000, 0.22), 0.4, 1.7,
     {"CD45": (3.80, 0.12), "CD19": (3.45, 0.15), "HLA-DR": (3.70, 0.18)}),
    ("NK", 0.060, (64000, 0.13), (21000, 0.25), 0.4, 1.7,
     {"CD45": (3.80, 0.12), "CD56": (3.25, 0.22), "CD16": (3.55, 0.25)}),
    ("monocytes", 0.100, (100000, 0.14), (52000, 0.25), 0.5, 2.0,
     {"CD45": (4.10, 0.12), "CD14": (3.90, 0.20), "HLA-DR": (3.55, 0.20), "CD4": (2.75, 0.15)}),
    ("granulocytes", 0.3493, (120000, 0.15), (130000, 0.20), 0.55, 2.2,
     {"CD45": (3.40, 0.12), "CD16": (4.00, 0.18)}),
    ("aggregates", 0.0007, (300000, 0.10), (190000, 0.25), 0.6, 2.2,
     {"CD45": (4.20, 0.15), "CD3": (3.40, 0.25), "CD14": (3.50, 0.25)}),
)
_ACTIVATED = ("T CD8 activated", (70000, 0.13), (18000, 0.22), 0.4, 1.8,
              {"CD45": (3.90, 0.12), "CD3": (3.50, 0.15), "CD8": (3.85, 0.18), "HLA-DR": (3.25, 0.20)})
_RARE = (RARE_POPULATION, (52000, 0.12), (11000, 0.25), 0.3, 1.8,
         {"CD45": (2.70, 0.12), "CD34": (3.45, 0.18), "HLA-DR": (3.30, 0.20)})

POPULATION_NAMES = tuple([p[0] for p in _POPULATIONS] + [_ACTIVATED[0], _RARE[0]])

# Autofluorescence falls off towards the red detectors (common practice).
_AF_WEIGHT = np.linspace(1.0, 0.25, N_FLUOR)
# Detector noise: photon statistics (variance = signal x gain) and electronic noise (sd).
_PHOTON_GAIN = 2.0
_ELECTRONIC_SD = 35.0
# Correlation of each marker and of FSC with the shared per-event factor.
_SHARED_RHO = 0.5


def spillover_matrix() -> SpilloverMatrix:
    """The invented spillover matrix of the panel (10 x 10, 1 on the diagonal).

    Each fluorochrome spills mostly into the next detector and a little into
    the one after and the one before, with a few longer-range entries.
    """
    k = N_FLUOR
    m = np.eye(k)
    for i in range(k):
        if i + 1 < k:
            m[i, i + 1] = 0.12 + 0.02 * (i % 4)
        if i + 2 < k:
            m[i, i + 2] = 0.02 + 0.005 * (i % 3)
        if i - 1 >= 0:
            m[i, i - 1] = 0.015 + 0.005 * (i % 2)
    m[3, 8] = 0.06   # CD8's fluorochrome seen in the HLA-DR detector
    m[1, 6] = 0.03
    m[8, 2] = 0.025
    return SpilloverMatrix(list(DETECTORS), m, source=f"{PANEL_NAME} panel")


@dataclass
class ScenarioTube:
    """One generated tube: what goes in the file, and the truth beside it.

    ``data``: (n_events, 13) float64 as stored (mixed, whole units, clipped at the range).
    ``premix``: (n_events, 10) float64 per-fluorochrome values before spillover
    (instrument units); ``compensate(data)`` gives these back up to rounding,
    except on clipped events.
    ``labels``: (n_events,) population names; ``rare`` and ``saturated``: bool masks.
    """

    spec: TubeSpec
    data: np.ndarray
    premix: np.ndarray
    labels: np.ndarray
    rare: np.ndarray
    saturated: np.ndarray
    spillover: SpilloverMatrix
    seed: int

    @property
    def file_name(self) -> str:
        return self.spec.file_stem + ".fcs"

    @property
    def channel_names(self) -> list[str]:
        return list(CHANNEL_NAMES)

    @property
    def channel_labels(self) -> list[str]:
        return list(CHANNEL_LABELS)

    @property
    def channel_ranges(self) -> np.ndarray:
        return np.full(len(CHANNEL_NAMES), RANGE)

    def keywords(self) -> dict[str, str]:
        """TEXT keywords for the file (structural and $Pn keywords are the writer's)."""
        return {
            "$FIL": self.file_name,
            "$SRC": self.spec.name,
            "$CYT": f"{SOFTWARE_NAME} scenario generator (synthetic data)",
            "$DATE": "01-DEC-2026",
            "$TIMESTEP": repr(TIMESTEP),
            "$SPILLOVER": spillover_to_keyword(self.spillover),
            "BOSCAGE_PANEL": PANEL_NAME,
            "BOSCAGE_TUBE": self.spec.name,
            "BOSCAGE_SCENARIO_SEED": str(self.seed),
            "BOSCAGE_VERSION": __version__,
            "BOSCAGE_NOTE": "Synthetic events from core.scenario, not measured data. " + RESEARCH_USE_NOTE,
        }


def _counts(spec: TubeSpec, rng: np.random.Generator) -> dict[str, int]:
    """Events per population: a multinomial draw around the tube's shares."""
    base = np.array([p[1] for p in _POPULATIONS])
    rest = 1.0 - spec.rare_share - spec.activated_share
    shares = np.concatenate([base / base.sum() * rest, [spec.activated_share, spec.rare_share]])
    n = rng.multinomial(spec.n_events, shares / shares.sum())
    return dict(zip(POPULATION_NAMES, (int(c) for c in n)))


def _population(rng, n, fsc, ssc, rho_fs, af_log10, markers):
    """Scatter (n, 2) and pre-mix fluorescence (n, 10) of one population."""
    shared = rng.standard_normal(n)
    z_f = _SHARED_RHO * shared + np.sqrt(1 - _SHARED_RHO ** 2) * rng.standard_normal(n)
    z_s = rho_fs * z_f + np.sqrt(1 - rho_fs ** 2) * rng.standard_normal(n)
    # log-normal scatter with the given median and coefficient of variation (skewed)
    fsc_v = fsc[0] * np.exp(fsc[1] * z_f)
    ssc_v = ssc[0] * np.exp(ssc[1] * z_s)
    af = 10.0 ** (af_log10 + 0.15 * rng.standard_normal(n))
    signal = af[:, None] * _AF_WEIGHT[None, :]
    for marker, (mu, sd) in markers.items():
        j = MARKERS.index(marker)
        z = _SHARED_RHO * shared + np.sqrt(1 - _SHARED_RHO ** 2) * rng.standard_normal(n)
        signal[:, j] += 10.0 ** (mu + sd * z)
    noise_sd = np.sqrt(_PHOTON_GAIN * signal + _ELECTRONIC_SD ** 2)
    premix = signal + noise_sd * rng.standard_normal(signal.shape)
    return np.column_stack([fsc_v, ssc_v]), premix


def generate_tube(spec: TubeSpec | int | str, seed: int = DEFAULT_SEED) -> ScenarioTube:
    """Generate one tube (by :class:`TubeSpec`, index in :data:`TUBES` or file stem).

    Deterministic: the same ``seed`` and tube give identical arrays.  Each tube
    draws from its own stream (``seed`` and the tube's index), so tubes do not
    depend on each other.
    """
    if isinstance(spec, int):
        spec = TUBES[spec]
    elif isinstance(spec, str):
        matches = [t for t in TUBES if t.file_stem == spec or t.name == spec]
        if not matches:
            raise KeyError(f"no tube {spec!r} in the scenario; tubes: {', '.join(t.file_stem for t in TUBES)}")
        spec = matches[0]
    index = [t.file_stem for t in TUBES].index(spec.file_stem) if spec in TUBES else len(TUBES)
    rng = np.random.default_rng([int(seed), index])
    counts = _counts(spec, rng)
    scat, fluo, labels = [], [], []
    table = {p[0]: p[2:] for p in (*_POPULATIONS, (_ACTIVATED[0], 0.0, *_ACTIVATED[1:]),
                                   (_RARE[0], 0.0, *_RARE[1:]))}
    for name in POPULATION_NAMES:
        n = counts[name]
        if n == 0:
            continue
        s, f = _population(rng, n, *table[name])
        scat.append(s)
        fluo.append(f)
        labels.append(np.full(n, name))
    scat = np.vstack(scat)
    premix = np.vstack(fluo)
    labels = np.concatenate(labels)
    order = rng.permutation(spec.n_events)           # acquisition order mixes the populations
    scat, premix, labels = scat[order], premix[order], labels[order]
    S = spillover_matrix()
    observed = premix @ S.matrix
    ticks = np.sort(rng.uniform(0.0, spec.duration_s / TIMESTEP, spec.n_events))
    data = np.column_stack([scat, observed, ticks])
    data = np.rint(data)                              # instruments store a grid of whole units
    saturated = np.any(data >= RANGE, axis=1)
    data = np.minimum(data, RANGE)                    # a detector cannot report beyond its range
    return ScenarioTube(spec=spec, data=data, premix=premix, labels=labels.astype("<U24"),
                        rare=labels == RARE_POPULATION, saturated=saturated, spillover=S, seed=int(seed))


def _truth_paths(folder: str, stem: str) -> str:
    return os.path.join(folder, "truth", stem + ".npz")


def _npz_bytes(arrays: dict) -> bytes:
    """A compressed ``.npz`` (readable with ``numpy.load(allow_pickle=False)``) with fixed
    zip timestamps, so the same arrays always give the same bytes."""
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", compression=zipfile.ZIP_DEFLATED) as zf:
        for key, arr in arrays.items():
            info = zipfile.ZipInfo(key + ".npy", date_time=(2026, 12, 1, 0, 0, 0))
            info.compress_type = zipfile.ZIP_DEFLATED
            with zf.open(info, "w") as handle:
                np.lib.format.write_array(handle, np.asanyarray(arr), allow_pickle=False)
    return buf.getvalue()


def _readme(seed: int) -> str:
    lines = [
        f"# {SOFTWARE_NAME} demo events: the {PANEL_NAME} scenario",
        "",
        "Synthetic events written by `core/scenario.py` (`python -m core.scenario OUT_DIR`,",
        f"seed {seed}). They are invented for demonstration and testing; they are not",
        "measured data and stand for no real experiment.",
        "",
        f"{RESEARCH_USE_NOTE}",
        "",
        "Channels: " + ", ".join(f"{n} ({m})" if m else n for n, m in zip(CHANNEL_NAMES, CHANNEL_LABELS)) + ".",
        "Values are mixed by the spillover matrix stored in `$SPILLOVER`, stored in whole",
        f"units and clipped at the range ({RANGE:g}); a few aggregates are saturated.",
        "",
        "| file | tube | events | rare population |",
        "|---|---|---|---|",
    ]
    for t in TUBES:
        lines.append(f"| {t.file_stem}.fcs | {t.name} | {t.n_events} | "
                     + (f"about {100 * t.rare_share:.2f} %" if t.rare_share else "none") + " |")
    lines += ["", "Ground truth (population of every event, rare and saturated flags) is in",
              "`truth/<file>.npz` (`numpy.load(path, allow_pickle=False)`); counts per population",
              "are in `truth/summary.csv`. The FCS files themselves carry no labels.", ""]
    return "\n".join(lines)


def write_sample_events(folder: str | os.PathLike, seed: int = DEFAULT_SEED, overwrite: bool = False) -> list[str]:
    """Write the scenario's FCS 3.1 files and their truth into ``folder``.

    Returns the paths written (FCS files first).  Refuses (:class:`ExportError`)
    before writing anything when a target exists and ``overwrite`` is False.
    """
    from .fcs import write_fcs   # imported here: core.fcs is only needed for writing

    folder = os.fspath(folder)
    truth_dir = os.path.join(folder, "truth")
    targets = [os.path.join(folder, t.file_stem + ".fcs") for t in TUBES]
    targets += [_truth_paths(folder, t.file_stem) for t in TUBES]
    targets += [os.path.join(truth_dir, "summary.csv"), os.path.join(folder, "README.md")]
    if not overwrite:
        existing = [p for p in targets if os.path.exists(p)]
        if existing:
            raise ExportError(f"{existing[0]}: a file of that name exists already ({len(existing)} of the "
                              f"scenario's files are present); pass overwrite=True to replace them")
    os.makedirs(truth_dir, exist_ok=True)
    written_fcs, written_truth = [], []
    summary = []
    for spec in TUBES:
        tube = generate_tube(spec, seed)
        path = os.path.join(folder, tube.file_name)
        write_fcs(path, tube.data, tube.channel_names, keywords=tube.keywords(),
                  channel_labels=tube.channel_labels, channel_ranges=tube.channel_ranges, overwrite=overwrite)
        written_fcs.append(path)
        tpath = _truth_paths(folder, spec.file_stem)
        arrays = {"labels": tube.labels, "rare": tube.rare, "saturated": tube.saturated,
                  "population_names": np.array(POPULATION_NAMES, dtype="<U24"),
                  "seed": np.int64(seed), "file_name": np.array(tube.file_name)}
        with atomic_write(tpath, "wb", overwrite=overwrite) as handle:
            handle.write(_npz_bytes(arrays))
        written_truth.append(tpath)
        for name in POPULATION_NAMES:
            c = int(np.count_nonzero(tube.labels == name))
            summary.append([tube.file_name, spec.name, spec.n_events, name, c, f"{c / spec.n_events:.5f}",
                            int(np.count_nonzero(tube.saturated & (tube.labels == name)))])
    spath = os.path.join(truth_dir, "summary.csv")
    with atomic_write(spath, "w", overwrite=overwrite, encoding="utf-8") as handle:
        w = csv.writer(handle, lineterminator="\n")
        w.writerow(["file", "tube", "events", "population", "count", "share", "saturated"])
        w.writerows(summary)
    rpath = os.path.join(folder, "README.md")
    with atomic_write(rpath, "w", overwrite=overwrite, encoding="utf-8") as handle:
        handle.write(_readme(seed))
    return written_fcs + written_truth + [spath, rpath]


def load_truth(folder: str | os.PathLike, file_stem: str) -> dict[str, np.ndarray]:
    """The truth arrays of one scenario file (``labels``, ``rare``, ``saturated``, ...)."""
    with np.load(_truth_paths(os.fspath(folder), file_stem), allow_pickle=False) as z:
        return {k: z[k] for k in z.files}


def main(argv: list[str] | None = None) -> int:
    """``python -m core.scenario OUT_DIR [--seed N] [--overwrite]``."""
    parser = argparse.ArgumentParser(prog="python -m core.scenario",
                                     description="Write Boscage's synthetic demo FCS files and their truth.")
    parser.add_argument("out_dir")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED)
    parser.add_argument("--overwrite", action="store_true")
    args = parser.parse_args(argv)
    os.makedirs(args.out_dir, exist_ok=True)
    try:
        paths = write_sample_events(args.out_dir, seed=args.seed, overwrite=args.overwrite)
    except ExportError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 1
    total = sum(os.path.getsize(p) for p in paths)
    for p in paths:
        print(f"{os.path.getsize(p):>10,d}  {p}")
    print(f"{total:>10,d}  bytes in total")
    return 0


if __name__ == "__main__":
    sys.exit(main())
