"""The additive tree density: a density estimate for events x channels learned
by unsupervised tree boosting (exact log density, exact inverse map, exact
sampling).  See :mod:`core.density.model` for the method and its design.

    from core.density import AdditiveTreeDensity
    model = AdditiveTreeDensity(random_state=0).fit(events)
    log_density = model.score_samples(events)
"""

# OMP_WAIT_POLICY=PASSIVE is set in core/__init__.py, before any parallel kernel runs.
from .model import AdditiveTreeDensity

__all__ = ["AdditiveTreeDensity"]
