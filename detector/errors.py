"""Exception hierarchy of frostvane.

Every error a user can cause derives from :class:`DetectorError`; the CLI turns
it into one line on stderr and exit code 2. Classes also inherit from builtins
so that callers may catch ``ValueError`` or ``OSError`` as usual.
"""

__all__ = ["DetectorError", "TileSetError", "SpecError", "ImageError", "ModelError", "CatalogError",
           "KernelRangeError"]


class DetectorError(Exception):
    """Base class of every error caused by bad input."""


class TileSetError(DetectorError, ValueError):
    """A tile set (tiles.csv, consensus.csv or its images) breaks the contract.

    Parameters
    ----------
    problems : list of str
        Every problem found, each naming file, row and value.
    """

    def __init__(self, problems):
        if isinstance(problems, str):
            problems = [problems]
        self.problems = list(problems)
        super().__init__("\n".join(self.problems))


class SpecError(DetectorError, ValueError):
    """A feature or model specification is invalid or does not match the code."""


class ImageError(DetectorError, OSError):
    """An image is missing, unreadable, corrupt or of the wrong shape."""


class ModelError(DetectorError, ValueError):
    """A model folder is missing a file, was tampered with, or cannot be used."""


class CatalogError(DetectorError, ValueError):
    """A fan catalog (detections, a screening folder) or a table read beside it breaks its format."""


class KernelRangeError(DetectorError, ValueError):
    """An array handed to a compiled loop holds an index or bin outside the range the loop writes
    into, or has a shape the loop would read past (compiled loops do not check bounds)."""
