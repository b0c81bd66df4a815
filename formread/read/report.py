"""What an office must know about its runs: review load, and the error among accepted fields.

The error among accepted fields is estimated from the spot checks (formread.read.audit): a seeded
random share of the fields that would have been accepted was sent to a clerk, so the share of them
the clerk corrected is an unbiased estimate of the error among the accepted ones, reported with
its one-sided 95% Clopper-Pearson upper bound.  No ground truth is needed: this is the figure to
watch in production.  A spot check counts as wrong when the clerk's final value differs from the
reading (a correction, or a blank or unreadable field the reader had read as digits).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from ..ledger.store import open_ledger
from .tune import clopper_pearson_upper

__all__ = ["FieldCounts", "run_report"]

DECIDED = ("confirmed", "corrected", "empty", "unreadable")


@dataclass
class FieldCounts:
    """Counts over fields of one name (or all), and the figures they give."""

    fields: int = 0
    accepted: int = 0
    review: int = 0
    decided: int = 0            # fields a clerk has decided
    audited: int = 0            # sent to review as spot checks
    audited_decided: int = 0
    audited_wrong: int = 0

    def add(self, row: dict) -> None:
        self.fields += 1
        self.accepted += row["decision"] == "accepted"
        self.review += row["decision"] != "accepted"
        decided = row["final_status"] in DECIDED
        self.decided += decided
        if row["audit"]:
            self.audited += 1
            if decided:
                self.audited_decided += 1
                self.audited_wrong += (row["final_value"] if row["final_status"] != "unreadable" else None) \
                    != row["reading"]

    def figures(self) -> dict:
        n = self.audited_decided
        return {"fields": self.fields, "accepted": self.accepted, "review": self.review,
                "review_rate": self.review / self.fields if self.fields else 0.0, "decided": self.decided,
                "audited": self.audited, "audited_decided": n, "audited_wrong": self.audited_wrong,
                "error_among_accepted": self.audited_wrong / n if n else None,
                "error_upper_95": clopper_pearson_upper(self.audited_wrong, n) if n else None}


@dataclass
class RunReport:
    """Per field name and overall, over every output folder given."""

    outdirs: list
    total: FieldCounts = field(default_factory=FieldCounts)
    per_field: dict = field(default_factory=dict)
    audit_rates: list = field(default_factory=list)

    def summary(self) -> dict:
        """JSON-ready figures."""
        return {"outdirs": [str(o) for o in self.outdirs], **self.total.figures(),
                "audit_rates": sorted(set(self.audit_rates)),
                "per_field": {n: c.figures() for n, c in sorted(self.per_field.items())}}


def run_report(outdirs) -> RunReport:
    """Count every field of the ledgers in ``outdirs`` (paths of read output folders).

    Raises
    ------
    LedgerError
        A folder holds no usable ledger.
    """
    rep = RunReport([Path(o) for o in outdirs])
    for outdir in rep.outdirs:
        with open_ledger(outdir, create=False) as led:
            rows = led.field_rows()
            rep.audit_rates += [float(r[0]) for r in led.conn.execute("SELECT audit_rate FROM runs")]
        for row in rows:
            rep.total.add(row)
            rep.per_field.setdefault(row["name"], FieldCounts()).add(row)
    return rep
