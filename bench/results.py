"""What a case hands to the report: its tables, its headline figures, its notes."""

from __future__ import annotations

from dataclasses import dataclass, field

from .stats import Summary
from .tables import Table


@dataclass
class CaseReport:
    """One case's tables (in print order), headline figures, and notes."""

    key: str
    title: str
    intro: str = ""
    tables: list[Table] = field(default_factory=list)
    figures: dict = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)


def iqr_pct(s: Summary) -> str:
    """Half the interquartile range relative to the median: '±3%'."""
    return f"±{50 * s.iqr / s.median:.0f}%" if s.median else ""
