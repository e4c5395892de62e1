"""pandera schemas for every table that enters or leaves sced-audit.

Input side: raw rows (schemas.input). Clean side: observations, accepted cases, adjustments and
quarantine (schemas.tables). Results tables are described in schemas.results.
"""

from schemas.input import RawRows
from schemas.tables import AcceptedCases, Adjustments, Observations, Quarantine

__all__ = ["RawRows", "Observations", "AcceptedCases", "Adjustments", "Quarantine"]
