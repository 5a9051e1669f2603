"""Spillover matrices: read them from FCS keywords or a CSV file, and apply them.

Convention (FCS 3.1, keyword ``$SPILLOVER``): the matrix ``S`` is k x k over
k detectors; row ``i`` holds how much of fluorochrome ``i``'s light each
detector sees, with 1 on the diagonal for the fluorochrome's own detector.
An event's observed detector values (a row vector) are its true single-stain
signals times ``S``:

    observed = true @ S        so        compensated = observed @ inverse(S)

Only the matrix's detectors change; every other channel (scatter, Time,
detectors the matrix does not name) is copied unchanged.  Values keep the
units of the file (instrument units); nothing is rescaled.

Keyword text (FCS 3.1): ``"n,name_1,...,name_n,v_11,v_12,...,v_1n,...,v_nn"``
(row by row).  Older files carry the same text under ``SPILL`` or ``$SPILL``
(common practice).  Names are normally $PnN values; a few writers put the
1-based parameter numbers instead, which are resolved through ``$PnN``.
"""

from __future__ import annotations

import csv
import os
from dataclasses import dataclass, field

import numpy as np

from .atomic import atomic_write
from .errors import CompensationError

#: Keywords that may hold a spillover matrix, in order of preference
#: ($SPILLOVER is FCS 3.1; SPILL and $SPILL are common practice in older files).
SPILLOVER_KEYWORDS = ("$SPILLOVER", "SPILL", "$SPILL")

#: A matrix whose condition number exceeds this cannot be inverted reliably:
#: compensated values would carry relative errors of about cond x 1e-16.
MAX_CONDITION_NUMBER = 1e10


@dataclass
class SpilloverMatrix:
    """A k x k spillover matrix over named detectors.

    ``detectors``: k detector names ($PnN of the channels the matrix applies to).
    ``matrix``: (k, k) float64; row i = spillover of fluorochrome i into each detector.
    ``source``: where it came from (file path or keyword), used in messages.
    """

    detectors: list[str]
    matrix: np.ndarray
    source: str = field(default="", compare=False)

    def __post_init__(self):
        where = f"{self.source}: " if self.source else ""
        self.detectors = [str(d) for d in self.detectors]
        try:
            m = np.array(self.matrix, dtype=np.float64)
        except (TypeError, ValueError) as exc:
            raise CompensationError(f"{where}the spillover matrix holds values that are not numbers ({exc})") from exc
        k = len(self.detectors)
        if k == 0:
            raise CompensationError(f"{where}the spillover matrix names no detectors")
        if m.ndim != 2 or m.shape[0] != m.shape[1]:
            raise CompensationError(
                f"{where}the spillover matrix must be square; it has shape {tuple(m.shape)}")
        if m.shape[0] != k:
            raise CompensationError(
                f"{where}the spillover matrix is {m.shape[0]} x {m.shape[1]} but names {k} detectors")
        if not np.all(np.isfinite(m)):
            bad = np.argwhere(~np.isfinite(m))[0]
            raise CompensationError(
                f"{where}the spillover matrix holds a non-finite value at row "
                f"{self.detectors[bad[0]]!r}, column {self.detectors[bad[1]]!r}")
        seen = set()
        dups = sorted({d for d in self.detectors if d in seen or seen.add(d)})
        if dups:
            raise CompensationError(f"{where}the spillover matrix names a detector twice: {', '.join(dups)}")
        self.matrix = m

    @property
    def n_detectors(self) -> int:
        return len(self.detectors)

    def condition_number(self) -> float:
        """2-norm condition number of the matrix (inf when singular)."""
        return float(np.linalg.cond(self.matrix))


def _lookup(keywords: dict, key: str):
    """Case-insensitive keyword lookup; None when absent."""
    if key in keywords:
        return keywords[key]
    upper = key.upper()
    for k, v in keywords.items():
        if str(k).strip().upper() == upper:
            return v
    return None


