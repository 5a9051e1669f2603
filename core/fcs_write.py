"""Writing FCS 3.1 files: :func:`write_fcs` (HEADER, TEXT and float32 DATA; see :mod:`core.fcs`)."""

from __future__ import annotations

import math
import os
from typing import Iterable, Mapping, Sequence

import numpy as np

from . import __version__
from .atomic import atomic_write
from .errors import ChannelError, EventDataError, ExportError
from .fcs_text import _PARAM_KEY, HEADER_LENGTH, MAX_HEADER_OFFSET

# Keywords the writer computes itself; any copy in `keywords` is ignored.
_STRUCTURAL_KEYS = frozenset({
    "$BEGINANALYSIS", "$ENDANALYSIS", "$BEGINDATA", "$ENDDATA", "$BEGINSTEXT",
    "$ENDSTEXT", "$BYTEORD", "$DATATYPE", "$MODE", "$NEXTDATA", "$PAR", "$TOT",
})
# Delimiters the writer may use, in order of preference (any byte 1-126 is allowed by FCS 3.1).
_DELIMITER_CHOICES = ("/", "|", "\\", "!", "~", "^", "\x0c")


def header_offset_fields(text_start: int, text_end: int, data_start: int, data_end: int,
                         analysis_start: int = 0, analysis_end: int = 0) -> list:
    """The six HEADER offsets as FCS 3.1 writes them.

    A segment whose end lies beyond 99,999,999 bytes cannot be written in the
    8-byte HEADER fields: both its fields become 0 and readers take the true
    offsets from the TEXT keywords ($BEGINDATA/$ENDDATA, ...), FCS 3.1 section 3.1.
    """
    out = []
    for start, end in ((text_start, text_end), (data_start, data_end),
                       (analysis_start, analysis_end)):
        if end > MAX_HEADER_OFFSET or start > MAX_HEADER_OFFSET:
            out += [0, 0]
        else:
            out += [int(start), int(end)]
    return out


def _format_number(x: float) -> str:
    """Shortest text that reads back as the same float64 (integers without '.0')."""
    x = float(x)
    if x.is_integer() and abs(x) < 1e15:
        return str(int(x))
    return repr(x)


def _choose_delimiter(items: Iterable[str]) -> str:
    """A delimiter that starts no key or value (so doubling stays unambiguous for every reader)."""
    items = list(items)
    for d in _DELIMITER_CHOICES:
        if not any(s.startswith(d) for s in items):
            return d
    raise ExportError("no usable TEXT delimiter: every candidate begins some keyword value")


def _text_segment(pairs: Sequence[tuple], delimiter: str) -> bytes:
    """FCS TEXT: delimiter, then key/value pairs each followed by the delimiter;
    a delimiter inside a key or value is doubled (FCS 3.1 section 3.2.x)."""
    esc = delimiter * 2
    body = delimiter + "".join(f"{k.replace(delimiter, esc)}{delimiter}"
                               f"{v.replace(delimiter, esc)}{delimiter}" for k, v in pairs)
    return body.encode("utf-8")


def _assemble(pairs: list, n_bytes: int) -> bytes:
    """HEADER + TEXT for a DATA segment of ``n_bytes`` bytes that follows them directly.

    The offsets are self-consistent: the TEXT length depends on the digits of
    $BEGINDATA/$ENDDATA, so the layout is repeated until it no longer changes.
    """
    delimiter = _choose_delimiter([k for k, _ in pairs] + [v for _, v in pairs])
    text_start = HEADER_LENGTH
    offsets = {"$BEGINDATA": 0, "$ENDDATA": 0}
    for _ in range(10):
        full = [("$BEGINANALYSIS", "0"), ("$ENDANALYSIS", "0"),
                ("$BEGINSTEXT", "0"), ("$ENDSTEXT", "0"),
                ("$BEGINDATA", str(offsets["$BEGINDATA"])),
                ("$ENDDATA", str(offsets["$ENDDATA"]))] + pairs
        text = _text_segment(full, delimiter)
        text_end = text_start + len(text) - 1
        begin = text_end + 1 if n_bytes else 0
        end = begin + n_bytes - 1 if n_bytes else 0
        if (begin, end) == (offsets["$BEGINDATA"], offsets["$ENDDATA"]):
            break
        offsets = {"$BEGINDATA": begin, "$ENDDATA": end}
    else:  # pragma: no cover - the lengths converge in two or three rounds
        raise ExportError("cannot lay out the FCS segments")
    if text_end > MAX_HEADER_OFFSET:
        raise ExportError("the TEXT segment is too large for an FCS HEADER")
    fields = header_offset_fields(text_start, text_end, begin, end)
    header = "FCS3.1    " + "".join(f"{v:>8d}" for v in fields)
    assert len(header) == HEADER_LENGTH
    return header.encode("ascii") + text


