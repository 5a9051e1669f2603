"""Reading FCS 2.0/3.0/3.1 event data: :func:`read_fcs` (rules in :mod:`core.fcs`)."""

from __future__ import annotations

import math
import os
import stat
from typing import Mapping, Sequence

import numpy as np

from . import write_guard
from .errors import FcsFileError
from .event_file import ChannelDecoding, EventFile
from .fcs_text import (HEADER_LENGTH, _check_layout, _decode_text, _float_or_none, _int_keyword,
                       _parse_header, _split_text)


#: Integer channels of up to this many bits are held as float32 (every whole number below 2^24 is exact).
FLOAT32_INTEGER_BITS = 24
#: Rows per chunk where whole-file passes would otherwise make full-size temporaries.
CHUNK_ROWS = 1 << 18


def _pne(kw: Mapping[str, str], n: int):
    """``(f1, f2)`` of ``$PnE`` (0, 0 when absent), or None when it is not 'decades,offset'."""
    pne = kw.get(f"$P{n}E")
    if pne is None:
        return 0.0, 0.0
    vals = [_float_or_none(p.strip()) for p in pne.split(",")]
    if len(vals) == 2 and None not in vals and vals[0] >= 0:
        return vals[0], vals[1]
    return None


def _gain(kw: Mapping[str, str], n: int, name: str, label: str) -> float | None:
    """The ``$PnG`` the channel is divided by (FCS 3.1, linear channels; never time), or None."""
    gain = _float_or_none(kw.get(f"$P{n}G"))
    if gain is not None and gain > 0 and gain != 1.0 and not _is_time(name, label):
        return gain
    return None


def _wanted_bits(channel_range: float) -> int:
    """Bits a ``$PnR`` needs: ceil(log2($PnR)) (FCS 3.1 on ``$PnB``/``$PnR``)."""
    return int(math.ceil(math.log2(channel_range))) if channel_range > 1 else 0


def _kept_bits(bits: int, channel_range: float) -> int:
    """Stored bits kept after masking to what ``$PnR`` needs (all of them when it needs more)."""
    return min(bits, _wanted_bits(channel_range))


def event_dtype(kw: Mapping[str, str], layout: dict, names: list, labels: list) -> np.dtype:
    """The type ``EventFile.data`` is held in: float32 when it holds every value exactly, else float64.

    float32 for ``$DATATYPE F`` and for integer data of at most
    :data:`FLOAT32_INTEGER_BITS` kept bits, unless a channel is decoded by
    arithmetic (log amplification of integer data, or a ``$PnG`` gain), whose
    results keep float64.  ``$DATATYPE D`` stays float64.
    """
    datatype = layout["datatype"]
    if datatype == "D":
        return np.dtype(np.float64)
    for j in range(layout["n_par"]):
        n = j + 1
        pne = _pne(kw, n)
        if datatype == "I" and pne is not None and pne[0] > 0:
            return np.dtype(np.float64)
        if (pne is None or pne[0] == 0) and _gain(kw, n, names[j], labels[j]) is not None:
            return np.dtype(np.float64)
        if datatype == "I" and _kept_bits(layout["bits"][j], float(layout["ranges"][j])) > FLOAT32_INTEGER_BITS:
            return np.dtype(np.float64)
    return np.dtype(np.float32)


