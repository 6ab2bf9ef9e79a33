"""What the report shows, as plain data: the bridge between run/grading objects and layout.

:func:`build_content` reads a ``RunData`` (store contract) and a ``LotGrade`` (grading contract)
and returns a :class:`ReportContent` of strings and SI floats; the layout code
(:mod:`benchrun.report.pages_blocks`) never touches the run or grading objects. The same content
becomes the JSON attachment (:func:`attachment_dict`) that verification compares with a
re-analysis of the raw record.
"""

from __future__ import annotations

import datetime as _dt
from dataclasses import dataclass, field
from typing import Any

#: Metric keys shown in the device table when they are graded, in this order (DESIGN §3).
METRIC_ORDER = (
    "trr_s", "qrr_C", "irrm_A", "err_J", "ta_s", "tb_s", "softness", "rrsf", "vrm_V",
    "didt_A_per_s", "if_A", "vr_V", "eon_J", "eon_recovery_J",
)

#: Display label and SI unit of every metric key (``RecoveryMetrics.to_dict()`` keys).
METRIC_LABELS: dict[str, tuple[str, str]] = {
    "if_A": ("IF", "A"),
    "t0_s": ("t0", "s"),
    "irrm_A": ("Irrm", "A"),
    "ta_s": ("ta", "s"),
    "tb_s": ("tb", "s"),
    "trr_s": ("trr", "s"),
    "softness": ("S = tb/ta", ""),
    "rrsf": ("RRSF", ""),
    "qrr_C": ("Qrr", "C"),
    "err_J": ("Err", "J"),
    "didt_A_per_s": ("di/dt", "A/s"),
    "vrm_V": ("VRM", "V"),
    "vr_V": ("VR", "V"),
    "eon_J": ("Eon", "J"),
    "eon_recovery_J": ("Eon (recovery part)", "J"),
    "t_irrm_s": ("t(Irrm)", "s"),
    "t_trr_s": ("t(trr)", "s"),
    "t2_s": ("t2", "s"),
}

_SUFFIX_UNITS = (("_A_per_s", "A/s"), ("_J", "J"), ("_C", "C"), ("_s", "s"), ("_A", "A"),
                 ("_V", "V"), ("_W", "W"), ("_K", "K"))


def label_unit(key: str) -> tuple[str, str]:
    """Display label and SI unit of a metric key; unknown keys get their unit from the
    ``_<unit>`` suffix naming convention of the analysis results (``eon_J`` → J)."""
    if key in METRIC_LABELS:
        return METRIC_LABELS[key]
    for suffix, unit in _SUFFIX_UNITS:
        if key.endswith(suffix):
            return key[: -len(suffix)].replace("_", " "), unit
    return key.replace("_", " "), ""


@dataclass(frozen=True)
class WaveformMarks:
    """Instants and levels to mark on a recovery plot (absolute times, SI units)."""

    t0_s: float | None
    t_irrm_s: float | None
    irrm_A: float | None
    t_trr_s: float | None
    t2_s: float | None
    if_A: float | None = None
    vrm_V: float | None = None
    fit_high: float = 0.9


#: The one word for each state, the same in the PDF, the JSON attachment, the command line and
#: ``benchrun reports list`` (they are ``LotGrade``'s own words: nothing is translated).
DISPOSITIONS = ("accept", "reject")
OUTCOMES = ("conforming", "non-conforming", "indeterminate", "invalid")


@dataclass(frozen=True)
class Cell:
    """One graded metric of one device at one condition."""

    value: float | None
    expanded_u: float | None
    grade: str | None  # conforming / non-conforming / indeterminate / invalid / None
    limit: str = ""


@dataclass(frozen=True)
class DeviceLine:
    """One row of the device table: a device at one condition."""

    serial: str
    condition: str
    cells: dict[str, Cell]
    bin: str
    verdict: str
    note: str = ""


@dataclass(frozen=True)
class WaveformRequest:
    """A shot whose recovery is plotted, and why."""

    raw_ref: str
    serial: str
    condition: str
    why: str  # "representative" or the verdict that put it there


