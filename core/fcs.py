"""Reading and writing FCS files (Flow Cytometry Standard 2.0, 3.0 and 3.1).

Reading
-------
:func:`read_fcs` returns an :class:`EventFile`: the events of the file's first
data set as a float64 matrix of shape (events x channels), in *scale* units:

* Integer data (``$DATATYPE/I/``) are bit-masked to the bits ``$PnR`` needs
  (``ceil(log2($PnR))`` bits, FCS 3.1 on ``$PnB``/``$PnR``; some instruments
  set unused high bits).
* ``$PnE/f1,f2/`` with ``f1 > 0`` on integer data is log amplification:
  ``value = f2 * 10 ** (f1 * x / $PnR)`` (FCS 3.1).  Files that write
  ``f2 = 0`` mean ``f2 = 1`` (common practice).  Floating point data must carry
  ``$PnE/0,0/`` (FCS 3.1); a float channel that claims log amplification is
  already in scale units and is kept as stored (a note says so).
* ``$PnG`` (amplifier gain) applies to linear channels: ``value = x / $PnG``.
  It is not applied to the time channel (a gain on time makes no physical
  sense; common practice) nor to log-amplified channels.
* ``channel_ranges`` are ``$PnR`` carried into the same units as ``data``:
  ``f2 * 10 ** f1`` for decoded log channels and ``$PnR / $PnG`` for channels
  divided by their gain.  The raw ``$PnR`` stays in ``keywords``.
* Non-finite values (NaN, inf) in float files are loaded as they are; the
  cleaning step (``core.prepare``) sets those events aside with a reason.
* The TEXT segment is decoded as UTF-8 (FCS 3.1); when it is not valid UTF-8
  (older files) it is decoded as Latin-1, which maps every byte, and a note
  says so.
* Duplicate ``$PnN`` names (forbidden by FCS 3.1, but seen) keep their data:
  the second and later copies are renamed ``"NAME (2)"``, ``"NAME (3)"``...
  The original names stay in ``keywords`` and a note lists the renames.
* Only the first data set of a multi-data-set file is read (a note says so).

The HEADER, TEXT offsets and ``$TOT x $PAR x $PnB`` are checked against the
file size *before* any event is read, so a damaged header cannot make the
reader allocate memory the file cannot fill.  The DATA segment is located
exactly: the HEADER and ``$BEGINDATA`` must give the same start, it may not
overlap the HEADER or TEXT, and it must hold exactly ``$TOT`` events (one byte
more only with a start confirmed by both; some writers end one byte late), so
no tolerance can shift values.  The decoding keywords are bounded
(:func:`_check_decoding`).  The path is checked before opening (non-regular
files are never opened).  Everything broken raises
:class:`~core.errors.FcsFileError` naming the file and the problem; no other
exception type leaves :func:`read_fcs`.

Writing
-------
:func:`write_fcs` writes FCS 3.1: HEADER, TEXT and DATA (no ANALYSIS), list
mode, float32 little-endian, through :func:`core.atomic.atomic_write`.
"""

from __future__ import annotations

import math
import os
import re
import stat
import warnings
from dataclasses import dataclass, field
from typing import Iterable, Mapping, Sequence

import numpy as np

from . import write_guard
from .atomic import atomic_write
from .errors import ChannelError, EventDataError, ExportError, FcsFileError

__all__ = ["ChannelDecoding", "EventFile", "read_fcs", "write_fcs", "header_offset_fields"]

#: Length of the FCS HEADER: version (6), 4 spaces, six 8-byte offsets (FCS 3.1 section 3.1).
HEADER_LENGTH = 58
#: The largest offset an 8-byte HEADER field can hold (FCS 3.1 section 3.1).
MAX_HEADER_OFFSET = 99_999_999
#: More channels than this in one file is taken as a damaged $PAR (real instruments: < 100).
_MAX_PAR = 10_000
#: Bounds of the decoding keywords (beyond them float64 arithmetic overflows or underflows;
#: real files use a few decades, gains of 0.01-1000 and ranges up to 2^32: common practice).
_MAX_DECADES = 30.0
_MAX_LOG_OFFSET = 1e30
_GAIN_BOUNDS = (1e-6, 1e6)
_MAX_RANGE = 1e30

