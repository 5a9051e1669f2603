"""Plot axes that read in the trade's units.

Events are plotted in transformed units (what the density and the regions use),
but an axis is labelled in ORIGINAL values: on logicle, arcsinh, fasinh and log
scales the ticks sit at 0 and the decades (10, 100, 1000, ...; negatives too
when the scale shows them) with minor ticks at 2..9 x each decade; on linear
scales at round instrument values.  Tick positions are the transform's forward
map of those values; the visible range is taken back through its inverse
(:func:`core.transforms.make_transform`).
"""

from __future__ import annotations

import desktop.qtfix  # noqa: F401  (before any Qt call; see desktop/qtfix.py)

import math

import numpy as np
import pyqtgraph as pg

from core.transforms import make_transform

SUPERSCRIPT = str.maketrans("0123456789-", "⁰¹²³⁴⁵⁶⁷⁸⁹⁻")


def _nice_step(span: float, target: int = 5) -> float:
    raw = span / max(target, 1)
    mag = 10.0 ** math.floor(math.log10(raw))
    for m in (1.0, 2.0, 2.5, 5.0, 10.0):
        if raw <= m * mag:
            return m * mag
    return 10.0 * mag


def format_value(v: float, decades: bool = True) -> str:
    """Short label of an original value: 0, 10³, -10² (``decades``), else 50k / 1.5M."""
    if v == 0:
        return "0"
    a = abs(v)
    e = math.log10(a)
    if decades and abs(e - round(e)) < 1e-9 and a >= 10:
        return ("-" if v < 0 else "") + "10" + str(int(round(e))).translate(SUPERSCRIPT)
    for div, suffix in ((1e6, "M"), (1e3, "k")):
        if a >= div:
            return f"{v / div:g}{suffix}"
    return f"{v:g}"


def axis_ticks(spec: dict | None, lo: float, hi: float, target: int = 5, min_gap: float = 1 / 25):
    """Ticks for the visible range [lo, hi] of transformed values of a channel
    with transform ``spec`` (None: untransformed).

    Returns (major, minor): major is [(position, label)], minor [position];
    positions in transformed units, labels in original units; labelled ticks
    are at least ``min_gap`` of the range apart (0 first, then the largest)."""
    if not (np.isfinite(lo) and np.isfinite(hi)) or hi <= lo:
        return [], []
    kind = None if spec is None else spec.get("kind")
    t = None if spec is None else make_transform(spec)
    fwd = (lambda v: np.asarray(v, dtype=np.float64)) if t is None else \
        (lambda v: np.asarray(t.forward(np.asarray(v, dtype=np.float64)), dtype=np.float64))
    inv = (lambda v: np.asarray(v, dtype=np.float64)) if t is None else \
        (lambda v: np.asarray(t.inverse(np.asarray(v, dtype=np.float64)), dtype=np.float64))
    olo, ohi = (float(x) for x in inv([lo, hi]))
    if kind in (None, "linear") or not (np.isfinite(olo) and np.isfinite(ohi)):
        step = _nice_step(ohi - olo, target)
        vals = np.arange(math.ceil(olo / step), math.floor(ohi / step) + 1) * step
        major = [(float(p), format_value(float(v), decades=False)) for v, p in zip(vals, fwd(vals))]
        return major, []
    top = max(abs(olo), abs(ohi), 10.0)
    decades = [10.0 ** k for k in range(1, int(math.ceil(math.log10(top))) + 1)]
    values = [0.0] + decades + [-d for d in decades]
    if kind == "log":
        values = [10.0 ** k for k in range(int(math.floor(math.log10(max(olo, 1e-12)))),
                                           int(math.ceil(math.log10(max(ohi, 1e-12)))) + 1)]
    values = [v for v in values if olo <= v <= ohi]
    pos = fwd(values) if values else np.zeros(0)
    # 0 first, then the decades from the largest down, each kept when it does
    # not crowd one already kept (decades squeezed into the linear part around 0)
    min_gap = (hi - lo) * min_gap
    kept: list[tuple[float, float]] = []
    for v, p in sorted(zip(values, pos), key=lambda vp: (vp[0] != 0, -abs(vp[0]))):
        if all(abs(p - q) >= min_gap for _, q in kept):
            kept.append((v, float(p)))
    major = [(p, format_value(v)) for v, p in sorted(kept, key=lambda vp: vp[1])]
    minors = [m * d * s for d in [1.0] + decades for m in range(2, 10) for s in (1, -1)]
    minors = [v for v in minors if olo <= v <= ohi]
    minor = [float(p) for p in fwd(minors)] if minors else []
    return major, minor


class TransformAxis(pg.AxisItem):
    """An axis of transformed values labelled in original units (see module)."""

    def __init__(self, orientation: str, **kwargs) -> None:
        super().__init__(orientation, **kwargs)
        self.spec: dict | None = None
        self.enableAutoSIPrefix(False)
        self._labels: dict[float, str] = {}

    def set_spec(self, spec: dict | None) -> None:
        self.spec = None if spec is None else dict(spec)
        self.picture = None
        self.update()

    def tickValues(self, minVal, maxVal, size):  # noqa: N802 - pyqtgraph's name
        lo, hi = min(minVal, maxVal), max(minVal, maxVal)
        target = max(2, int(size / 70))
        try:
            # labels need about 18 px (vertical axis) or 34 px (horizontal) each
            gap = (18.0 if self.orientation in ("left", "right") else 34.0) / max(size, 1.0)
            major, minor = axis_ticks(self.spec, lo, hi, target, min_gap=gap)
        except Exception:  # noqa: BLE001 - a scale being edited: fall back to plain ticks
            return super().tickValues(minVal, maxVal, size)
        self._labels = {round(p, 9): text for p, text in major}
        return [(1.0, [p for p, _ in major]), (0.5, minor)]

    def tickStrings(self, values, scale, spacing):  # noqa: N802 - pyqtgraph's name
        if spacing == 0.5:
            return ["" for _ in values]
        return [self._labels.get(round(v, 9), f"{v:g}") for v in values]