def parse_spillover_text(text: str, keywords: dict | None = None, source: str = "") -> SpilloverMatrix:
    """Parse the FCS 3.1 ``$SPILLOVER`` text ``"n,names...,values..."``.

    Names that are whole numbers 1..$PAR are taken as 1-based parameter
    numbers and resolved to $PnN via ``keywords`` when those are given and the
    number is not itself a channel name.
    """
    where = f"{source}: " if source else ""
    tokens = [t.strip() for t in str(text).strip().strip(",").split(",")]
    if not tokens or tokens == [""]:
        raise CompensationError(f"{where}the spillover keyword is empty")
    try:
        k = int(float(tokens[0]))
    except ValueError:
        raise CompensationError(
            f"{where}the spillover keyword must start with the number of detectors; it starts with {tokens[0]!r}"
        ) from None
    if k <= 0:
        raise CompensationError(f"{where}the spillover keyword declares {k} detectors")
    expected = 1 + k + k * k
    if len(tokens) != expected:
        have = max(len(tokens) - 1 - k, 0)
        raise CompensationError(
            f"{where}the spillover keyword declares {k} detectors, so it needs {k} names and "
            f"{k * k} values, but it holds {have} values after the names")
    names = tokens[1:1 + k]
    if keywords is not None:
        pnn = _channel_names_from_keywords(keywords)
        if pnn and not set(names) <= set(pnn) and all(n.isdigit() for n in names):
            idx = [int(n) for n in names]
            if all(1 <= i <= len(pnn) for i in idx):
                names = [pnn[i - 1] for i in idx]
    values = tokens[1 + k:]
    try:
        m = np.array([float(v) for v in values], dtype=np.float64).reshape(k, k)
    except ValueError:
        bad = next(v for v in values if not _is_number(v))
        raise CompensationError(f"{where}the spillover keyword holds a value that is not a number: {bad!r}") from None
    return SpilloverMatrix(names, m, source=source)


def _is_number(text: str) -> bool:
    try:
        float(text)
        return True
    except ValueError:
        return False


def _channel_names_from_keywords(keywords: dict) -> list[str]:
    par = _lookup(keywords, "$PAR")
    try:
        n = int(str(par).strip())
    except (TypeError, ValueError):
        return []
    names = []
    for i in range(1, n + 1):
        v = _lookup(keywords, f"$P{i}N")
        names.append("" if v is None else str(v).strip())
    return names


def spillover_from_keywords(keywords: dict, source: str = "") -> SpilloverMatrix | None:
    """The spillover matrix stored in an FCS file's TEXT keywords, or None when there is none.

    Looks (case-insensitively) for ``$SPILLOVER`` (FCS 3.1), then ``SPILL`` and
    ``$SPILL`` (common practice).  A keyword that is present but malformed
    (for example names without values) raises :class:`CompensationError`
    naming ``source`` (the file) and the problem, so the caller can tell the
    user instead of silently analysing uncompensated data.
    """
    for key in SPILLOVER_KEYWORDS:
        text = _lookup(keywords, key)
        if text is None:
            continue
        if str(text).strip() == "":
            continue
        label = f"{source} ({key})" if source else key
        return parse_spillover_text(str(text), keywords, source=label)
    return None


def write_spillover_csv(path: str | os.PathLike, S: "SpilloverMatrix", overwrite: bool = False) -> str:
    """Write ``S`` as CSV: a header row of detector names after an empty cell,
    then one row per fluorochrome named by its detector (the layout
    :func:`read_spillover_csv` reads back exactly: values as ``repr`` floats).
    Written atomically; an existing file is replaced only with ``overwrite``."""
    path = os.fspath(path)
    with atomic_write(path, "w", overwrite=overwrite, encoding="utf-8") as handle:
        w = csv.writer(handle, lineterminator="\n")
        w.writerow([""] + list(S.detectors))
        for name, row in zip(S.detectors, np.asarray(S.matrix, dtype=np.float64)):
            w.writerow([name] + [repr(float(v)) for v in row])
    return path