_SUPPORTED_VERSIONS = ("FCS2.0", "FCS3.0", "FCS3.1", "FCS3.2")
_BYTE_ORDERS = {"1,2,3,4": "<", "1,2": "<", "4,3,2,1": ">", "2,1": ">"}
_PARAM_KEY = re.compile(r"^\$P(\d+)([A-Z]+)$", re.IGNORECASE)
# Keywords the writer computes itself; any copy in `keywords` is ignored.
_STRUCTURAL_KEYS = frozenset({
    "$BEGINANALYSIS", "$ENDANALYSIS", "$BEGINDATA", "$ENDDATA", "$BEGINSTEXT",
    "$ENDSTEXT", "$BYTEORD", "$DATATYPE", "$MODE", "$NEXTDATA", "$PAR", "$TOT",
})
# Delimiters the writer may use, in order of preference (any byte 1-126 is allowed by FCS 3.1).
_DELIMITER_CHOICES = ("/", "|", "\\", "!", "~", "^", "\x0c")


@dataclass(frozen=True)
class ChannelDecoding:
    """How one channel's stored values became the scale values in ``EventFile.data``.

    FCS 3.1 ($PnE, $PnG, $PnR; section 3.2.20 for $PnE, number from memory):
    a log-amplified integer channel decodes as ``f2 * 10 ** (f1 * stored / $PnR)``,
    a linear channel with a gain as ``stored / $PnG``, everything else as stored.

    ``integer``: the file stores whole numbers ($DATATYPE I).
    ``decades`` (f1, 0 for linear), ``offset`` (f2, used when ``decades > 0``),
    ``stored_range`` ($PnR as written, NaN when unusable), ``gain`` (the divisor
    applied; 1.0 when none was).
    """

    integer: bool
    decades: float = 0.0
    offset: float = 1.0
    stored_range: float = math.nan
    gain: float = 1.0

    @property
    def log_amplified(self) -> bool:
        return self.decades > 0

    def decode(self, stored) -> np.ndarray:
        """Scale values (float64) of stored values (any shape)."""
        x = np.asarray(stored, dtype=np.float64)
        if self.log_amplified:
            return self.offset * np.power(10.0, self.decades * x / self.stored_range)
        return x / self.gain if self.gain != 1.0 else x.copy()

    def encode(self, values) -> np.ndarray:
        """Stored values (float64, rounded to whole numbers for integer channels) of scale values."""
        v = np.asarray(values, dtype=np.float64)
        if self.log_amplified:
            with np.errstate(divide="ignore", invalid="ignore"):
                x = np.log10(v / self.offset) * (self.stored_range / self.decades)
        else:
            x = v * self.gain if self.gain != 1.0 else v.copy()
        return np.rint(x) if self.integer else x


@dataclass
class EventFile:
    """The events of one FCS data set and its description.

    Attributes
    ----------
    path : str
        The file read.
    data : ndarray, shape (n_events, n_channels), float64
        Event values in scale units (see the module notes on $PnE/$PnG).
    channel_names : list of str
        ``$PnN`` per channel, made unique (see the module notes).
    channel_labels : list of str
        ``$PnS`` per channel, ``""`` where absent.
    channel_ranges : ndarray, shape (n_channels,), float64
        ``$PnR`` per channel in the units of ``data``.
    keywords : dict of str to str
        Every TEXT keyword as written in the file; keys starting with ``$``
        are upper-cased (FCS keywords are case-insensitive).
    version : str
        ``"FCS2.0"``, ``"FCS3.0"``, ``"FCS3.1"`` (or ``"FCS3.2"``).
    notes : list of str
        What the reader did that an analyst may want to know (Latin-1 text,
        renamed channels, values kept as stored, extra data sets, ...).
    decoding : list of ChannelDecoding or None
        Per channel, how stored values became ``data`` (``decoding[j].encode``
        gives back the stored values); None for event files not read from disk.
    """

    path: str
    data: np.ndarray
    channel_names: list
    channel_labels: list
    channel_ranges: np.ndarray
    keywords: dict
    version: str
    notes: list = field(default_factory=list)
    decoding: list | None = None

    @property
    def n_events(self) -> int:
        """Number of events (rows of ``data``)."""
        return int(self.data.shape[0])

    @property
    def n_channels(self) -> int:
        """Number of channels (columns of ``data``)."""
        return int(self.data.shape[1])

    def channel_index(self, name_or_label: str) -> int:
        """Column of the channel whose ``$PnN`` name or ``$PnS`` label is ``name_or_label``.

        Exact names win over labels; a case-insensitive match is accepted when
        it is unique.  Raises :class:`ChannelError` listing the channels.
        """
        key = str(name_or_label)
        if key in self.channel_names:
            return self.channel_names.index(key)
        hits = [i for i, lab in enumerate(self.channel_labels) if lab and lab == key]
        if len(hits) == 1:
            return hits[0]
        folded = key.casefold()
        if not hits:
            hits = sorted({i for i, n in enumerate(self.channel_names) if n.casefold() == folded}
                          | {i for i, lab in enumerate(self.channel_labels)
                             if lab and lab.casefold() == folded})
            if len(hits) == 1:
                return hits[0]
        available = ", ".join(
            f"{n} ({lab})" if lab and lab != n else n
            for n, lab in zip(self.channel_names, self.channel_labels))
        where = os.path.basename(self.path) if self.path else "the event file"
        if hits:
            raise ChannelError(f"{where}: '{key}' names {len(hits)} channels "
                               f"({', '.join(self.channel_names[i] for i in hits)}); "
                               f"use the channel name. Channels: {available}")
        raise ChannelError(f"{where}: no channel named '{key}'. Channels: {available}")


