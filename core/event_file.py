"""The events of one FCS data set as this program holds them, and how they were decoded.

:class:`EventFile` is what :func:`core.fcs.read_fcs` returns (and what tests and
scenarios build by hand); :class:`ChannelDecoding` records how a channel's stored
values became the scale values in ``EventFile.data`` (FCS 3.1 $PnE/$PnG/$PnR).
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field

import numpy as np

from .errors import ChannelError


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