def read_spillover_csv(path: str | os.PathLike) -> SpilloverMatrix:
    """Read a spillover matrix from a CSV file.

    Layout: a header row of detector names; then one row per fluorochrome,
    optionally starting with its detector name (then the header's first cell
    may be empty).  Comma, semicolon and tab delimiters are accepted.  When
    row names are given they must be the header's names; rows are reordered to
    the header's order.  A table whose diagonal is all 100 is taken as
    percentages and divided by 100 (common practice in some exports).
    Raises :class:`CompensationError` naming the file for an empty,
    non-square or non-numeric table.
    """
    path = os.fspath(path)
    name = os.path.basename(path)
    try:
        with open(path, "r", encoding="utf-8-sig", newline="") as handle:
            text = handle.read()
    except OSError as exc:
        raise CompensationError(f"{name}: cannot read the spillover file ({exc.strerror or exc}) (file: {path})") from exc
    lines = [ln for ln in text.splitlines() if ln.strip()]
    if not lines:
        raise CompensationError(f"{name}: the spillover file is empty (file: {path})")
    delim = max([",", ";", "\t"], key=lambda d: lines[0].count(d))
    rows = [[c.strip() for c in r] for r in csv.reader(lines, delimiter=delim)]
    header = rows[0]
    body = rows[1:]
    if not body:
        raise CompensationError(f"{name}: the spillover file has a header but no rows of values (file: {path})")
    first_cells = [r[0] for r in body if r]
    has_row_names = header[0] == "" or any(not _is_number(c) for c in first_cells)
    if has_row_names and len(body[0]) == len(header) + 1:
        detectors = header              # row names under no header cell
    elif has_row_names:
        detectors = header[1:]          # a corner cell (empty or a title) above the row names
    else:
        detectors = header
    if any(d == "" for d in detectors):
        raise CompensationError(f"{name}: the header row has an empty detector name (file: {path})")
    k = len(detectors)
    row_names = []
    values = []
    for i, r in enumerate(body, start=2):
        cells = r[1:] if has_row_names else r
        if has_row_names:
            row_names.append(r[0])
        if len(cells) != k:
            raise CompensationError(
                f"{name}: line {i} has {len(cells)} values but the header names {k} detectors; "
                f"a spillover matrix must be square (file: {path})")
        row = []
        for j, c in enumerate(cells):
            if not _is_number(c):
                raise CompensationError(
                    f"{name}: line {i}, column {detectors[j]!r} holds {c!r}, which is not a number (file: {path})")
            row.append(float(c))
        values.append(row)
    if len(values) != k:
        raise CompensationError(
            f"{name}: the header names {k} detectors but there are {len(values)} rows of values; "
            f"a spillover matrix must be square (file: {path})")
    m = np.array(values, dtype=np.float64)
    if has_row_names and row_names != detectors:
        if sorted(row_names) != sorted(detectors):
            raise CompensationError(
                f"{name}: the row names ({', '.join(row_names)}) are not the header's detectors "
                f"({', '.join(detectors)}) (file: {path})")
        order = [row_names.index(d) for d in detectors]
        m = m[order]
    if np.allclose(np.diag(m), 100.0):
        m = m / 100.0   # written in percent (diagonal 100): common practice in some exports
    return SpilloverMatrix(detectors, m, source=path)


def spillover_to_keyword(S: SpilloverMatrix) -> str:
    """The FCS 3.1 ``$SPILLOVER`` value for ``S``: ``"k,names...,values row by row"``.

    Values are written with full float64 precision (``repr``), so parsing the
    text back gives the identical matrix.
    """
    bad = [d for d in S.detectors if "," in d]
    if bad:
        raise CompensationError(
            f"detector name(s) {', '.join(repr(b) for b in bad)} contain a comma, which the "
            "$SPILLOVER keyword cannot hold")
    parts = [str(S.n_detectors), *S.detectors, *(repr(float(v)) for v in S.matrix.ravel())]
    return ",".join(parts)


