"""Pellucid's exception hierarchy.

    PellucidError                 every error the core raises on purpose
    ├── ModelLoadError            a spec, weights file or archive that cannot become a model
    ├── ModelOutputError          a model whose forward returns something we cannot score (NaN, no tensor)
    ├── SpecError                 a model spec or policy with a missing, unknown or mistyped key
    ├── ImageDecodeError          bytes that are not an image we can read
    │   └── ImageTooLargeError    an image over the byte or pixel limit
    ├── UnsupportedLayerError     a layer name that does not exist or cannot serve the request
    ├── BadParameterError         a parameter outside its allowed range
    ├── DataError                 an image folder or manifest that cannot be audited
    ├── StoreError                the data folder or its database cannot be used
    ├── ReportError               a report that cannot be printed (the PDF engine or its system libraries)
    ├── NotFoundError             an image, job or run id that this server or store does not hold
    ├── ConflictError             a request that clashes with the state of a run or job (resume twice)
    ├── BusyError                 a queue or a per-client limit is full; try again after ``retry_after`` s
    └── Cancelled                 work stopped because its cancel token was set

Each message says what was received, what was expected and, where it helps, what to do next.
The web layer maps these to 4xx responses and the CLI to one line on stderr and a non-zero exit.
"""

from __future__ import annotations


class PellucidError(Exception):
    """Base class of every error Pellucid raises on purpose."""


class ModelLoadError(PellucidError):
    pass


class ModelOutputError(PellucidError):
    pass


class SpecError(PellucidError):
    pass


class ImageDecodeError(PellucidError):
    pass


class ImageTooLargeError(ImageDecodeError):
    pass


class UnsupportedLayerError(PellucidError):
    pass


class BadParameterError(PellucidError):
    pass


class DataError(PellucidError):
    pass


class StoreError(PellucidError):
    pass


class ReportError(PellucidError):
    pass


class NotFoundError(PellucidError):
    pass


class ConflictError(PellucidError):
    pass


class BusyError(PellucidError):
    """Too much work queued (or running for one client); ``retry_after`` is a suggested wait in seconds."""

    def __init__(self, message: str, *, retry_after: float = 1.0) -> None:
        super().__init__(message)
        self.retry_after = max(1, round(retry_after))


class Cancelled(PellucidError):
    """Raised inside long work when its cancel token is set; jobs turn it into 'cancelled'."""