@dataclass
class ReportContent:
    """Everything the report prints, as strings and SI floats."""

    report_id: str
    generated_utc: str
    company: str
    part: str
    lot: str
    run_id: str
    software_version: str
    disposition: str
    disposition_reasons: list[str]
    signer_name: str
    signer_role: str
    signer_organisation: str
    signer_fingerprint: str
    run_window: str = ""
    conditions_table: list[list[str]] = field(default_factory=list)
    instruments_table: list[list[str]] = field(default_factory=list)
    fixture_table: list[list[str]] = field(default_factory=list)
    definitions_table: list[list[str]] = field(default_factory=list)
    decision_rule: list[str] = field(default_factory=list)
    budget_table: list[list[str]] = field(default_factory=list)
    metric_columns: list[str] = field(default_factory=list)
    devices: list[DeviceLine] = field(default_factory=list)
    counts: dict[str, int] = field(default_factory=dict)
    statistics_table: list[list[str]] = field(default_factory=list)
    distributions: list[dict[str, Any]] = field(default_factory=list)
    trends: list[dict[str, Any]] = field(default_factory=list)
    temperature_log: list[tuple[int, float | None, float]] = field(default_factory=list)
    waveforms: list[WaveformRequest] = field(default_factory=list)
    manifest: list[dict[str, Any]] = field(default_factory=list)
    shots: list[dict[str, Any]] = field(default_factory=list)
    lot_grade: dict[str, Any] = field(default_factory=dict)
    analysis_options: dict[str, Any] = field(default_factory=dict)
    limits_file: str = "limits.yaml"
    limits_table: list[list[str]] = field(default_factory=list)
    bins_table: list[list[str]] = field(default_factory=list)
    bins_rule: str = ""
    setup_table: list[list[str]] = field(default_factory=list)
    traceability_table: list[list[str]] = field(default_factory=list)
    record_table: list[list[str]] = field(default_factory=list)
    shot_log_table: list[list[str]] = field(default_factory=list)
    outliers_table: list[list[str]] = field(default_factory=list)
    outlier_test: str = ""
    column_units: dict[str, tuple[float, str]] = field(default_factory=dict)
    budget_tables: list[tuple[str, list[list[str]]]] = field(default_factory=list)
    code_sha256: str = ""
    # a lot tested in several runs (empty for the report of one run): benchrun.report.facts_lot
    lot_runs: list[dict[str, Any]] = field(default_factory=list)
    lot_runs_table: list[list[str]] = field(default_factory=list)
    retest_rule: str = ""
    superseded: list[dict[str, Any]] = field(default_factory=list)
    superseded_table: list[list[str]] = field(default_factory=list)
    unfinished: list[str] = field(default_factory=list)
    run_instruments: list[tuple[str, list[list[str]]]] = field(default_factory=list)
    store_url: str = ""
    limits_run_id: str | None = None


def new_report_id(run_id: str, when: _dt.datetime) -> str:
    """Report identifier: run id, the UTC second it was issued and 4 random hex digits (two
    reports of one run issued in the same second still get different identifiers)."""
    import secrets

    return f"RPT-{run_id}-{when.strftime('%Y%m%dT%H%M%SZ')}-{secrets.token_hex(2)}"


def attachment_dict(content: ReportContent) -> dict[str, Any]:
    """The JSON embedded in the PDF: every number verification compares."""
    return {
        "format": "benchrun-report",
        "format_version": 1,
        "report_id": content.report_id,
        "generated_utc": content.generated_utc,
        "run_id": content.run_id,
        "part": content.part,
        "lot": content.lot,
        "software_version": content.software_version,
        "analysis_code_sha256": content.code_sha256,
        "disposition": content.disposition,
        "disposition_reasons": list(content.disposition_reasons),
        "counts": dict(content.counts),
        "signer": {
            "name": content.signer_name,
            "role": content.signer_role,
            "certificate_sha256": content.signer_fingerprint,
        },
        "analysis_options": content.analysis_options,
        "limits_file": content.limits_file,
        "shots": content.shots,
        "devices": [
            {
                "serial": d.serial,
                "condition": d.condition,
                "bin": d.bin,
                "verdict": d.verdict,
                "grades": {k: c.grade for k, c in d.cells.items()},
                "expanded_uncertainty": {k: c.expanded_u for k, c in d.cells.items()},
            }
            for d in content.devices
        ],
        "lot_grade": content.lot_grade,
        "manifest": content.manifest,
        **(_lot_attachment(content) if content.lot_runs else {}),
    }


def _lot_attachment(content: ReportContent) -> dict[str, Any]:
    """The keys a lot report adds (``kind: lot``): its runs (bench, status, devices counted,
    manifest entries), the retest rule, the superseded tests, the devices tested only in runs
    that did not complete, the store and the run whose limits file was graded against."""
    return {
        "kind": "lot",
        "lot_runs": content.lot_runs,
        "retest_rule": content.retest_rule,
        "superseded": content.superseded,
        "unfinished": content.unfinished,
        "store_url": content.store_url,
        "limits_run_id": content.limits_run_id,
    }