def write_fcs(path: str | os.PathLike, data, channel_names: Sequence[str],
              keywords: Mapping[str, object] | None = None,
              channel_labels: Sequence[str] | None = None,
              channel_ranges: Sequence[float] | None = None,
              overwrite: bool = False) -> str:
    """Write events to an FCS 3.1 file (list mode, float32, little-endian).

    Parameters
    ----------
    path : output file; written atomically, refused if it exists unless ``overwrite``.
    data : array (n_events, n_channels) of finite values (stored as float32).
    channel_names : ``$PnN`` per channel: non-empty, unique, without commas (FCS 3.1).
    keywords : extra TEXT keywords (e.g. ``$SPILLOVER``, ``BOSCAGE_SOURCE``).  Keys
        the writer sets itself (segment offsets, ``$PAR``, ``$TOT``, ``$DATATYPE``,
        ``$BYTEORD``, ``$MODE``, ``$NEXTDATA``) and every per-channel ``$Pn...``
        keyword are ignored: channel keywords come from the arguments.  Empty
        values are skipped (FCS 3.1 forbids them).  ``BOSCAGE_VERSION`` is added
        when absent (the mark :mod:`core.write_guard` looks for before replacing an FCS file).
    channel_labels : ``$PnS`` per channel (written where non-empty).
    channel_ranges : ``$PnR`` per channel; default: the channel's largest value
        rounded up to a whole number (at least 1).

    Returns the path written.  Raises :class:`EventDataError` for unusable
    data, :class:`ChannelError` for bad channel lists and :class:`ExportError`
    when the file cannot be written (nothing is left behind).
    """
    path = os.fspath(path)
    where = os.path.basename(path)
    arr = np.asarray(data)
    if arr.ndim != 2:
        raise EventDataError(f"{where}: event data must be a 2-D array (events x channels), "
                             f"got {arr.ndim} dimension(s)")
    if not np.issubdtype(arr.dtype, np.number) or np.issubdtype(arr.dtype, np.complexfloating):
        raise EventDataError(f"{where}: event data must be real numbers, got {arr.dtype}")
    n_events, n_par = arr.shape
    if n_par == 0:
        raise EventDataError(f"{where}: there are no channels to write")
    with np.errstate(over="ignore", invalid="ignore"):
        values = arr.astype("<f4")  # beyond float32 range becomes inf, refused below
    finite = np.isfinite(values)
    if not finite.all():
        bad_cols = [str(channel_names[j]) if j < len(channel_names) else str(j)
                    for j in np.flatnonzero(~finite.all(axis=0))]
        raise EventDataError(f"{where}: {int((~finite).any(axis=1).sum())} events hold NaN, inf "
                             f"or values beyond float32 range (channels {', '.join(bad_cols)}); "
                             "remove them before export")

    names = [str(n) for n in channel_names]
    if len(names) != n_par:
        raise ChannelError(f"{where}: {len(names)} channel names for {n_par} data columns")
    for n in names:
        if not n.strip():
            raise ChannelError(f"{where}: a channel name is empty")
        if "," in n:
            raise ChannelError(f"{where}: channel name '{n}' contains a comma, which FCS 3.1 "
                               "forbids in $PnN")
    if len(set(names)) != len(names):
        dup = sorted({n for n in names if names.count(n) > 1})
        raise ChannelError(f"{where}: channel names repeat ({', '.join(dup)}); FCS 3.1 needs "
                           "unique $PnN names")
    labels = [""] * n_par if channel_labels is None else ["" if s is None else str(s)
                                                          for s in channel_labels]
    if len(labels) != n_par:
        raise ChannelError(f"{where}: {len(labels)} channel labels for {n_par} data columns")
    if channel_ranges is None:
        top = values.max(axis=0).astype(np.float64) if n_events else np.ones(n_par)
        ranges = [float(max(1.0, math.ceil(t))) for t in top]
    else:
        ranges = [float(r) for r in np.asarray(channel_ranges, dtype=np.float64).ravel()]
        if len(ranges) != n_par:
            raise ChannelError(f"{where}: {len(ranges)} channel ranges for {n_par} data columns")
        if not all(math.isfinite(r) and r > 0 for r in ranges):
            raise ChannelError(f"{where}: channel ranges must be positive finite numbers")

    pairs = [("$BYTEORD", "1,2,3,4"), ("$DATATYPE", "F"), ("$MODE", "L"),
             ("$NEXTDATA", "0"), ("$PAR", str(n_par)), ("$TOT", str(n_events))]
    for j in range(n_par):
        n = j + 1
        pairs += [(f"$P{n}N", names[j]), (f"$P{n}B", "32"), (f"$P{n}E", "0,0"),
                  (f"$P{n}R", _format_number(ranges[j]))]
        if labels[j].strip():
            pairs.append((f"$P{n}S", labels[j]))
    own = {k for k, _ in pairs}
    keywords = dict(keywords or {})
    if not any(str(k).strip().upper() == "BOSCAGE_VERSION" for k in keywords):
        # marks the file as written here: core.write_guard lets only such FCS files be replaced
        keywords = {"BOSCAGE_VERSION": __version__, **keywords}
    # the mark first, so a reader of the first bytes finds it whatever follows
    for key, value in sorted(keywords.items(), key=lambda kv: str(kv[0]).strip().upper() != "BOSCAGE_VERSION"):
        key = str(key).strip()
        value = "" if value is None else str(value)
        if not key or not value:
            continue
        upper = key.upper() if key.startswith("$") else key
        if upper in _STRUCTURAL_KEYS or upper in own or _PARAM_KEY.match(upper):
            continue
        pairs.append((upper, value))

    values = np.ascontiguousarray(values)
    prefix = _assemble(pairs, values.nbytes)
    try:
        with atomic_write(path, "wb", overwrite=overwrite) as handle:
            handle.write(prefix)
            if values.size:
                handle.write(memoryview(values.reshape(-1)).cast("B"))
    except OSError as exc:
        raise ExportError(f"{path}: writing failed ({exc.strerror or exc}); nothing was "
                          "written") from exc
    return path