# --------------------------------------------------------------------------- reading

def _parse_header(path: str, head: bytes, file_size: int) -> dict:
    """Check the 58-byte HEADER and return version and segment offsets (bytes, inclusive ends)."""
    if file_size == 0:
        raise FcsFileError(path, "the file is empty (0 bytes)")
    if not head.startswith(b"FCS"):
        raise FcsFileError(path, "this is not an FCS file: it does not start with 'FCS' "
                                 "and a version number")
    version = head[:6].decode("ascii", errors="replace")
    if version not in _SUPPORTED_VERSIONS:
        raise FcsFileError(path, f"FCS version '{version}' is not supported "
                                 f"(supported: FCS 2.0, 3.0 and 3.1)")
    if file_size < HEADER_LENGTH:
        raise FcsFileError(path, f"the file is only {file_size} bytes long; an FCS "
                                 f"HEADER alone takes {HEADER_LENGTH} bytes")
    names = ("text start", "text end", "data start", "data end", "analysis start", "analysis end")
    offsets = {}
    for k, name in enumerate(names):
        raw = head[10 + 8 * k: 18 + 8 * k]
        text = raw.decode("ascii", errors="replace").strip()
        if text == "":
            offsets[name] = 0
        elif text.isdigit():
            offsets[name] = int(text)
        else:
            raise FcsFileError(path, f"the HEADER is damaged: the {name} offset reads "
                                     f"{raw!r}, not a number")
    if offsets["text start"] < HEADER_LENGTH or offsets["text end"] <= offsets["text start"]:
        raise FcsFileError(path, "the HEADER does not locate the TEXT segment "
                                 f"(offsets {offsets['text start']}-{offsets['text end']})")
    # Some writers let the TEXT end where DATA starts; read one byte less (as fcsparser does).
    if offsets["text end"] == offsets["data start"]:
        offsets["text end"] -= 1
    if offsets["text end"] >= file_size:
        raise FcsFileError(path, f"the file is truncated: the TEXT segment should end at byte "
                                 f"{offsets['text end']} but the file has only {file_size} bytes")
    offsets["version"] = version
    return offsets


def _decode_text(path: str, raw: bytes, notes: list) -> tuple[str, str]:
    """Decode TEXT bytes as UTF-8 (FCS 3.1), else Latin-1; return (text, encoding)."""
    try:
        return raw.decode("utf-8"), "utf-8"
    except UnicodeDecodeError as exc:
        notes.append(f"The TEXT segment is not valid UTF-8 (byte 0x{raw[exc.start]:02x} at "
                     f"position {exc.start}); keywords were read as Latin-1.")
        return raw.decode("latin-1"), "latin-1"


def _split_text(path: str, text: str, notes: list) -> dict:
    """TEXT segment -> keyword dict, using fcsparser's own splitter (delimiter doubling)."""
    from fcsparser.api import FCSParser

    if len(text) < 2:
        raise FcsFileError(path, "the TEXT segment is empty")
    delimiter = text[0]
    if delimiter.isalnum() or delimiter in "$":
        raise FcsFileError(path, f"the TEXT segment does not start with a delimiter "
                                 f"(found {delimiter!r}); the HEADER offsets are probably wrong")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            raw = FCSParser._extract_text_dict(text)
        except Exception as exc:  # fcsparser's splitter on a damaged segment
            raise FcsFileError(path, f"the TEXT segment cannot be split into keywords ({exc})") from None
    for w in caught:
        notes.append("The TEXT segment does not end with its delimiter; its last keyword "
                     "may be incomplete." if "delimiter" in str(w.message) else str(w.message))
    keywords = {}
    for key, value in raw.items():
        k = key.strip()
        if k.startswith("$"):
            k = k.upper()
        keywords[k] = value
    return keywords


