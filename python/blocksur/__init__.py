"""blocksur: systems of regression equations with correlated errors (seemingly unrelated
regressions), estimated by OLS, two-step FGLS and iterated FGLS, blockwise: the NT x NT
covariance is never formed.

Example
-------
>>> import numpy as np, blocksur
>>> rng = np.random.default_rng(1)
>>> X = np.column_stack([np.ones(40), rng.normal(size=40)])
>>> system = blocksur.EquationSystem([(X @ [1.0, 0.5] + rng.normal(size=40), X),
...                                   (X[:, :1] * 2 + rng.normal(size=(40, 1)), X[:, :1])])
>>> system.fit("fgls").coef.index.names
FrozenList(['equation', 'regressor'])
"""

from ._core import __version__, build_info, get_threads, set_threads
from ._fit import FittedSystem
from ._tests import HypothesisTestResult
from ._system import EquationSystem
from ._frame import SampleInfo
from ._stream import RowlessFit, StreamInfo, fit_chunks, fit_parquet
from ._dask import fit_dask
from ._many import ManyFits, fit_groups, fit_stacked
from .errors import (
    BlocksurError,
    BlocksurWarning,
    CollinearityError,
    DataNotKeptError,
    EmptySystemError,
    FormulaError,
    IllConditionedWarning,
    InputError,
    InvalidOptionError,
    MissingDependencyError,
    NonFiniteError,
    NotConvergedWarning,
    NumericalError,
    RestrictionError,
    RestrictionSyntaxError,
    ShapeMismatchError,
    SingularOmegaError,
    TooFewObservationsError,
    UnknownColumnError,
    VarianceRangeWarning,
)

__all__ = [
    "__version__",
    "build_info",
    "get_threads",
    "set_threads",
    "EquationSystem",
    "FittedSystem",
    "SampleInfo",
    "BlocksurError",
    "BlocksurWarning",
    "CollinearityError",
    "EmptySystemError",
    "IllConditionedWarning",
    "InputError",
    "InvalidOptionError",
    "NonFiniteError",
    "NotConvergedWarning",
    "NumericalError",
    "RestrictionError",
    "RestrictionSyntaxError",
    "HypothesisTestResult",
    "ShapeMismatchError",
    "SingularOmegaError",
    "TooFewObservationsError",
    "UnknownColumnError",
    "VarianceRangeWarning",
    "FormulaError",
    "MissingDependencyError",
    "DataNotKeptError",
    "fit_chunks",
    "fit_parquet",
    "fit_dask",
    "fit_groups",
    "fit_stacked",
    "RowlessFit",
    "StreamInfo",
    "ManyFits",
]
