"""Compiled hot loops of the additive tree density (numba, float64), by concern:

* :mod:`.common`: work splitting, constants, logistic and normal scalars;
* :mod:`.trees`: applying a forest (forward with log densities, inverse);
* :mod:`.tree_fit`: fitting a tree (histograms, best splits, lookahead);
* :mod:`.maps`: the logistic map into the cube, piecewise-linear marginal
  maps and the rotation in Gaussianised coordinates;
* :mod:`.mixture`, :mod:`.mixture_inverse`: the mixture base's density and
  Rosenblatt map (Gaussian or skewed components, logistic or flat-top background);
* :mod:`.em`: the Gaussian-mixture EM pass; :mod:`.skew`: the skew search's solve.

Array conventions (shared with :mod:`core.density.tree`):

* Event matrices are ``(n_events, n_channels)`` C-contiguous float64, in the
  unit cube for the tree kernels.
* A *forest* is a flat set of split nodes (:class:`.trees.ForestArrays`).
  ``roots[t]`` is the index of tree ``t``'s root node (-1 for a tree without
  splits).  For node ``m``: ``dim[m]`` split dimension, ``cut[m]`` split
  location, ``mid[m] = lo + theta (hi - lo)`` the image of the cut, where
  [lo, hi] is the node's extent along ``dim[m]``.  Per side (``code = 2 m +
  side``, side 0 left of the cut): ``child[code]`` (-1 for a leaf) and the
  local CDF piece ``v -> base + (v - anchor) * slope`` with
  ``lslope = log(slope)`` (left: base = anchor = lo, slope = theta
  (hi-lo)/(cut-lo); right: base = mid, anchor = cut, slope =
  (1-theta)(hi-lo)/(hi-cut)).
* Kernels that need many arrays take them as one record (a NamedTuple of
  arrays, which numba compiles as a struct): :class:`.trees.ForestArrays`,
  :class:`core.density.marginals.PiecewiseLinearMap`,
  :class:`.mixture.Components` / :class:`.mixture.ComponentsInner`,
  :class:`.mixture.Background`, :class:`.tree_fit.SplitRule`.

Every kernel is deterministic: parallel loops only split work over events
(each event's result is computed by one thread in a fixed order) or sum
integer counts.  Every kernel is compiled with ``cache=True`` (compiled code
kept beside each module in ``__pycache__``).
"""

from .common import BLOCK, MAX_PATH, PARALLEL_MIN_WORK, U_EPS, ndtr, ndtri, parallel
from .em import EM_PRUNE, em_loglik, em_logpdf, em_stats
from .maps import base_forward, base_inverse, probit_matrix, pwl_forward, pwl_inverse, rotate
from .mixture import (NO_SKEW, Background, Components, ComponentsInner, ComponentsOuter, gmm_forward, gmm_logpdf,
                      skew_forward, skew_logpdf, skew_logpdf_pruned)
from .mixture_inverse import gmm_inverse
from .skew import component_shapes, skew_residual_variance
from .tree_fit import (SplitRule, best_splits, level_histogram, lookahead_split, node_theta, pair_histogram,
                       route_events)
from .trees import ForestArrays, forest_forward, forest_inverse

__all__ = ["BLOCK", "MAX_PATH", "PARALLEL_MIN_WORK", "U_EPS", "ndtr", "ndtri", "parallel", "EM_PRUNE",
           "em_loglik", "em_logpdf", "em_stats",
           "base_forward", "base_inverse", "probit_matrix", "pwl_forward", "pwl_inverse", "rotate",
           "NO_SKEW", "Background", "Components", "ComponentsInner", "ComponentsOuter", "gmm_forward",
           "gmm_logpdf", "skew_forward", "skew_logpdf", "skew_logpdf_pruned", "gmm_inverse", "skew_residual_variance", "component_shapes", "SplitRule", "best_splits",
           "level_histogram", "lookahead_split", "node_theta", "pair_histogram", "route_events",
           "ForestArrays", "forest_forward", "forest_inverse"]
