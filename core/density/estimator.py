"""Estimator conventions shared by the density engine's public class: the
settings are the keyword arguments of ``__init__`` (the one place they are
listed), read by :meth:`Settings.param_names`; ``get_params`` /
``set_params`` / ``__repr__`` follow them, so scikit-learn's ``clone``,
``GridSearchCV`` and ``cross_val_score`` work without this package importing
scikit-learn.  Fitted attributes (names ending in ``_``) read the fitted
record and raise :class:`~core.errors.NotFittedError` before a fit."""

from __future__ import annotations

import inspect
import sys
from typing import Any

from ..errors import NotFittedError, ParameterError


class Settings:
    """Mix-in for a class whose settings are its ``__init__`` keywords, each stored
    as an attribute of the same name."""

    @classmethod
    def param_names(cls) -> tuple[str, ...]:
        """The settings' names, in the order of ``__init__``."""
        return tuple(n for n in inspect.signature(cls.__init__).parameters if n != "self")

    @classmethod
    def default_params(cls) -> dict[str, Any]:
        """Each setting's default value."""
        params = inspect.signature(cls.__init__).parameters
        return {n: params[n].default for n in cls.param_names()}

    def get_params(self, deep: bool = True) -> dict[str, Any]:
        """The settings as a dict (``deep`` is accepted for scikit-learn; nothing is nested)."""
        return {k: getattr(self, k) for k in self.param_names()}

    def set_params(self, **params):
        """Change settings by name (ParameterError for an unknown name); returns self."""
        names = self.param_names()
        for k, v in params.items():
            if k not in names:
                raise ParameterError(f"unknown density engine setting {k!r}; settings: {', '.join(names)}")
            setattr(self, k, v)
        return self

    def __repr__(self) -> str:
        defaults = self.default_params()
        changed = [f"{k}={v!r}" for k, v in self.get_params().items() if not _same(v, defaults[k])]
        return f"{type(self).__name__}({', '.join(changed)})"

    def __sklearn_tags__(self):
        """Estimator tags for scikit-learn: 2-D numeric input, no target.  Only
        scikit-learn calls this, so its module is loaded already (never imported here)."""
        utils = sys.modules["sklearn.utils"]
        return utils.Tags(estimator_type=None, target_tags=utils.TargetTags(required=False),
                          input_tags=utils.InputTags(two_d_array=True))


def _same(a, b) -> bool:
    """True when a setting equals its default (a bool never equals a number)."""
    if isinstance(a, bool) != isinstance(b, bool) or (a is None) != (b is None):
        return False
    try:
        return bool(a == b)
    except (TypeError, ValueError):
        return False


class fitted:
    """A fitted attribute: ``name`` of the estimator's fitted record ``fitted_``
    (NotFittedError, an AttributeError, before a fit so ``hasattr`` is False)."""

    def __init__(self, name: str, doc: str = ""):
        self.name = name
        self.__doc__ = doc

    def __set_name__(self, owner, attr):
        self.attr = attr

    def __get__(self, obj, owner=None):
        if obj is None:
            return self
        record = obj.__dict__.get("fitted_")
        if record is None:
            raise NotFittedError(f"the density model is not fitted yet ({self.attr} is set by fit); "
                                 "call fit(events) first")
        return getattr(record, self.name)