def _required(path: str, kw: Mapping[str, str], key: str) -> str:
    if key not in kw:
        raise FcsFileError(path, f"the TEXT segment lacks the required keyword {key}")
    return kw[key]


def _int_keyword(path: str, kw: Mapping[str, str], key: str) -> int:
    value = _required(path, kw, key).strip()
    try:
        return int(value)
    except ValueError:
        try:
            as_float = float(value)
        except ValueError:
            as_float = math.nan
        if as_float.is_integer():
            return int(as_float)
        raise FcsFileError(path, f"keyword {key} should be a whole number but reads '{value}'") \
            from None


def _float_or_none(text: str | None) -> float | None:
    if text is None:
        return None
    try:
        value = float(text.strip())
    except ValueError:
        return None
    return value if math.isfinite(value) else None


def _size_text(n_bytes: int) -> str:
    """Bytes as an analyst reads them: '12 kB', '3.4 MB', '48 GB' (decimal units)."""
    for unit, scale in (("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if n_bytes >= scale:
            return f"{n_bytes / scale:.3g} {unit}"
    return f"{n_bytes} bytes"


def _check_layout(path: str, header: dict, kw: Mapping[str, str], file_size: int) -> dict:
    """Validate mode, types, byte order and the DATA segment size before any data are read."""
    mode = kw.get("$MODE", "L").strip().upper()
    if mode != "L":
        raise FcsFileError(path, f"$MODE is '{mode}'; only list mode (L) event data can be read")
    datatype = _required(path, kw, "$DATATYPE").strip().upper()
    if datatype not in ("I", "F", "D"):
        raise FcsFileError(path, f"$DATATYPE '{datatype}' is not supported "
                                 "(integer I, float F and double D are)")
    byteord = _required(path, kw, "$BYTEORD").strip().replace(" ", "")
    if byteord not in _BYTE_ORDERS:
        raise FcsFileError(path, f"$BYTEORD '{byteord}' is not supported "
                                 "(little-endian 1,2,3,4 and big-endian 4,3,2,1 are)")
    n_par = _int_keyword(path, kw, "$PAR")
    n_tot = _int_keyword(path, kw, "$TOT")
    if n_par <= 0:
        raise FcsFileError(path, f"$PAR is {n_par}: the file declares no channels")
    if n_tot < 0:
        raise FcsFileError(path, f"$TOT is {n_tot}: a negative number of events")
    _int_keyword(path, kw, "$NEXTDATA")  # fcsparser requires it; check it here with a clear message
    if "$P0B" in kw:
        raise FcsFileError(path, "channels are numbered from 0 ($P0B); FCS numbers them from 1")
    if n_par > _MAX_PAR:
        raise FcsFileError(path, f"$PAR is {n_par}; more than {_MAX_PAR} channels is not a plausible "
                                 "acquisition (the keyword is probably damaged)")
    bits, ranges = [], []
    for n in range(1, n_par + 1):
        b = _int_keyword(path, kw, f"$P{n}B")
        if datatype == "F" and b != 32 or datatype == "D" and b != 64:
            raise FcsFileError(path, f"$P{n}B is {b} bits but $DATATYPE {datatype} needs "
                                     f"{32 if datatype == 'F' else 64}")
        if datatype == "I" and (b <= 0 or b % 8 or b > 64):
            raise FcsFileError(path, f"$P{n}B is {b} bits; only whole bytes (8, 16, 24, 32...) "
                                     "can be read")
        if datatype == "I" and (_float_or_none(kw.get(f"$P{n}R")) or 0.0) <= 0:
            raise FcsFileError(path, f"$P{n}R (channel range) is missing or not a positive number; "
                                     "integer data cannot be decoded without it")
        bits.append(b)
        ranges.append(_float_or_none(kw.get(f"$P{n}R")) or 0.0)
    row_bytes = sum(bits) // 8
    # Like fcsparser: HEADER offsets unless 0 (then $BEGINDATA/$ENDDATA, FCS 3.1 section 3.1).
    h_start, h_end = header["data start"], header["data end"]
    k_start = _int_keyword(path, kw, "$BEGINDATA") if "$BEGINDATA" in kw else None
    k_end = _int_keyword(path, kw, "$ENDDATA") if "$ENDDATA" in kw else None
    start = h_start if h_start else (k_start or 0)
    end = h_end if h_end else (k_end or 0)
    needed = n_tot * row_bytes
    _check_decoding(path, kw, n_par)
    # Both places state the DATA segment (FCS 3.1 section 3.1).  The start decides where
    # values are read: two different starts mean one is damaged, and the file is refused
    # rather than read from a wrong byte.  With one start confirmed by both, two different
    # ends are accepted when one of them fits $TOT events (that end is used; a note says so).
    note = ""
    if h_start and k_start and h_start != k_start:
        raise FcsFileError(path, f"the HEADER and the TEXT segment disagree on where the DATA segment starts "
                                 f"(byte {h_start} in the HEADER, $BEGINDATA {k_start}); the file is damaged")
    if h_end and k_end and h_end != k_end:
        fits = [e for e in (h_end, k_end) if needed and start and e - start + 1 in (needed, needed + 1)]
        if len(fits) != 1:
            raise FcsFileError(path, f"the HEADER and the TEXT segment disagree on where the DATA segment ends "
                                     f"(byte {h_end} in the HEADER, $ENDDATA {k_end}); the file is damaged")
        end = fits[0]
        note = (f"The HEADER and $ENDDATA disagree on where the DATA segment ends ({h_end} and {k_end}); "
                f"byte {end}, which fits $TOT events, was used.")
    layout = {"n_tot": n_tot, "n_par": n_par, "datatype": datatype, "bits": bits, "ranges": ranges,
              "byteorder": _BYTE_ORDERS[byteord], "start": start, "row_bytes": row_bytes, "note": note}
    if needed == 0:
        # $TOT 0: an empty file is fine, but a DATA segment holding events is not (FCS 3.1: $TOT
        # is the number of events in the data set; reading 0 events would lose them silently)
        if start > 0 and end >= start and end < file_size and end - start + 1 >= row_bytes:
            raise FcsFileError(path, f"$TOT is 0 but the DATA segment holds {end - start + 1} bytes "
                                     f"({(end - start + 1) // row_bytes} events of {row_bytes} bytes); "
                                     "the event count is damaged")
        return layout
    if start <= 0 or end < start:
        raise FcsFileError(path, "neither the HEADER nor $BEGINDATA/$ENDDATA locate the DATA "
                                 "segment")
    if start < HEADER_LENGTH or start <= header["text end"] and end >= header["text start"]:
        raise FcsFileError(path, f"the DATA segment (bytes {start}-{end}) overlaps the HEADER or the TEXT "
                                 f"segment (bytes {header['text start']}-{header['text end']}); the "
                                 "offsets are damaged")
    if start + needed > file_size:
        raise FcsFileError(path, f"the file is truncated or its event count is wrong: $TOT and "
                                 f"$PAR announce {n_tot} events x {n_par} channels "
                                 f"({_size_text(needed)} of data from byte {start}) but the file "
                                 f"has only {file_size} bytes")
    held = end - start + 1
    # The DATA segment must hold exactly $TOT x (bytes per event).  One byte more is
    # accepted only when the HEADER and $BEGINDATA give the same start: some writers
    # put the end offset one past the last byte (seen in fcsparser's FCS 3.1 files),
    # and a start confirmed twice rules out a shifted start.
    confirmed = bool(h_start and k_start and h_start == k_start)
    if held != needed and not (held == needed + 1 and confirmed):
        raise FcsFileError(path, f"$TOT and $PAR disagree with the DATA segment: {n_tot} events "
                                 f"x {row_bytes} bytes per event need {needed} bytes but the "
                                 f"DATA segment holds {held} bytes")
    if end >= file_size and held == needed:
        raise FcsFileError(path, f"the file is truncated: the DATA segment should end at byte "
                                 f"{end} but the file has only {file_size} bytes")
    return layout


def _check_decoding(path: str, kw: Mapping[str, str], n_par: int) -> None:
    """Bound the decoding keywords before any value is decoded (FcsFileError naming the keyword).

    The same parsing as :func:`_decode_scale`: ``$PnR`` (when a positive number) up to
    1e30; ``$PnE f1,f2`` with ``f1 > 0`` up to 30 decades and offsets 0..1e30; ``$PnG``
    (when a positive number other than 1) within 1e-6..1e6.  Beyond, float64 decoding
    overflows, underflows or divides every value into inf.
    """
    for n in range(1, n_par + 1):
        name = kw.get(f"$P{n}N", "").strip() or f"P{n}"
        rng = _float_or_none(kw.get(f"$P{n}R"))
        if rng is not None and rng > _MAX_RANGE:
            raise FcsFileError(path, f"$P{n}R (range of channel {name}) is {kw.get(f'$P{n}R')!r}; ranges "
                                     f"above {_MAX_RANGE:g} are not plausible (damaged keyword)")
        pne = kw.get(f"$P{n}E")
        if pne is not None:
            vals = [_float_or_none(p.strip()) for p in pne.split(",")]
            if len(vals) == 2 and None not in vals and vals[0] > 0 and not (
                    vals[0] <= _MAX_DECADES and 0 <= vals[1] <= _MAX_LOG_OFFSET):
                raise FcsFileError(path, f"$P{n}E (log amplification of channel {name}) is {pne!r}; FCS "
                                         f"3.1 gives 'decades,offset' and this program reads up to "
                                         f"{_MAX_DECADES:g} decades and offsets up to {_MAX_LOG_OFFSET:g}")
        gain = _float_or_none(kw.get(f"$P{n}G"))
        if gain is not None and gain > 0 and gain != 1.0 and not _GAIN_BOUNDS[0] <= gain <= _GAIN_BOUNDS[1]:
            raise FcsFileError(path, f"$P{n}G (amplifier gain of channel {name}) is {kw.get(f'$P{n}G')!r}; "
                                     f"gains between {_GAIN_BOUNDS[0]:g} and {_GAIN_BOUNDS[1]:g} are read "
                                     "(dividing by it would make the values meaningless)")


def _read_raw_events(path: str, handle, layout: dict, notes: list) -> np.ndarray:
    """Decode the DATA segment located by :func:`_check_layout`: float64 (events x channels).

    Reads exactly ``$TOT x bytes per event`` from the checked start (FCS 3.1
    list mode): ``$DATATYPE F``/``D`` as 32/64-bit IEEE floats, ``I`` as unsigned
    integers of each channel's ``$PnB`` bytes (any whole number of bytes, mixed
    widths allowed) in the ``$BYTEORD`` order, then masked to the bits ``$PnR``
    needs (FCS 3.1 on ``$PnB``/``$PnR``).  A ``$PnR`` larger than the field holds
    keeps every stored bit (a note says so).
    """
    n_tot, n_par, row = layout["n_tot"], layout["n_par"], layout["row_bytes"]
    if layout.get("note"):
        notes.append(layout["note"])
    if n_tot == 0:
        return np.zeros((0, n_par), dtype=np.float64)
    needed = n_tot * row
    handle.seek(layout["start"])
    try:
        buf = handle.read(needed)
    except MemoryError:
        raise FcsFileError(path, "not enough memory to hold the events") from None
    if len(buf) != needed:
        raise FcsFileError(path, f"the DATA segment ends early: {len(buf)} of {needed} bytes could be read")
    endian = layout["byteorder"]
    datatype = layout["datatype"]
    try:
        if datatype in ("F", "D"):
            raw = np.frombuffer(buf, dtype=f"{endian}{'f4' if datatype == 'F' else 'f8'}")
            with np.errstate(invalid="ignore"):  # signalling NaN bit patterns stay NaN
                return raw.astype(np.float64).reshape(n_tot, n_par)
        data = np.empty((n_tot, n_par), dtype=np.float64)
        widths = [b // 8 for b in layout["bits"]]
        uniform = len(set(widths)) == 1 and widths[0] in (1, 2, 4, 8)
        if uniform:
            whole = np.frombuffer(buf, dtype=f"{endian}u{widths[0]}").reshape(n_tot, n_par)
        else:
            rows = np.frombuffer(buf, dtype=np.uint8).reshape(n_tot, row)
        offset = 0
        kept_all = []
        for j, b in enumerate(layout["bits"]):
            width = b // 8
            if uniform:
                col = whole[:, j].astype(np.uint64)
            else:
                part = rows[:, offset:offset + width]
                order = range(width) if endian == "<" else range(width - 1, -1, -1)
                col = np.zeros(n_tot, dtype=np.uint64)
                for shift, k in enumerate(order):
                    col |= part[:, k].astype(np.uint64) << np.uint64(8 * shift)
            offset += width
            rng = float(layout["ranges"][j])
            valid = int(math.ceil(math.log2(rng))) if rng > 1 else 0
            if valid < b:
                col &= np.uint64((1 << max(valid, 0)) - 1) if valid > 0 else np.uint64(0)
            elif valid > b:
                kept_all.append(j + 1)
            data[:, j] = col
        if kept_all:
            notes.append("Channels " + ", ".join(f"$P{n}" for n in kept_all) + " declare a range ($PnR) "
                         "larger than their stored bits ($PnB) hold; every stored bit was kept.")
        return data
    except MemoryError:
        raise FcsFileError(path, "not enough memory to hold the events") from None


def _unique_names(names: Sequence[str]) -> tuple[list, list]:
    """Append " (2)", " (3)"... to repeated names; return (names, list of renames)."""
    taken = set(names)
    seen: dict = {}
    out, renames = [], []
    for name in names:
        if name not in seen:
            seen[name] = 1
            out.append(name)
            continue
        k = seen[name]
        while True:
            k += 1
            candidate = f"{name} ({k})"
            if candidate not in taken:
                break
        seen[name] = k
        taken.add(candidate)
        out.append(candidate)
        renames.append((name, candidate))
    return out, renames


def _is_time(name: str, label: str) -> bool:
    return name.strip().casefold() == "time" or label.strip().casefold() == "time"


def _decode_scale(kw: Mapping[str, str], datatype: str, data: np.ndarray,
                  names: list, labels: list, notes: list,
                  decoding: list | None = None) -> np.ndarray:
    """Apply $PnE / $PnG in place; return channel ranges in the same units (float64).

    ``decoding``: when a list, one :class:`ChannelDecoding` per channel is appended.
    """
    n_par = data.shape[1]
    integer = datatype == "I"

    def record(**kwargs):
        if decoding is not None:
            decoding.append(ChannelDecoding(integer=integer, **kwargs))

    ranges = np.full(n_par, np.nan, dtype=np.float64)
    missing_range = []
    kept_log = []
    for j in range(n_par):
        n = j + 1
        rng = _float_or_none(kw.get(f"$P{n}R"))
        if rng is None or rng <= 0:
            missing_range.append(names[j])
            rng = None
        f1 = f2 = 0.0
        pne = kw.get(f"$P{n}E")
        if pne is not None:
            parts = [p.strip() for p in pne.split(",")]
            vals = [_float_or_none(p) for p in parts]
            if len(vals) == 2 and None not in vals and vals[0] >= 0:
                f1, f2 = vals
            else:
                notes.append(f"Channel {names[j]}: $P{n}E '{pne}' is not 'decades,offset'; "
                             "treated as linear.")
        if f1 > 0:
            if datatype != "I":
                kept_log.append(names[j])
                ranges[j] = rng if rng is not None else np.nan
                record(stored_range=ranges[j])
                continue
            if f2 <= 0:
                f2 = 1.0  # common practice: files writing f2 = 0 mean 1
            # FCS 3.1: scale value = f2 * 10^(f1 * channel / $PnR)
            data[:, j] = f2 * np.power(10.0, f1 * data[:, j] / rng)
            ranges[j] = f2 * 10.0 ** f1
            record(decades=f1, offset=f2, stored_range=rng)
            continue
        gain = _float_or_none(kw.get(f"$P{n}G"))
        if gain is not None and gain > 0 and gain != 1.0 and not _is_time(names[j], labels[j]):
            data[:, j] /= gain  # FCS 3.1: linear scale value = channel / $PnG
            ranges[j] = rng / gain if rng is not None else np.nan
            record(stored_range=rng if rng is not None else np.nan, gain=gain)
        else:
            ranges[j] = rng if rng is not None else np.nan
            record(stored_range=ranges[j])
    if kept_log:
        notes.append("Channels " + ", ".join(kept_log) + " are floating point with a "
                     "logarithmic $PnE; FCS 3.1 requires $PnE 0,0 for float data, so the "
                     "values are kept as stored.")
    if missing_range:
        for name in missing_range:
            j = names.index(name)
            if np.isfinite(ranges[j]):
                continue
            column = data[:, j][np.isfinite(data[:, j])]
            top = float(column.max()) if column.size else 0.0
            ranges[j] = top if top > 0 else 1.0
        notes.append("Channels " + ", ".join(missing_range) + " have no usable $PnR; their "
                     "range was set to their largest value.")
    return ranges


def read_fcs(path: str | os.PathLike) -> EventFile:
    """Read the first data set of an FCS 2.0/3.0/3.1 file.

    Returns an :class:`EventFile` whose ``data`` (events x channels, float64)
    are in scale units: integer channels bit-masked to ``$PnR``, ``$PnE`` log
    amplification and ``$PnG`` gain decoded (see the module notes).  The input
    file is opened read-only and never modified, and it is registered with
    :func:`core.write_guard.protect` so no write of this process replaces it.
    Raises :class:`~core.errors.FcsFileError` naming the file and the problem
    for everything: a path that is not a string, a missing file, a folder, a
    named pipe or device (refused before opening), and any damage inside the
    file; no other exception type leaves this function.
    """
    path = _checked_path(path)
    try:
        return _read_checked(path)
    except FcsFileError:
        raise
    except MemoryError:
        raise FcsFileError(path, "not enough memory to hold the events") from None
    except RecursionError:
        raise FcsFileError(path, "the file's structure is too deeply nested to read") from None
    except Exception as exc:  # a bug of ours or a library's: still a sentence naming the file
        raise FcsFileError(path, f"internal error while reading ({type(exc).__name__}: {exc}); "
                                 "please report it with the file") from exc


def _checked_path(path) -> str:
    """``path`` as str after refusing what is not a readable regular file (FcsFileError)."""
    if path is None or isinstance(path, (bool, int, float)):
        raise FcsFileError(None, f"{path!r} is not a file path; give the path of an FCS file")
    try:
        path = write_guard.path_text(path)
    except TypeError:
        raise FcsFileError(None, f"a {type(path).__name__} is not a file path; give the path of an "
                                 "FCS file") from None
    if not path:
        raise FcsFileError(None, "the file path is empty")
    if "\x00" in path:
        raise FcsFileError(None, f"{path!r} is not a usable file path (it holds a NUL character)")
    try:
        st = os.stat(path)
    except FileNotFoundError:
        raise FcsFileError(path, "no such file") from None
    except (OSError, ValueError) as exc:
        raise FcsFileError(path, f"the file cannot be opened ({getattr(exc, 'strerror', None) or exc})") \
            from None
    if stat.S_ISDIR(st.st_mode):
        raise FcsFileError(path, "this is a folder, not an FCS file")
    if not stat.S_ISREG(st.st_mode):
        raise FcsFileError(path, "this is not a regular file (a named pipe, device or socket); "
                                 "FCS files are read from regular files only")
    return path


def _open_regular(path: str):
    """Open ``path`` read-only without blocking (a file swapped for a pipe cannot hang us)."""
    flags = os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_BINARY", 0)
    fd = os.open(path, flags)
    try:
        if not stat.S_ISREG(os.fstat(fd).st_mode):
            raise FcsFileError(path, "this is not a regular file (a named pipe, device or socket)")
        return os.fdopen(fd, "rb")
    except BaseException:
        os.close(fd)
        raise


def _read_checked(path: str) -> EventFile:
    """:func:`read_fcs` after the path checks."""
    try:
        with _open_regular(path) as handle:
            file_size = os.fstat(handle.fileno()).st_size
            head = handle.read(HEADER_LENGTH)
            header = _parse_header(path, head, file_size)
            handle.seek(header["text start"])
            raw_text = handle.read(header["text end"] - header["text start"] + 1)
    except OSError as exc:
        raise FcsFileError(path, f"the file cannot be opened ({exc.strerror or exc})") from exc
    write_guard.protect(path)

    notes: list = []
    text, encoding = _decode_text(path, raw_text, notes)
    keywords = _split_text(path, text, notes)
    layout = _check_layout(path, header, keywords, file_size)
    n_tot, n_par, datatype = layout["n_tot"], layout["n_par"], layout["datatype"]
    nextdata = _int_keyword(path, keywords, "$NEXTDATA")
    if nextdata:
        notes.append("The file holds more than one data set; the first one was read.")

    try:
        with _open_regular(path) as handle:
            data = _read_raw_events(path, handle, layout, notes)
    except OSError as exc:
        raise FcsFileError(path, f"the DATA segment cannot be read ({exc.strerror or exc})") from exc

    raw_names = []
    for n in range(1, n_par + 1):
        name = keywords.get(f"$P{n}N", "").strip()
        if not name:
            name = keywords.get(f"$P{n}S", "").strip() or f"P{n}"
            notes.append(f"Channel {n} has no $P{n}N name; it is called '{name}'.")
        raw_names.append(name)
    labels = [keywords.get(f"$P{n}S", "").strip() for n in range(1, n_par + 1)]
    names, renames = _unique_names(raw_names)
    if renames:
        notes.append("Channel names repeat in the file; renamed " +
                     ", ".join(f"'{a}' -> '{b}'" for a, b in renames) +
                     " (original names kept in the keywords).")

    decoding: list = []
    ranges = _decode_scale(keywords, datatype, data, names, labels, notes, decoding)
    bad = ~np.isfinite(data)
    if bad.any():
        notes.append(f"{int(bad.any(axis=1).sum())} events hold non-finite values (NaN or "
                     "inf); they are kept here and set aside by the cleaning step.")
    return EventFile(path=path, data=data, channel_names=names, channel_labels=labels,
                     channel_ranges=ranges, keywords=keywords, version=header["version"],
                     notes=notes, decoding=decoding)


# --------------------------------------------------------------------------- writing

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
        from . import __version__
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
