"""The former home of the mixture base, kept so existing imports keep working:
the class is :class:`core.density.mixture_base.MixtureBase` (Gaussian or skewed
components), fitted by :func:`core.density.mixture_fit.fit_mixture` with a
:class:`~core.density.mixture_fit.MixtureSettings` record."""

from __future__ import annotations

from .em import MIN_BACKGROUND
from .mixture_base import (_Z_MAX, BACKGROUND_LOGISTIC_SHARE, BASE_CHOICES, BASES, MAX_SKEW, MIXTURE_BASES, U_CLIP,
                           MixtureBase)
from .mixture_fit import COUNT_SE, DEFAULT_COMPONENTS, SPLIT_SPLIT_FROM, MixtureSettings, fit_mixture

__all__ = ["GaussianMixtureBase", "MixtureBase", "MixtureSettings", "fit_mixture", "BASES", "MIXTURE_BASES",
           "BASE_CHOICES", "U_CLIP", "MIN_BACKGROUND", "DEFAULT_COMPONENTS", "SPLIT_SPLIT_FROM", "COUNT_SE",
           "MAX_SKEW", "BACKGROUND_LOGISTIC_SHARE", "_Z_MAX"]


class GaussianMixtureBase(MixtureBase):
    """:class:`MixtureBase` with a ``fit`` classmethod that takes the settings as keywords
    (the former signature), for callers written before :class:`MixtureSettings`."""

    @classmethod
    def fit(cls, X, loc, scale, settings=None, validation=None, progress=None, **keywords):
        """As :func:`fit_mixture`; ``keywords`` are fields of :class:`MixtureSettings`."""
        if keywords:
            settings = MixtureSettings(**{**(settings.__dict__ if settings else {}), **keywords})
        return fit_mixture(X, loc, scale, settings, validation=validation, progress=progress, cls=cls)
