"""Parameter checks shared by the drivers: they raise ConfigError naming the parameter and echoing the value."""

from __future__ import annotations

import numbers
import operator

import numpy as np

from .errors import ConfigError

__all__ = ["check_int"]


def check_int(name, value, minimum, maximum=None) -> int:
    """Return ``value`` as a Python int, or raise ConfigError naming ``name`` and echoing the value."""
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Integral):
        raise ConfigError(f"{name} must be an integer, got {value!r}")
    value = operator.index(value)
    if value < minimum:
        raise ConfigError(f"{name} must be >= {minimum}, got {value!r}")
    if maximum is not None and value > maximum:
        raise ConfigError(f"{name} must be <= {maximum}, got {value!r}")
    return value
