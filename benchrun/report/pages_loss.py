"""Report section: what the measured recovery costs in a converter.

``loss_flowables(loss_table, styles)`` returns reportlab flowables for the report's loss
section (the report adds the section heading): the model, the assumptions it rests on, and a
table per part/lot with energy per commutation and average power at the switching frequencies
the sequence names.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any
from xml.sax.saxutils import escape

from reportlab.lib.styles import ParagraphStyle, getSampleStyleSheet
from reportlab.platypus import Flowable, KeepTogether, LongTable, Paragraph, Spacer, TableStyle

from benchrun.loss.estimate import (
    BASIS_ESTIMATE,
    BASIS_MEASURED,
    BASIS_MIXED,
    MODEL_CLAIMS,
    LossTable,
)
from benchrun.units import format_si

#: The assumptions printed with every loss estimate.
ASSUMPTIONS = (
    "Same conditions as tested: the figures hold at the measured temperature, reverse "
    "voltage, forward current and di/dt of each row, with this fixture's switch and loop.",
    "No scaling to other voltages or currents: a value at another operating point is not "
    "derived from these rows unless a measured sweep covers it.",
    "Between measured points of a sweep, values may be interpolated linearly; nothing is "
    "extrapolated outside the measured range.",
    "Average power P = fsw·E assumes one recovery per switching period at the tested "
    "conditions (hard-switched commutation, continuous conduction).",
    "Only the recovery-related losses are counted: the diode's Err and the switch energy the "
    "recovery causes. Conduction losses and the switch's own (charge-free) turn-on energy "
    "are not part of this estimate.",
)

BASIS_TEXT = {
    BASIS_MEASURED: "measured: switch Eon over the window 10 % of IF (current rising) to 2 % "
    "of the off-state voltage (voltage falling), IEC 60747-9 practice, minus the Eon modelled "
    "for a charge-free diode (measured current rise; each voltage level of the fall reached "
    "earlier by the gate-charge delay (i_sw − IF)/(di/dt) while the switch carries IF)",
    BASIS_ESTIMATE: "estimate: VR·Qrr (the recovered charge passes the switch while it holds "
    "about the bus voltage); no switch-voltage channel was captured",
    BASIS_MIXED: "mixed: some devices measured, some estimated",
}


def _style(styles: Mapping[str, ParagraphStyle] | Any, name: str, fallback: str) -> Any:
    try:
        return styles[name]
    except (KeyError, TypeError):
        return getSampleStyleSheet()[fallback]


def _table(rows: list[list[str]]) -> LongTable:
    from benchrun.report.pages_blocks import base_table_style
    from benchrun.report.pages_style import register_fonts

    register_fonts()  # the table style names the report's fonts
    table = LongTable(rows, repeatRows=1, hAlign="LEFT")
    commands = base_table_style(len(rows), font_size=7.0)
    commands.append(("ALIGN", (3, 1), (-1, -1), "RIGHT"))
    table.setStyle(TableStyle(commands))
    return table


def loss_flowables(loss_table: LossTable, styles: Mapping[str, ParagraphStyle] | Any,
                   left_out: Sequence[str] = ()) -> list:
    """Flowables of the loss section.

    Parameters
    ----------
    loss_table
        :func:`benchrun.loss.estimate_losses` result at the sequence's frequencies.
    styles
        Paragraph styles by name (``body``, ``small``, ``h3``); reportlab's sample styles are
        used for any name missing.
    left_out
        One line per shot left out (device, test point, shot and reason), printed under the
        counts of ``loss_table.skipped``.
    """
    body = _style(styles, "body", "BodyText")
    small = _style(styles, "small", "BodyText")
    h3 = _style(styles, "h3", "Heading3")
    freqs = ", ".join(format_si(f, "Hz", digits=3) for f in loss_table.fsw_hz)
    out: list[Flowable] = [
        Paragraph(escape(
            "Energy lost per commutation because of the diode's reverse recovery and the "
            f"average power at {freqs or 'no frequency'}; means and maxima over the devices "
            "of each part and lot at each test point. "
            + " ".join(sentence for _key, sentence in MODEL_CLAIMS)), body),
        Spacer(1, 3),
        Paragraph("Assumptions", h3),
    ]
    out += [Paragraph(escape(f"• {text}"), small) for text in ASSUMPTIONS]
    used = loss_table.bases
    out.append(Paragraph("Basis of the switch energy", h3))
    out += [Paragraph(escape(f"• {BASIS_TEXT[b]}"), small) for b in used if b in BASIS_TEXT]
    if not loss_table.groups:
        out.append(Paragraph("No usable shots: no valid shot with Err and a switch-energy "
                             "figure.", body))
    for part, lot in loss_table.parts:
        groups = [g for g in loss_table.groups if (g.part, g.lot) == (part, lot)]
        # a di/dt sweep holds several groups at one (T, VR, IF): show their measured di/dt
        swept = len({(g.didt_target_A_per_s, g.gate_resistance_ohm) for g in groups}) > 1
        head = ["T", "VR", "IF"] + (["di/dt"] if swept else [])
        energy_rows = [[*head, "devices", "basis", "Err", "Esw,rec", "E mean", "E max"]]
        power_rows = [head + [f"P @{format_si(f, 'Hz', digits=3)}"
                              for f in loss_table.fsw_hz]]
        for g in groups:
            condition = [format_si(g.temperature_K, "K", 3), format_si(g.vr_nominal_V, "V", 3),
                         format_si(g.if_nominal_A, "A", 3)]
            if swept:
                condition.append(format_si(g.didt_mean_A_per_s, "A/s", 3))
            energy_rows.append([
                *condition, str(g.n_devices), g.basis, format_si(g.err_mean_J, "J", 3),
                format_si(g.switch_mean_J, "J", 3), format_si(g.energy_mean_J, "J", 3),
                format_si(g.energy_max_J, "J", 3)])
            power_rows.append([*condition, *(
                f"{format_si(m, 'W', 3)} / {format_si(x, 'W', 3)}"
                for m, x in zip(g.power_mean_W, g.power_max_W, strict=True))])
        out.append(KeepTogether([
            Paragraph(escape(f"{part}, lot {lot}"), h3),
            Paragraph("Energy per commutation (mean over devices; E max: worst device)", small),
            _table(energy_rows),
            Spacer(1, 4),
            Paragraph("Average power P = fsw·E, mean / worst device", small),
            _table(power_rows),
        ]))
    if loss_table.skipped:
        out.append(Spacer(1, 4))
    for reason in loss_table.skipped:
        out.append(Paragraph(escape(f"Left out: {reason}."), small))
    if loss_table.skipped and left_out:
        out.append(Paragraph("Shots left out, with the reason:", small))
        for line in left_out:
            out.append(Paragraph(escape(f"• {line}"), small))
    return out

