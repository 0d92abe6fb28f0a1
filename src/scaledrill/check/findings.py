"""A named cause of a mismatch, with its evidence and the fix the check proposes."""

from dataclasses import dataclass


@dataclass
class Finding:
    cause: str
    evidence: str
    fix: str
