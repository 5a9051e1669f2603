"""Reading and writing FCS files (Flow Cytometry Standard 2.0, 3.0 and 3.1).

Reading
-------
:func:`read_fcs` returns an :class:`EventFile`: the events of the file's first
data set as a matrix of shape (events x channels), in *scale* units.  The
matrix is float32 when that holds every value exactly (``$DATATYPE F``, and
integer data of at most 24 kept bits that no $PnE/$PnG arithmetic decodes),
else float64 (:func:`core.fcs_read.event_dtype`); consumers convert to float64
column by column where the arithmetic needs it.  The DATA segment is read
straight into that matrix (no second copy of the file's bytes).

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

Modules: :mod:`core.fcs_text` (HEADER, TEXT, layout checks), :mod:`core.fcs_read`,
:mod:`core.fcs_write`, :mod:`core.event_file` (:class:`EventFile`,
:class:`ChannelDecoding`); this module re-exports their public names.

Writing
-------
:func:`write_fcs` writes FCS 3.1: HEADER, TEXT and DATA (no ANALYSIS), list
mode, float32 little-endian, through :func:`core.atomic.atomic_write`.
"""

from __future__ import annotations

from .event_file import ChannelDecoding, EventFile
from .fcs_read import read_fcs
from .fcs_text import _PARAM_KEY, HEADER_LENGTH, MAX_HEADER_OFFSET  # noqa: F401  (used by tests and writers)
from .fcs_write import header_offset_fields, write_fcs

__all__ = ["ChannelDecoding", "EventFile", "read_fcs", "write_fcs", "header_offset_fields"]
