"""Exceptions and warnings raised by blocksur.

Every error says what to fix and carries the details as attributes (``equation``, ``row``,
``column``, ...), so that code can react to a specific failure. Errors caused by the data or the
options subclass :class:`ValueError` as well as :class:`BlocksurError`.

Example
-------
>>> import numpy as np, blocksur
>>> y = np.arange(5.0); X = np.ones((5, 2))
>>> try:
...     blocksur.EquationSystem({"a": (y, X)}).fit("ols")
... except blocksur.CollinearityError as err:
...     print(err.equation, err.column)
a x1
"""

from __future__ import annotations

__all__ = [
    "BlocksurError",
    "InputError",
    "EmptySystemError",
    "ShapeMismatchError",
    "NonFiniteError",
    "TooFewObservationsError",
    "CollinearityError",
    "SingularOmegaError",
    "InvalidOptionError",
    "NumericalError",
    "BlocksurWarning",
    "NotConvergedWarning",
    "IllConditionedWarning",
    "VarianceRangeWarning",
]


class BlocksurError(Exception):
    """Base class of every error blocksur raises on purpose."""

    def __init__(self, message: str = "", **details: object) -> None:
        super().__init__(message)
        self.message = message
        for key, value in details.items():
            setattr(self, key, value)

    def __reduce__(self):  # keep details through pickling (multiprocessing, dask)
        details = {k: v for k, v in self.__dict__.items() if k != "message"}
        return (_rebuild, (type(self), self.message, details))


def _rebuild(cls, message, details):
    return cls(message, **details)


class InputError(BlocksurError, ValueError):
    """The data or the specification of the system cannot be estimated as given."""


class EmptySystemError(InputError):
    """The system has no equations."""


class ShapeMismatchError(InputError):
    """Shapes do not fit together (lengths differ, wrong dimensions, duplicate names).

    Attributes: ``equation``.
    """

    equation: str | None = None


class NonFiniteError(InputError):
    """A NaN or infinity in the data.

    Attributes: ``equation``; ``row`` (0-based position); ``column`` (the regressor name, or
    ``None`` for the dependent variable).
    """

    equation: str | None = None
    row: int | None = None
    column: str | None = None


class TooFewObservationsError(InputError):
    """An equation has no more observations than regressors.

    Attributes: ``equation``, ``n_obs``, ``n_regressors``.
    """

    equation: str | None = None


class CollinearityError(InputError):
    """A regressor is zero or a linear combination of the regressors before it.

    Attributes: ``equation``; ``column`` (the regressor to drop or reparameterise).
    """

    equation: str | None = None
    column: str | None = None


class SingularOmegaError(BlocksurError, ValueError):
    """The cross-equation covariance of the residuals is singular.

    Typical causes: equations whose dependent variables add up to a constant (budget shares),
    an equation that repeats another or fits exactly, more equations than observations.
    Attributes: ``equations`` (the equations involved).
    """

    equations: list[str] | None = None


class InvalidOptionError(BlocksurError, ValueError):
    """An option outside its domain (unknown method, negative tolerance, ...)."""


class NumericalError(BlocksurError, ArithmeticError):
    """A linear-algebra failure that the input checks did not foresee."""


class BlocksurWarning(UserWarning):
    """Base class of blocksur's warnings."""


class NotConvergedWarning(BlocksurWarning):
    """An iterated fit stopped at ``max_iter`` before meeting ``tol``."""


class IllConditionedWarning(BlocksurWarning):
    """A regressor block or the estimated Omega is ill-conditioned enough to cost digits; the
    message gives the condition number estimate."""


class VarianceRangeWarning(BlocksurWarning):
    """Some coefficient variances in :attr:`FittedSystem.vcov` are beyond double precision
    (overflowed to inf or underflowed to 0: regressors in units near 1e+-160 or beyond). The
    standard errors are computed apart and stay finite; the message names the coefficients."""


class RestrictionError(InputError):
    """A restriction cannot be imposed: unknown names, no coefficient mentioned, redundant or
    inconsistent with the others.

    Attributes: ``index`` (0-based position of the offending restriction, when one is to blame).
    """

    index: int | None = None


class RestrictionSyntaxError(RestrictionError):
    """A restriction string could not be read.

    Attributes: ``text`` (the restriction), ``position`` (0-based character offset).
    """

    text: str | None = None
    position: int | None = None


__all__ += ["RestrictionError", "RestrictionSyntaxError"]


class UnknownColumnError(InputError):
    """An equation names a column that the data do not have.

    Attributes: ``equation``; ``column`` (the missing name); ``suggestions`` (close matches among
    the data's columns).
    """

    equation: str | None = None
    column: str | None = None
    suggestions: list[str] | None = None


class FormulaError(InputError):
    """An equation's formula could not be read or evaluated.

    Attributes: ``equation``; ``formula`` (the text as given).
    """

    equation: str | None = None
    formula: str | None = None


class MissingDependencyError(BlocksurError, ImportError):
    """An optional package needed by the feature used is not installed.

    Attributes: ``package`` (the name to install with pip).
    """

    package: str | None = None


class DataNotKeptError(BlocksurError, RuntimeError):
    """The fit was restored (from a dict or a pickle) without the data this method needs.

    Refit the system, or keep the regressors when saving (``to_dict(keep_data=True)``).
    """


__all__ += ["UnknownColumnError", "FormulaError", "MissingDependencyError", "DataNotKeptError"]
