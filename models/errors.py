"""Model-layer errors (the hierarchy's root is in liftpool.data_prep.errors)."""

from __future__ import annotations

from liftpool.data_prep.errors import ConfigError, InputError, LiftpoolError

__all__ = ["FitError", "NotConvergedError", "ConfigError", "InputError", "LiftpoolError"]


class FitError(LiftpoolError):
    """The model could not be fitted (sampler failure, impossible data)."""

    exit_code = 1


class NotConvergedError(FitError):
    """The fit failed its convergence checks (raised only when asked to be strict)."""

    exit_code = 3
