"""One exception family for everything the core raises on purpose.

Each class is also a built-in exception, so callers that only know
``ValueError`` or ``RuntimeError`` still catch it. Messages name the argument
and show what came in, in one line a user can read.
"""

from __future__ import annotations

__all__ = [
    "RecinetError",
    "NetError",
    "ParameterError",
    "ImageError",
    "FitError",
    "SeriesError",
    "TimeLimitError",
]


class RecinetError(Exception):
    """Base of every error the core raises on purpose."""


class NetError(RecinetError, ValueError):
    """A net, net string, surface preset or superstructure matrix is invalid."""


class ParameterError(RecinetError, ValueError):
    """A numerical parameter is out of its physical range (energy, tolerance...)."""


class ImageError(RecinetError, ValueError):
    """Unreadable, corrupt, empty, too large or not a 2-D image."""


class FitError(RecinetError, RuntimeError):
    """Too few spots, or a fit did not converge."""


class SeriesError(RecinetError, ValueError):
    """An energy series is inconsistent (frame sizes, energies, sidecar files)."""


class TimeLimitError(RecinetError, TimeoutError):
    """Long work ran past its time limit and was stopped."""
