"""What verification answers: named yes/no checks with reasons (:class:`Check`), and the
whole result (:class:`VerificationResult`). Imported by every ``verify_*`` module; imports none.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

CHECK_SIGNATURE = "signature intact"
CHECK_TRUST = "signer trusted"
CHECK_MANIFEST = "manifest hashes match"
CHECK_REANALYSIS = "re-analysis reproduces the report"
CHECK_REGISTRATION = "reports-table row matches the signed report"
#: Every check, in the order they are reported.
ALL_CHECKS = (CHECK_SIGNATURE, CHECK_TRUST, CHECK_MANIFEST, CHECK_REANALYSIS,
              CHECK_REGISTRATION)
#: A lot report (several runs) also answers these two (:mod:`benchrun.report.verify_lot`).
CHECK_RUNS = "every run of the lot found"
CHECK_LOT = "the retest rule reproduces the lot"


@dataclass(frozen=True)
class Check:
    """One verification check: its name, yes/no, the reason and supporting details.

    ``applicable`` False: the check does not apply to this kind of report (``ok`` is then
    True and ``reason`` says why it does not apply)."""

    name: str
    ok: bool
    reason: str
    details: tuple[str, ...] = ()
    applicable: bool = True

    def to_dict(self) -> dict[str, Any]:
        return {"name": self.name, "ok": self.ok, "reason": self.reason,
                "details": list(self.details), "applicable": self.applicable}


@dataclass(frozen=True)
class VerificationResult:
    """All checks of one report; ``ok`` only when every check holds."""

    report: str
    checks: tuple[Check, ...]
    report_id: str | None = None
    facts: dict[str, Any] = field(default_factory=dict)

    @property
    def ok(self) -> bool:
        return bool(self.checks) and all(c.ok for c in self.checks)

    def check(self, name: str) -> Check:
        for item in self.checks:
            if item.name == name:
                return item
        raise KeyError(name)

    def to_dict(self) -> dict[str, Any]:
        return {"report": self.report, "report_id": self.report_id, "ok": self.ok,
                "checks": [c.to_dict() for c in self.checks], "facts": self.facts}


