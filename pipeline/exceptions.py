"""Exception and warning classes of the pipeline.

Bad input raises the built-in ``ValueError``/``TypeError`` (or the subclasses
below where a caller may want to catch them specifically).  Recoverable
conditions warn with a subclass of :class:`PipelineWarning` and carry on.
"""

__all__ = [
    "AstrometryError",
    "AstrometryWarning",
    "CalibrationWarning",
    "ConfigError",
    "DamagedProductError",
    "DetectWarning",
    "GeometryWarning",
    "IngestError",
    "PipelineError",
    "PipelineWarning",
    "RectifyWarning",
    "ReferenceCatalogError",
    "RunLockedError",
    "RunStartError",
    "StageError",
    "StaleLockWarning",
]


class PipelineError(Exception):
    """Base class of the pipeline's own errors."""


class ConfigError(PipelineError, ValueError):
    """A configuration file or override is invalid.

    The message names the file, the key path and, where known, the line.
    """


class IngestError(PipelineError, ValueError):
    """A raw block cannot be used; the message names the file and the reason."""


class StageError(PipelineError):
    """A stage failed on one stretch; the runner logs it and goes on."""


class AstrometryError(PipelineError):
    """A night's astrometric solution failed (e.g. too few matches).

    The message gives the counts and the likely causes; ``counts`` holds them
    for a program (detections, reference stars in the band and on the chip,
    matched pairs, pairs expected by chance).
    """

    def __init__(self, message: str, counts: dict | None = None):
        super().__init__(message)
        self.counts = dict(counts or {})

    def __reduce__(self):
        return type(self), (str(self), self.counts)


class RunLockedError(PipelineError):
    """Another live run holds the lock on the output folder."""


class RunStartError(PipelineError):
    """A run cannot start: its output folder or lock cannot be written (e.g. a full disk)."""


class DamagedProductError(PipelineError):
    """A stored product cannot be read, or its content differs from its recorded SHA-256.

    ``path`` is the product file, ``reason`` says what is wrong with it.
    """

    def __init__(self, path, reason: str):
        super().__init__(f"{path}: {reason}")
        self.path = str(path)
        self.reason = reason

    def __reduce__(self):
        return type(self), (self.path, self.reason)


class PipelineWarning(UserWarning):
    """Base class of the pipeline's warnings."""


class GeometryWarning(PipelineWarning):
    """The geometry is less accurate than usual (e.g. past the IERS tables)."""


class StaleLockWarning(PipelineWarning):
    """A run lock left by a dead process was taken over."""


class CalibrationWarning(PipelineWarning):
    """Calibration is less reliable than usual (e.g. too little sky variation)."""


class RectifyWarning(PipelineWarning):
    """Rectification is degraded (e.g. too small an overlap between stretches)."""


class AstrometryWarning(PipelineWarning):
    """The astrometric solution is less reliable than usual (e.g. few stars in a stretch)."""


class DetectWarning(PipelineWarning):
    """Source detection found nothing to measure or measured less reliably than usual."""


class ReferenceCatalogError(PipelineError, ValueError):
    """A reference catalogue cannot be used for the night.

    Raised for a missing or empty file, configured columns that the file does
    not have, or a catalogue without stars in the night's band; the message
    says what to change.
    """