def _read_raw_events(path: str, handle, layout: dict, notes: list, dtype=np.float64) -> np.ndarray:
    """Decode the DATA segment located by :func:`_check_layout` into ``dtype`` (events x channels).

    Reads exactly ``$TOT x bytes per event`` from the checked start (FCS 3.1
    list mode) straight into an array (no intermediate bytes object):
    ``$DATATYPE F``/``D`` as 32/64-bit IEEE floats (byte-swapped in place when
    the file's order is not the machine's), ``I`` as unsigned integers of each
    channel's ``$PnB`` bytes (any whole number of bytes, mixed widths allowed)
    in the ``$BYTEORD`` order, then masked to the bits ``$PnR`` needs (FCS 3.1
    on ``$PnB``/``$PnR``).  A ``$PnR`` larger than the field holds keeps every
    stored bit (a note says so).
    """
    n_tot, n_par, row = layout["n_tot"], layout["n_par"], layout["row_bytes"]
    if layout.get("note"):
        notes.append(layout["note"])
    if n_tot == 0:
        return np.zeros((0, n_par), dtype=dtype)
    needed = n_tot * row
    endian = layout["byteorder"]
    datatype = layout["datatype"]
    handle.seek(layout["start"])
    try:
        stored = np.dtype(f"{endian}{'f4' if datatype == 'F' else 'f8'}") if datatype in ("F", "D") else None
        buf = np.empty(n_tot * n_par, dtype=stored) if stored is not None else np.empty(needed, dtype=np.uint8)
        got = 0
        view = buf.view(np.uint8)
        while got < needed:
            k = handle.readinto(view[got:])
            if not k:
                break
            got += k
        if got != needed:
            raise FcsFileError(path, f"the DATA segment ends early: {got} of {needed} bytes could be read")
        if stored is not None:
            if not stored.isnative:
                buf = buf.byteswap(inplace=True).view(stored.newbyteorder("="))
            data = buf.reshape(n_tot, n_par)
            if data.dtype != dtype:
                with np.errstate(invalid="ignore"):  # signalling NaN bit patterns stay NaN
                    data = data.astype(dtype)
            return data
        data = np.empty((n_tot, n_par), dtype=dtype)
        widths = [b // 8 for b in layout["bits"]]
        uniform = len(set(widths)) == 1 and widths[0] in (1, 2, 4, 8)
        if uniform:
            whole = buf.view(f"{endian}u{widths[0]}").reshape(n_tot, n_par)
        else:
            rows = buf.reshape(n_tot, row)
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
            keep = _kept_bits(b, float(layout["ranges"][j]))
            if keep < b:
                col &= np.uint64((1 << keep) - 1) if keep > 0 else np.uint64(0)
            elif b < _wanted_bits(float(layout["ranges"][j])):
                kept_all.append(j + 1)
            data[:, j] = col
        if kept_all:
            notes.append("Channels " + ", ".join(f"$P{n}" for n in kept_all) + " declare a range ($PnR) "
                         "larger than their stored bits ($PnB) hold; every stored bit was kept.")
        return data
    except MemoryError:
        raise FcsFileError(path, "not enough memory to hold the events") from None


def _non_finite_events(data: np.ndarray) -> int:
    """Events (rows) holding a NaN or inf, counted in chunks (no full-size mask)."""
    if data.dtype.kind != "f":
        return 0
    return sum(int(np.count_nonzero(~np.isfinite(data[i:i + CHUNK_ROWS]).all(axis=1)))
               for i in range(0, data.shape[0], CHUNK_ROWS))


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
        pne = _pne(kw, n)
        if pne is not None:
            f1, f2 = pne
        else:
            notes.append(f"Channel {names[j]}: $P{n}E '{kw.get(f'$P{n}E')}' is not 'decades,offset'; "
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
        gain = _gain(kw, n, names[j], labels[j])
        if gain is not None:
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

    try:
        with _open_regular(path) as handle:
            data = _read_raw_events(path, handle, layout, notes, event_dtype(keywords, layout, names, labels))
    except OSError as exc:
        raise FcsFileError(path, f"the DATA segment cannot be read ({exc.strerror or exc})") from exc

    decoding: list = []
    ranges = _decode_scale(keywords, datatype, data, names, labels, notes, decoding)
    n_bad = _non_finite_events(data)
    if n_bad:
        notes.append(f"{n_bad} events hold non-finite values (NaN or "
                     "inf); they are kept here and set aside by the cleaning step.")
    return EventFile(path=path, data=data, channel_names=names, channel_labels=labels,
                     channel_ranges=ranges, keywords=keywords, version=header["version"],
                     notes=notes, decoding=decoding)

