"""The HEADER and TEXT of an FCS file, and the checks made before any event is read.

Offsets, version, keywords (split by fcsparser's own splitter), the data
layout (mode, types, byte order, bits, ranges) and the bounds of the decoding
keywords.  Everything broken raises :class:`~core.errors.FcsFileError` naming
the file; see :mod:`core.fcs` for the rules.
"""

from __future__ import annotations

import math
import re
import warnings
from typing import Mapping

from .errors import FcsFileError

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
    # imported here: fcsparser loads pandas (~0.4 s); keeps importing core light
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
