"""The fitted chain of maps onto the unit cube: the base map (per-channel
logistic, or a mixture's Rosenblatt map on the channels that vary) followed by
layers of (rotation, marginal map, forest).  Pure array in, array out; the
estimator (:mod:`core.density.model`) and storage (:mod:`core.density.storage`)
build and read it.  Shapes are events x channels, float64."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from . import kernels
from .checks import FAR_SCALES
from .marginals import PiecewiseLinearMap
from .mixture_base import MixtureBase
from .tree import Forest


@dataclass
class Layer:
    """One layer of the chain: an optional orthogonal ``rotation`` (d, d) in
    Gaussianised coordinates (None: none), the ``marginal`` map and the
    ``forest`` of dependence trees, applied in that order."""
    rotation: np.ndarray | None
    marginal: PiecewiseLinearMap
    forest: Forest = field(default_factory=Forest)

    def forward(self, U: np.ndarray, logd: np.ndarray) -> None:
        """Apply the layer to U (n, d) in place, adding its log-Jacobian to logd (n,)."""
        if self.rotation is not None:
            kernels.rotate(U, self.rotation)
        self.marginal.forward(U, logd)
        self.forest.forward(U, logd)

    def inverse(self, U: np.ndarray) -> None:
        """Undo :meth:`forward` in place."""
        self.forest.inverse(U)
        self.marginal.inverse(U)
        if self.rotation is not None:
            kernels.rotate(U, np.ascontiguousarray(self.rotation.T))


@dataclass
class Chain:
    """The whole map: per-channel logistic ``loc``, ``scale`` (d,) (the base for
    every channel without a mixture), ``constant`` (d,) bool channels held at one
    value in the fitted events (always logistic), the ``mixture`` on the other
    channels (None: logistic base) and the ``layers``."""
    loc: np.ndarray
    scale: np.ndarray
    constant: np.ndarray
    mixture: MixtureBase | None = None
    layers: list = field(default_factory=list)

    @property
    def n_trees(self) -> int:
        return sum(layer.forest.n_trees for layer in self.layers)

    def far_limits(self) -> tuple[np.ndarray, np.ndarray]:
        """Lowest and highest value (d,) each channel is scored at: values further than
        FAR_SCALES robust scales from a channel's centre are scored at that distance,
        so every finite event gets a finite log density."""
        reach = FAR_SCALES * self.scale
        return self.loc - reach, self.loc + reach

    def base_forward(self, C: np.ndarray, want_u: bool = True):
        """The base map into the cube: (U (m, d), log-Jacobian (m,)); with
        ``want_u=False`` only the log density (U is None), which for a mixture
        base skips the CDFs of its Rosenblatt map."""
        m, d = C.shape
        U = np.empty((m, d))
        logd = np.zeros(m)
        mix = self.mixture
        if mix is None:
            kernels.base_forward(C, U, logd, self.loc, self.scale, np.log(self.scale))
            return (U if want_u else None), logd
        fr = self.constant
        self._constant_forward(C, U, logd)
        if not want_u:
            return None, logd + mix.logpdf(C[:, ~fr])
        Ug, lg = mix.forward(C[:, ~fr])
        U[:, ~fr] = Ug
        logd += lg
        return U, logd

    def _constant_forward(self, C: np.ndarray, U: np.ndarray | None, logd: np.ndarray) -> None:
        """The logistic map of the constant channels (under a mixture base): their U
        columns (when U is given) and their log-Jacobian added to logd."""
        fr = self.constant
        if fr.any():
            Uf = np.empty((C.shape[0], int(fr.sum())))
            kernels.base_forward(np.ascontiguousarray(C[:, fr]), Uf, logd, self.loc[fr],
                                 self.scale[fr], np.log(self.scale[fr]))
            if U is not None:
                U[:, fr] = Uf

    def base_log_density_and_posteriors(self, C: np.ndarray):
        """A skewed mixture base's log density (m,), bit-identical to
        ``base_forward(C, want_u=False)``, and the mixture's posterior component
        probabilities (m, K + 1), background first, from the same compiled pass."""
        logd = np.zeros(C.shape[0])
        self._constant_forward(C, None, logd)
        lm, R = self.mixture.logpdf_and_posteriors(C[:, ~self.constant])
        return logd + lm, R

    def base_inverse(self, C: np.ndarray, out: np.ndarray) -> None:
        """Inverse of the base map: C (m, d) in the cube to events in ``out`` (m, d)."""
        kernels.base_inverse(C, out, self.loc, self.scale)
        if self.mixture is not None:
            out[:, ~self.constant] = self.mixture.inverse(C[:, ~self.constant])

    def density_is_base(self) -> bool:
        """True when nothing follows a mixture base (no rotation, identity
        marginals, no trees): the log density is then the base's alone."""
        if self.mixture is None or len(self.layers) != 1:
            return False
        layer = self.layers[0]
        return layer.rotation is None and layer.forest.n_trees == 0 and layer.marginal.is_identity

    def keep_base_only(self) -> None:
        """Make the base the whole model: one layer with no rotation, identity
        marginals and no trees (:meth:`density_is_base` then holds)."""
        self.layers = [Layer(None, PiecewiseLinearMap.identity(self.loc.shape[0]))]

    def forward(self, C: np.ndarray):
        """The full map of events C (m, d): (U (m, d) in the cube, log density (m,))."""
        U, logd = self.base_forward(C)
        for layer in self.layers:
            layer.forward(U, logd)
        return U, logd

    def log_density(self, C: np.ndarray) -> np.ndarray:
        """Log density (m,) of events C (m, d); the mixture's alone when it is the whole model."""
        if self.density_is_base():
            return self.base_forward(C, want_u=False)[1]
        return self.forward(C)[1]

    def inverse(self, C: np.ndarray, out: np.ndarray) -> None:
        """Points C (m, d) of the cube (overwritten) back to events in ``out`` (m, d)."""
        for layer in reversed(self.layers):
            layer.inverse(C)
        self.base_inverse(C, out)
