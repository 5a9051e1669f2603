"""The exception types Boscage raises for problems a user can act on.

Every message is written for a scientist: it names the file (where there is
one) and says what is wrong in the trade's words.  Catch :class:`BoscageError`
to handle all of them.  The errors about bad values (a damaged file, unusable
events, a bad setting, channel, transform, matrix, region or recipe) are also
:class:`ValueError`, the type numpy / scikit-learn users catch for bad input,
so code written for those libraries handles them too.
"""

from __future__ import annotations

import os


class BoscageError(Exception):
    """Base class of every error Boscage raises on purpose."""


class FcsFileError(BoscageError, ValueError):
    """An FCS file cannot be read: broken, truncated or not FCS at all."""

    def __init__(self, path: str | os.PathLike | None, problem: str):
        self.path = None if path is None else os.fspath(path)
        self.problem = problem
        where = f"{os.path.basename(self.path)}" if self.path else "FCS data"
        super().__init__(f"{where}: {problem}" + (f" (file: {self.path})" if self.path else ""))


class ChannelError(BoscageError, ValueError):
    """A channel is missing, duplicated or unsuitable for the requested use."""


class CompensationError(BoscageError, ValueError):
    """A spillover matrix is malformed, singular or does not match the file."""


class TransformError(BoscageError, ValueError):
    """A transform's parameters are invalid."""


class EventDataError(BoscageError, ValueError):
    """Event values are unusable (NaN/inf, too few events, constant channel)."""


class ParameterError(BoscageError, ValueError):
    """A setting of the density engine (or a count such as the number of draws) is invalid."""


class ModelFileError(BoscageError, ValueError):
    """A saved density model is damaged, foreign or from a newer version."""


class RecipeError(BoscageError, ValueError):
    """A recipe file is invalid or does not fit the event file."""


class RegionError(BoscageError, ValueError):
    """A region definition is invalid (bad vertices, unknown channel, cycle)."""


class ExportError(BoscageError):
    """Writing an output file failed; nothing half-written is left behind."""


class Cancelled(BoscageError):
    """Long work was cancelled by the user; partial results are kept."""


class NotFittedError(BoscageError, ValueError, AttributeError):
    """A density model was used before it was fitted (also the ValueError and
    AttributeError that scikit-learn's own not-fitted error is)."""
