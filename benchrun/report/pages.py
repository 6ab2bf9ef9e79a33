"""The order and wording of the report: cover, conditions, bench, method, results, figures,
cautions, manifest. Layout helpers live in :mod:`benchrun.report.pages_blocks`."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from reportlab.lib.units import mm
from reportlab.platypus import Flowable, Table, TableStyle

from benchrun.report import pages_blocks as sec
from benchrun.report.facts import ReportContent
from benchrun.report.pages_figures import (
    COLOUR_NAMES,
    distribution_figure,
    temperature_log_figure,
    trend_figure,
)
from benchrun.report.pages_style import FONT_REGULAR
from benchrun.report.pages_vector import FigureFlowable

SAFETY_CAUTIONS = (
    "High voltage and stored energy can kill. A double-pulse bench charges capacitors to "
    "hundreds of volts and stores energy in its load inductor; contact with live parts or a "
    "discharge through the body can be fatal.",
    "Only trained and authorised persons may connect, operate or open a test bench. Follow "
    "local electrical safety codes, the site's procedures and licensed practice; they take "
    "precedence over anything in this report or in the software.",
    "Before touching a fixture, switch the supply and pulse outputs off and confirm with a "
    "meter that the bus voltage is below 60 V (touch-safe limit, IEC 61140 / IEC 62368-1 "
    "ES1); bleeders must discharge stored energy to that level within 5 s (IEC 60204-1).",
)

CERTIFICATION_LIMITS = (
    "This report states the measured recovery behaviour of the listed devices under the "
    "stated test conditions, the grades obtained from the stated limits and decision rule, "
    "and the lot disposition that follows from them. It certifies nothing beyond that.",
    "Results apply only to the devices tested, at the measured conditions shown. They do not "
    "extend to other voltages, currents, di/dt, temperatures, circuits or devices not tested.",
    "Measurement uncertainty is the expanded uncertainty U (coverage factor as stated, about "
    "95 % coverage) estimated from the stated budget; it does not cover faults of the bench "
    "outside that budget.",
    "Instrument identities and calibration due dates are as recorded by the test software; "
    "calibration itself is certified by the calibration provider, not by this report.",
    "The signature binds the signer to this file. Any change to the file, or to the raw record, "
    "configuration files or results behind it, is detected by 'benchrun verify'.",
)


def _pair_figures(figures: list[Any], width: float) -> list[Flowable]:
    """Lay small figures out two per row."""
    out: list[Flowable] = []
    for k in range(0, len(figures), 2):
        row = [FigureFlowable(f) for f in figures[k:k + 2]]
        if len(row) == 1:
            row.append(sec.spacer(1))
        table = Table([row], colWidths=[width / 2, width / 2], hAlign="LEFT")
        table.setStyle(TableStyle([
            ("FONT", (0, 0), (-1, -1), FONT_REGULAR, 7.5),  # no base-14 font in the file
            ("LEFTPADDING", (0, 0), (-1, -1), 0), ("RIGHTPADDING", (0, 0), (-1, -1), 0),
            ("VALIGN", (0, 0), (-1, -1), "TOP"),
        ]))
        out.append(table)
    return out


def _run_line(content: ReportContent) -> tuple[str, str]:
    """The cover's run line: the run, or for a lot tested in several runs how many, on
    which benches (every run is listed in section 2)."""
    window = f" ({content.run_window})" if content.run_window else ""
    if not content.lot_runs:
        return "Run", content.run_id + window
    benches = sorted({str(r.get("bench_id") or "not recorded") for r in content.lot_runs})
    return ("Runs", f"{len(content.lot_runs)} runs on {len(benches)} bench(es): "
                    f"{', '.join(benches)}{window}; every run is listed in section 2")


def _verify_hint(content: ReportContent) -> str:
    if not content.lot_runs:
        return "Check it with 'benchrun verify REPORT.pdf --cert SIGNER_CERT --data RUN_FOLDER'."
    return ("Check it with 'benchrun verify REPORT.pdf --cert SIGNER_CERT': the runs are found "
            "through the results store; name folders holding run folders that moved with "
            "--runs DIR (repeatable).")


def _lot_runs_pages(content: ReportContent, w: float) -> list[Flowable]:
    """A lot tested in several runs: the runs, the retest rule and the superseded tests."""
    story = [sec.P("Runs of the lot", "h3"),
             sec.P("Every run of the lot in the results store, with the bench that made it "
                   "and the devices whose shots count from it.", "small"),
             sec.simple_table(content.lot_runs_table,
                              [44 * mm, 18 * mm, 16 * mm, 38 * mm, 18 * mm, 26 * mm,
                               w - 160 * mm]),
             sec.P("Retest rule", "h3"),
             sec.P(f"Retest rule: {content.retest_rule}.", "body")]
    if content.superseded_table:
        story.append(sec.keep(
            sec.P("Superseded tests (kept in the store, not graded)", "h4"),
            sec.simple_table(content.superseded_table,
                             [22 * mm, 52 * mm, 22 * mm, 12 * mm, w - 108 * mm])))
    else:
        story.append(sec.P("No device was tested more than once.", "small"))
    if content.unfinished:
        story.append(sec.P("Devices tested only in a run that did not complete (their shots "
                           "count from the latest such run): "
                           + ", ".join(content.unfinished) + ".", "caution"))
    story.append(sec.P("Instruments per run", "h3"))
    story.append(sec.P("Instruments (identity as reported by the instrument, IEEE 488.2 "
                       "*IDN?) and probes of each run, with their calibration as that run's "
                       "bench file records it.", "small"))
    for title, rows in content.run_instruments:
        story.append(sec.keep(sec.P(title, "h4"), sec.simple_table(
            rows, [26 * mm, 40 * mm, 26 * mm, 20 * mm, 26 * mm, w - 138 * mm])))
    return story


def _cover(content: ReportContent, signature_slot: Flowable, width: float) -> list[Flowable]:
    counts = content.counts
    story: list[Flowable] = [
        sec.P(content.company or "Acceptance report", "title"),
        sec.P("Reverse-recovery lot acceptance report", "subtitle"),
        sec.key_value_table(
            [
                ("Part", content.part),
                ("Lot", content.lot),
                ("Report identifier", content.report_id),
                ("Date of issue (UTC)", content.generated_utc),
                _run_line(content),
                ("Software", f"benchrun {content.software_version}"),
                ("Signer", ", ".join(x for x in (content.signer_name, content.signer_role,
                                                 content.signer_organisation) if x)),
                ("Signer certificate SHA-256", content.signer_fingerprint),
            ],
            (48 * mm, width - 48 * mm),
            mono_keys=("Signer certificate SHA-256",),
        ),
        sec.spacer(6),
        sec.disposition_banner(content.disposition, width),
        sec.spacer(3),
        sec.P("Reasons for the disposition", "h3"),
    ]
    for reason in content.disposition_reasons or ["(no reason recorded)"]:
        story.append(sec.P(f"• {reason}", "body"))
    story.append(sec.spacer(3))
    if counts:
        words = ("devices", "conforming", "non-conforming", "indeterminate", "invalid")
        rows = [list(words), [str(counts.get(w, 0)) for w in words]]
        story.append(sec.simple_table(rows, [width / 5] * 5))
    story += [
        sec.spacer(4),
        sec.P("⚠ High voltage and stored energy can kill. Read the safety cautions at the end "
              "of this report; local codes and licensed practice take precedence.", "caution"),
        sec.spacer(4),
        sec.P("Approval", "h3"),
        sec.P("The signature below is a PAdES digital signature over this whole file, including "
              "the embedded data file 'benchrun-report.json' that holds every number shown here. "
              + _verify_hint(content),
              "small"),
        sec.spacer(2),
        signature_slot,
    ]
    return story


def _figure_section(title: str, caption: str, figures: list[Any], width: float
                    ) -> list[Flowable]:
    rows = _pair_figures(figures, width)
    if not rows:
        return []
    out = sec.section(title)[:1]
    out.append(sec.keep(sec.P(title, "h2"), sec.P(caption, "small"), rows[0]))
    return out + rows[1:]


def _conditions_pages(content: ReportContent, w: float) -> list[Flowable]:
    story = sec.section("1  Test conditions")
    story.append(sec.P("Requested and measured: measured values are the mean and range over the "
                       "valid shots of each condition; the tolerance is the one the shots were "
                       "checked against.", "small"))
    story.append(sec.simple_table(content.conditions_table,
                                  [18 * mm, 30 * mm, 22 * mm, 60 * mm, 20 * mm, w - 150 * mm]))
    story.append(sec.P("Set-up that defines the result", "h3"))
    story.append(sec.simple_table(content.setup_table,
                                  [18 * mm, 46 * mm, 52 * mm, w - 116 * mm]))
    return story


def _traceability_pages(content: ReportContent, w: float) -> list[Flowable]:
    if content.lot_runs:
        story = sec.section("2  Traceability: benches, runs, people, files and software")
        story += _lot_runs_pages(content, w)
        story.append(sec.P("Run record", "h3"))
        story.append(sec.simple_table(content.record_table, [52 * mm, w - 52 * mm]))
        story.append(sec.P("Fixtures", "h3"))
        story.append(sec.simple_table(content.fixture_table, [52 * mm, w - 52 * mm]))
        return story
    story = sec.section("2  Traceability: bench, people, files and software")
    story.append(sec.P("Instruments (identity as reported by the instrument, IEEE 488.2 *IDN?) "
                       "and probes, with their calibration as the bench file records it.",
                       "small"))
    story.append(sec.simple_table(content.instruments_table,
                                  [26 * mm, 40 * mm, 26 * mm, 20 * mm, 26 * mm, w - 138 * mm]))
    story.append(sec.P("Run record", "h3"))
    story.append(sec.simple_table(content.record_table, [52 * mm, w - 52 * mm]))
    story.append(sec.P("Fixture", "h3"))
    story.append(sec.simple_table(content.fixture_table, [52 * mm, w - 52 * mm]))
    return story


def _method_pages(content: ReportContent, w: float) -> list[Flowable]:
    story = sec.section("3  Method: definitions, limits, decision rule, bins, uncertainty")
    story.append(sec.simple_table(content.definitions_table, [34 * mm, w - 34 * mm]))
    story.append(sec.P("Decision rule", "h3"))
    for line in content.decision_rule:
        story.append(sec.P(line, "small"))
    story.append(sec.P("Limits per condition", "h3"))
    story.append(sec.simple_table(content.limits_table,
                                  [18 * mm, 16 * mm, 17 * mm, 17 * mm, 42 * mm, 28 * mm,
                                   w - 138 * mm]))
    if content.bins_table:
        story.append(sec.keep(
            sec.P("Bins", "h3"),
            sec.simple_table(content.bins_table, [20 * mm, 50 * mm, 30 * mm, 30 * mm]),
            sec.P(content.bins_rule, "small")))
    story.append(sec.P("Uncertainty budgets (GUM, JCGM 100:2008)", "h3"))
    for title, rows in content.budget_tables:
        story.append(sec.keep(sec.P(title, "h4"),
                              sec.simple_table(rows, [64 * mm, 56 * mm, 24 * mm,
                                                      w - 144 * mm])))
    return story


def build_story(
    content: ReportContent,
    *,
    signature_slot: Flowable,
    waveform_flowables: list[Flowable],
    loss_flowables: list[Flowable],
    portrait: Callable[[], list[Flowable]],
    wide: Callable[[], list[Flowable]],
    portrait_width: float,
    landscape_width: float,
) -> list[Flowable]:
    """The whole report as a list of flowables."""
    w = portrait_width
    story: list[Flowable] = _cover(content, signature_slot, w)
    story += portrait()
    story += _conditions_pages(content, w)
    story += _traceability_pages(content, w)
    story += _method_pages(content, w)

    story += wide()
    story += sec.section("4  Results per device")
    story.append(sec.P(
        "Each cell: measured value ± expanded uncertainty U in the unit of its column (GUM "
        "7.2.6 rounding). A grade other than conforming is written under the value in the "
        "same words as the data file and the command line (non-conforming, indeterminate, "
        "invalid) and the cell is shaded; the verdict column gives the device verdict.",
        "small"))
    story.append(sec.spacer(1.5))
    story.append(sec.device_table(content, landscape_width))

    story += portrait()
    story += sec.section("5  Devices that are not conforming or not binned")
    story += sec.non_conforming_list(content.devices, w)
    story += sec.section("6  Shots left out, retaken or flagged")
    if len(content.shot_log_table) > 1:
        story.append(sec.P("Every shot that was not used for grading, was fired again, or "
                           "carries an analysis flag, with the reason.", "small"))
        story.append(sec.simple_table(content.shot_log_table,
                                      [22 * mm, 24 * mm, 48 * mm, 28 * mm, w - 122 * mm]))
    else:
        story.append(sec.P("Every shot was used; none was retaken or flagged.", "body"))
    story += sec.section("7  Lot statistics")
    story.append(sec.simple_table(content.statistics_table,
                                  [30 * mm, 17 * mm, 9 * mm, 14 * mm, 20 * mm, 18 * mm, 20 * mm,
                                   20 * mm, w - 148 * mm]))
    if content.outliers_table:
        story.append(sec.P("Outliers", "h3"))
        story.append(sec.P(f"Test: {content.outlier_test}.", "small"))
        story.append(sec.simple_table(content.outliers_table,
                                      [26 * mm, 30 * mm, 22 * mm, 34 * mm, 30 * mm]))

    figures = [distribution_figure(d["label"], d["unit"], d["groups"], d["limits"],
                                   width_pt=w / 2 - 4, height_pt=160)
               for d in content.distributions]
    conditions = [c for d in content.distributions for c in d["groups"]]
    colours = ", ".join(f"{c} {COLOUR_NAMES[k % len(COLOUR_NAMES)]}"
                        for k, c in enumerate(dict.fromkeys(conditions)))
    story += _figure_section(
        "8  Distributions of the graded device values",
        f"Bars: the value each device was graded on (one per device and condition), by "
        f"condition: {colours}. Dashed dark red lines: the limits, labelled with their "
        f"condition.", figures, w)
    trend_figs = [trend_figure(d["label"], d["unit"], d["per_device"], width_pt=w / 2 - 4,
                               height_pt=160) for d in content.trends]
    story += _figure_section(
        "9  Temperature trends",
        "Thin grey lines: each device's graded values at the test temperatures; thick blue "
        "line with dots: the lot mean.", trend_figs, w)
    if content.temperature_log:
        story.append(sec.P("Measured device temperature of every shot in firing order (blue "
                           "dots) against the set point (dashed dark red line).", "small"))
        story.append(FigureFlowable(temperature_log_figure(content.temperature_log,
                                                           width_pt=w, height_pt=150)))
    if waveform_flowables:
        story += sec.section("10  Recovery waveforms")[:1]
        story.append(sec.keep(sec.P("10  Recovery waveforms", "h2"), sec.P(
            "Current (blue, top) and voltage (orange, bottom) through the recovery as re-read "
            "from the raw record. Green vertical lines: t0 (current zero crossing, dotted), trr "
            "(dashed) and t2 (end of the Qrr/Err integration, dash-dot); the slanted green "
            "dashed line is the trr extrapolation from the upper fit point; the dark red "
            "triangle marks Irrm and the dark red dotted line the peak reverse voltage VRM. One "
            "representative device and every device that is not conforming.", "small"),
            waveform_flowables[0]))
        story += waveform_flowables[1:]
    if loss_flowables:
        story += sec.section("11  Recovery loss estimate")
        story += loss_flowables
    story += sec.section("Safety cautions")
    for text in SAFETY_CAUTIONS:
        story.append(sec.P(f"⚠ {text}", "caution"))
    story += sec.section("What this report certifies, and what it does not")
    for text in CERTIFICATION_LIMITS:
        story.append(sec.P(f"• {text}", "small"))
    story += sec.section("Manifest (SHA-256)")
    story.append(sec.P(
        "Hashes of the data this report rests on (FIPS 180-4 SHA-256): " + (
            "each run's files (named run id/file), its result rows and its row of the runs "
            "table." if content.lot_runs else
            "the run's files, its result rows and its row of the runs table."), "small"))
    rows = [["Item", "Kind", "Size", "SHA-256"]]
    rows += [[m["name"], m["kind"], "" if m.get("size") is None else str(m["size"]),
              m["sha256"]] for m in content.manifest]
    story.append(sec.simple_table(rows, [44 * mm, 14 * mm, 16 * mm, w - 74 * mm]))
    return story
