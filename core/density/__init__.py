"""The additive tree density: a density estimate for events x channels learned
by unsupervised tree boosting (exact log density, exact inverse map, exact
sampling).  See :mod:`core.density.model` for the method and its design.

    from core.density import AdditiveTreeDensity
    model = AdditiveTreeDensity(random_state=0).fit(events)
    log_density = model.score_samples(events)
"""

import os as _os

# OpenMP threads that spin while waiting make numba's parallel loops hundreds
# of times slower on a busy machine (a desktop running other work); waiting
# passively costs microseconds per parallel region.  Must be set before the
# first parallel kernel loads the OpenMP runtime; a user's setting wins.
_os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

from .model import AdditiveTreeDensity  # noqa: E402

__all__ = ["AdditiveTreeDensity"]
