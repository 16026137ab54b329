"""From a tile's maps to objects: dark candidates, their fan and spot readings, the object catalog.

``assemble`` finds dark components and reads each under several interpretations; the per-component
loops of the readings are compiled in ``_readings``.
"""

from .assemble import (
    OBJECT_COLUMNS,
    OBJECT_FEATURE_NAMES,
    AssemblyParams,
    Candidate,
    PatchField,
    candidate_rows,
    find_candidates,
    local_darkness,
    objects_from_candidates,
    reading_matrix,
)

__all__ = [
    "AssemblyParams",
    "Candidate",
    "OBJECT_COLUMNS",
    "OBJECT_FEATURE_NAMES",
    "PatchField",
    "candidate_rows",
    "find_candidates",
    "local_darkness",
    "objects_from_candidates",
    "reading_matrix",
]
