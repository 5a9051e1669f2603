"""Early stopping of a boosted sequence on the held-out share: the one rule
the marginal stage and the dependence trees share."""

from __future__ import annotations


class EarlyStopping:
    """Tracks the best prefix of a sequence of fitted trees.

    ``start_ll``: held-out mean log-likelihood before the first tree (nats per
    event); a tree counts as an improvement only when it raises the best so far
    by more than ``tol``; :meth:`exhausted` once ``patience`` trees in a row did
    not.  ``best_k`` trees (a prefix) reach ``best_ll``."""

    def __init__(self, start_ll: float, patience: int, tol: float = 0.0):
        self.best_k = 0
        self.best_ll = float(start_ll)
        self.patience = int(patience)
        self.tol = float(tol)

    def update(self, k: int, ll: float) -> bool:
        """Record tree ``k`` (1-based) reaching ``ll``; True when it is the new best."""
        if ll > self.best_ll + self.tol:
            self.best_k, self.best_ll = k, ll
            return True
        return False

    def exhausted(self, k: int) -> bool:
        """True when the ``patience`` trees up to ``k`` brought no improvement."""
        return k - self.best_k >= self.patience
