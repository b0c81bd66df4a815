"""The project's exception types.

Library code raises these; only the CLI edge turns them into one-line messages.
Every message is one line and names the file (and page, field) it concerns.
"""

__all__ = [
    "FormreadError", "DataError", "ModelFileError", "ImageError", "LayoutError",
    "RegistrationError", "SegmentationError", "RuleError", "LedgerError",
    "ReviewError", "ParameterError", "ComputeError", "ClusterError", "WriteError", "one_line", "check_param",
]


class FormreadError(Exception):
    """Base of every error formread raises on purpose."""


class ParameterError(FormreadError, ValueError):
    """A bad parameter: names it, says what it must be and what it got."""


class WriteError(FormreadError, OSError):
    """A file cannot be written (a folder in its place, a read-only folder, a full disk); still an OSError
    for callers that catch those."""


class DataError(FormreadError):
    """A dataset or samples folder cannot be used."""


class ModelFileError(FormreadError):
    """A model file is missing, truncated, tampered with or of another version."""


class ImageError(FormreadError):
    """A scan cannot be read: corrupt, truncated, unsupported or oversized."""


class LayoutError(FormreadError):
    """A layout file is malformed or describes an impossible form."""


class RegistrationError(FormreadError):
    """A page cannot be matched to its layout (marks missing, residual too large)."""


class SegmentationError(FormreadError):
    """A field cannot be split into digits."""


class RuleError(LayoutError):
    """A field rule or relation of a layout is malformed or names an unknown field."""


class LedgerError(FormreadError):
    """The results ledger or output folder cannot be used."""


class ReviewError(FormreadError):
    """A review action is refused (stale, malformed, unknown field)."""


class ComputeError(FormreadError):
    """The network's worker processes failed (a worker died or stopped answering)."""


class ClusterError(FormreadError):
    """A Dask cluster cannot be reached or used (``formread read --scheduler``)."""


def one_line(error: BaseException) -> str:
    """The first non-empty line of an error's message, or its class name when it has none.

    The one place where an error becomes the line a person reads (the CLI edge, a failed page's
    recorded reason, a skipped sample's reason).
    """
    for line in str(error).splitlines():
        if line.strip():
            return line.strip()
    return error.__class__.__name__


def check_param(ok: bool, name: str, must: str, got: object) -> None:
    """Raise ParameterError in the project's one message form unless ``ok``."""
    if not ok:
        raise ParameterError(f"parameter {name!r} must be {must}; got {got!r}")