def match_detectors(channel_names: list[str], S: SpilloverMatrix, source: str = "") -> list[int]:
    """Column index in ``channel_names`` of each of ``S``'s detectors.

    Exact names first; otherwise a unique case-insensitive match.  Raises
    :class:`CompensationError` listing the missing detectors and the file's channels.
    """
    names = [str(c) for c in channel_names]
    folded = {}
    for i, c in enumerate(names):
        folded.setdefault(c.strip().casefold(), []).append(i)
    idx, missing = [], []
    for d in S.detectors:
        if d in names:
            idx.append(names.index(d))
            continue
        hits = folded.get(d.strip().casefold(), [])
        if len(hits) == 1:
            idx.append(hits[0])
        else:
            missing.append(d)
    if missing:
        where = f"{source}: " if source else ""
        raise CompensationError(
            f"{where}the spillover matrix names detector(s) the file lacks: {', '.join(missing)}. "
            f"The file's channels are: {', '.join(names)}")
    if len(set(idx)) != len(idx):
        raise CompensationError(f"{source + ': ' if source else ''}two detectors of the spillover matrix map to the same channel")
    return idx


def checked_detectors(channel_names: list[str], S: SpilloverMatrix, source: str = "") -> list[int]:
    """:func:`match_detectors`, after refusing a singular or ill-conditioned matrix (CompensationError)."""
    idx = match_detectors(channel_names, S, source)
    cond = S.condition_number()
    if not np.isfinite(cond) or cond > MAX_CONDITION_NUMBER:
        raise CompensationError(
            f"{source + ': ' if source else ''}the spillover matrix is singular or nearly so (condition number "
            f"{cond:.3g}); it cannot be inverted reliably. Check the matrix for duplicated or empty rows.")
    return idx


def compensate(data: np.ndarray, channel_names: list[str], S: SpilloverMatrix, source: str = "") -> np.ndarray:
    """Compensated copy of ``data`` (events x channels, any float type), float64.

    On the matrix's detectors, compensated = observed @ inverse(S); other
    channels are copied unchanged.  ``data`` is never modified.  ``source``
    (a file name) is used in error messages.

    Raises :class:`CompensationError` when a detector is missing from
    ``channel_names``, the data do not have one column per channel name, or
    the matrix is singular / too ill-conditioned (condition number above
    :data:`MAX_CONDITION_NUMBER`).
    """
    x = np.asarray(data)
    if x.dtype.kind != "f":
        x = x.astype(np.float64)
    where = f"{source}: " if source else ""
    if x.ndim != 2 or x.shape[1] != len(channel_names):
        raise CompensationError(
            f"{where}event data of shape {x.shape} do not match {len(channel_names)} channel names")
    idx = checked_detectors(channel_names, S, source)
    out = np.array(x, dtype=np.float64)   # the one copy (float32 data become float64 here)
    out[:, idx] = compensate_columns(x, idx, S)
    return out


#: Events per block of the compensation solve (bounds its temporaries).
CHUNK_EVENTS = 1 << 17


def compensate_columns(data: np.ndarray, idx: list[int], S: SpilloverMatrix, out: np.ndarray | None = None
                       ) -> np.ndarray:
    """The compensated detector columns ``idx`` of ``data`` (events x channels, any float type).

    Returns (n_events, len(idx)) float64, or writes into ``out`` (any array
    of that shape, e.g. a column slice of a larger matrix).  observed @ inv(S)
    is computed as solve(S.T, observed.T).T, without forming the inverse, in
    blocks of :data:`CHUNK_EVENTS` events converted to float64 one block at a
    time (no full-size float64 copy of ``data``).  No checks: :func:`compensate`
    and :func:`match_detectors` give ``idx`` and refuse a bad matrix.
    """
    n = data.shape[0]
    if out is None:
        out = np.empty((n, len(idx)))
    for start in range(0, n, CHUNK_EVENTS):
        block = np.asarray(data[start:start + CHUNK_EVENTS][:, idx], dtype=np.float64)
        out[start:start + CHUNK_EVENTS] = np.linalg.solve(S.matrix.T, block.T).T
    return out
