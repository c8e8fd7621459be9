"""The exceptions shadow raises.

The numerical core raises only :class:`ShadowError` subclasses; the adapters (MQTT, store, HTTP, CLI)
catch them and turn them into dead letters, HTTP error bodies or a one-line message and exit code.
Each message names the offending field, array or leg and the reason.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray


class ShadowError(Exception):
    """Base for every error this package raises on purpose."""


class ShapeError(ShadowError, ValueError):
    """An array has the wrong shape."""


class NonFiniteError(ShadowError, ValueError):
    """An array holds a NaN or an infinity where a finite number is required."""


class UnitError(ShadowError, ValueError):
    """A value is given in a unit other than the one the field requires."""


class DescriptionError(ShadowError, ValueError):
    """A robot description file is missing a field, has a bad value or an impossible geometry."""


class UnreachablePoseError(ShadowError, ValueError):
    """A platform pose or actuator position lies outside the mechanism's reach."""


class SingularPoseError(ShadowError, ValueError):
    """The mechanism is at or too near a singular configuration for the computation asked."""


class ConvergenceError(ShadowError, RuntimeError):
    """An iterative solver did not converge within its iteration cap."""


class StaleDataError(ShadowError, RuntimeError):
    """No fresh samples in the window."""


class DecodeError(ShadowError, ValueError):
    """A wire message cannot be decoded or fails validation."""


class ConfigurationError(ShadowError, ValueError):
    """A configuration or baseline file is missing a field or has a bad value."""


def expect_shape(name: str, a: NDArray[np.float64], shape: tuple[int | None, ...]) -> None:
    """Raise :class:`ShapeError` unless ``a.shape`` matches ``shape``; ``None`` matches any length.

    >>> expect_shape("q", np.zeros((4, 3)), (None, 3))
    >>> expect_shape("q", np.zeros((4, 2)), (None, 3))
    Traceback (most recent call last):
    ...
    shadow.errors.ShapeError: q: expected shape (N, 3), got (4, 2)
    """
    ok = a.ndim == len(shape) and all(s is None or s == d for s, d in zip(shape, a.shape, strict=True))
    if not ok:
        wanted = "(" + ", ".join("N" if s is None else str(s) for s in shape) + (",)" if len(shape) == 1 else ")")
        raise ShapeError(f"{name}: expected shape {wanted}, got {a.shape}")


def expect_finite(name: str, a: NDArray[np.float64]) -> None:
    """Raise :class:`NonFiniteError` if ``a`` holds a NaN or an infinity, naming the first bad index."""
    bad = ~np.isfinite(a)
    if bad.any():
        first = tuple(int(i) for i in np.argwhere(bad)[0])
        raise NonFiniteError(f"{name}: non-finite value {a[first]!r} at index {first}")


class RejectedMessageError(DecodeError):
    """A wire message or topic was rejected.

    ``reason_code`` is a short machine code for counters and dead letters (``"bad_shape"``,
    ``"bad_unit"``, ...; the list is in docs/wire-format.md); ``reason`` is the human message,
    naming the field. ``str(error)`` is ``"<reason_code>: <reason>"``.
    """

    def __init__(self, reason_code: str, reason: str) -> None:
        super().__init__(f"{reason_code}: {reason}")
        self.reason_code = reason_code
        self.reason = reason

    def __reduce__(self) -> tuple[type[RejectedMessageError], tuple[str, str]]:
        return (type(self), (self.reason_code, self.reason))


class TimeOrderError(ShadowError, ValueError):
    """Sample times are not strictly increasing (or a batch starts before the previous one ended)."""


class OutOfRangeError(ShadowError, ValueError):
    """A numeric argument lies outside its valid range (negative time step, non-positive bandwidth or lead, ...)."""


class RecordingError(ShadowError, ValueError):
    """A recording cannot be read, or does not belong to the described robot (message names file, line, field)."""
