"""Model-layer errors (the hierarchy's root is in liftpool.data_prep.errors)."""

from __future__ import annotations

from liftpool.data_prep.errors import ConfigError, InputError, LiftpoolError

__all__ = ["FitError", "NotConvergedError", "ConfigError", "InputError", "LiftpoolError", "LiftpoolWarning"]


class FitError(LiftpoolError):
    """The model could not be fitted (sampler failure, impossible data)."""

    exit_code = 1


class NotConvergedError(FitError):
    """The fit failed its convergence checks (raised only when asked to be strict)."""

    exit_code = 3


class LiftpoolWarning(UserWarning):
    """A result that needs the reader's attention (a fit that did not converge, a model flag)."""
