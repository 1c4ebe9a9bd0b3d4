"""The calibration report as PDF bytes, laid out with fpdf2: A4 portrait, DejaVu Sans (the
copy matplotlib ships, so any unit symbol prints), a header with the report id and a
footer with "page x of y" on every page."""

from __future__ import annotations

import io
from pathlib import Path
from typing import Any

import matplotlib
from fpdf import FPDF
from fpdf.enums import XPos, YPos
from fpdf.fonts import FontFace

from . import content as c
from .plots import curve_plot, error_plot

FONT = "DejaVu"
_TTF = Path(matplotlib.get_data_path()) / "fonts" / "ttf"
LINE = 5.0  # mm: one line of body text
GREY = (235, 235, 235)


class ReportPDF(FPDF):
    """A4 pages with the report's header and footer."""

    def __init__(self, rid: str, title: str) -> None:
        super().__init__(orientation="P", unit="mm", format="A4")
        self.rid = rid
        self.title_text = title
        self.add_font(FONT, "", str(_TTF / "DejaVuSans.ttf"))
        self.add_font(FONT, "B", str(_TTF / "DejaVuSans-Bold.ttf"))
        self.set_auto_page_break(auto=True, margin=18)
        self.set_margins(16, 16, 16)

    def header(self) -> None:
        self.set_font(FONT, "B", 10)
        self.cell(0, 6, self.title_text, new_x=XPos.LMARGIN, new_y=YPos.TOP)
        self.set_font(FONT, "", 8)
        self.cell(0, 6, f"report {self.rid}", align="R", new_x=XPos.LMARGIN, new_y=YPos.NEXT)
        self.line(self.l_margin, self.get_y(), self.w - self.r_margin, self.get_y())
        self.ln(3)

    def footer(self) -> None:
        self.set_y(-13)
        self.set_font(FONT, "", 8)
        self.cell(0, 5, f"report {self.rid}", new_x=XPos.LMARGIN, new_y=YPos.TOP)
        self.cell(0, 5, f"page {self.page_no()} of {{nb}}", align="R")

    # building blocks ----------------------------------------------------------------
    def heading(self, text: str, need: float = 30) -> None:
        """A section heading; a new page first unless ``need`` mm (what follows it) fit."""
        if self.get_y() + need > self.h - 18:
            self.add_page()
        self.ln(2)
        self.set_font(FONT, "B", 11)
        self.cell(0, 7, text, new_x=XPos.LMARGIN, new_y=YPos.NEXT)
        self.set_font(FONT, "", 9)

    def para(self, text: str, size: float = 9) -> None:
        self.set_font(FONT, "", size)
        self.multi_cell(0, LINE, text, align="L", new_x=XPos.LMARGIN, new_y=YPos.NEXT)

    def fields(self, items: list[tuple[str, str]], key_width: float = 48) -> None:
        """Key / value lines; the value wraps within its column."""
        for key, value in items:
            self.set_font(FONT, "B", 9)
            self.cell(key_width, LINE, key)
            self.set_font(FONT, "", 9)
            self.multi_cell(0, LINE, value or "-", align="L", new_x=XPos.LMARGIN, new_y=YPos.NEXT)

    def grid(self, head: tuple[str, ...], rows: list[list[str]], widths: tuple[float, ...] | None = None,
             size: float = 8) -> None:
        """A table with a heading row; numbers right-aligned."""
        if not rows:
            self.para("(none)")
            return
        self.set_font(FONT, "", size)
        with self.table(col_widths=widths, line_height=1.25 * size * 0.3528 + 1.2, text_align="LEFT",
                        headings_style=FontFace(emphasis="BOLD", fill_color=GREY), padding=0.8) as table:
            row = table.row()
            for h in head:
                row.cell(h)
            for r in rows:
                row = table.row()
                for cell in r:
                    row.cell(cell)
        self.ln(1)

    def figure(self, png: bytes) -> None:
        width = self.w - self.l_margin - self.r_margin
        height = width * 3.2 / 7.0 + 4  # the figures' aspect, with their labels
        if self.get_y() + height > self.h - 18:
            self.add_page()
        self.image(io.BytesIO(png), x=self.l_margin, w=width)
        self.ln(2)


def render_report(record: dict[str, Any], channel: dict[str, Any], *,
                  curve: list[dict[str, Any]] | None = None) -> bytes:
    """The PDF of one calibration record (the shape of ``GET .../calibrations/{cal}``: as_found,
    as_left, fit, budget, conditions, by, at, references, decision_rule, verdict,
    interval_suggestion, supersedes) for ``channel`` (as ``GET /v1/channels/{id}`` answers:
    id, inputs, output, basis, forecast; an optional ``sensor`` or ``description``).
    ``curve``: optional {x, y, U} points of the curve after the calibration, for a smooth
    line in the curve plot."""
    rid = c.report_id(record, channel)
    pdf = ReportPDF(rid, "Calibration report")
    pdf.set_title(f"Calibration report {rid}")
    pdf.set_creator("curvekeeper")
    pdf.add_page()
    as_found, as_left = list(record.get("as_found") or []), list(record.get("as_left") or [])
    budget = record.get("budget") or {}
    U = budget.get("U") if isinstance(budget, dict) else None
    x_label = c.inputs_text({"inputs": (channel.get("inputs") or [])[:1]}).split(",")[0]
    y_label = c.output_text(channel)

    pdf.heading("Item calibrated")
    pdf.fields([("channel", str(channel.get("id", "-"))),
                ("sensor", str(channel.get("sensor") or channel.get("description") or "-")),
                ("input(s)", c.inputs_text(channel)), ("output", y_label),
                ("method", c.method_text(channel, record))])
    pdf.heading("Calibration")
    pdf.fields([("record", c.num(record.get("id"))), ("calibrated at", c.when(record.get("at"))),
                ("performed by", str(record.get("by") or "-")),
                ("supersedes record", c.num(record.get("supersedes")) if record.get("supersedes") else "none"),
                ("due on", c.when(record.get("due_on") or channel.get("due_on"))),
                ("decision rule", c.DECISION_RULES.get(str(record.get("decision_rule")),
                                                       str(record.get("decision_rule") or "-"))),
                ("overall verdict", str(record.get("verdict") or "-").upper())])
    overdue = [str(r.get("id")) for r in record.get("references") or [] if isinstance(r, dict) and r.get("overdue")]
    if overdue or record.get("allow_overdue_reference"):
        pdf.para(f"A reference standard ({', '.join(overdue) or 'named below'}) was past its due date on the day "
                 "of calibration; the person above chose to calibrate against it (allow_overdue_reference).")

    pdf.heading("As found (before adjustment)")
    pdf.grid(c.POINT_COLUMNS, c.point_rows(as_found))
    pdf.heading("As left (after the fit)")
    pdf.grid(c.POINT_COLUMNS, c.point_rows(as_left))

    pdf.heading("Curve and errors", need=95)
    pdf.figure(curve_plot(as_left or as_found, curve, U, x_label, y_label))
    pdf.figure(error_plot(as_found, as_left, U, x_label, y_label))

    fit = record.get("fit") or {}
    pdf.heading("Fit")
    coefs = fit.get("coefficients")
    sds = fit.get("coefficient_sd") or fit.get("coefficients_sd")
    coef_text = c.num(coefs) if sds is None else "; ".join(
        f"{c.num(a)} ± {c.num(s)}" for a, s in zip(coefs or [], sds, strict=False))
    pdf.fields([("basis", c.num(fit.get("basis")) if not isinstance(fit.get("basis"), dict)
                 else ", ".join(f"{k} {c.num(v)}" for k, v in fit["basis"].items())),
                ("coefficients (± s.d.)", coef_text), ("residual s.d.", c.num(fit.get("residual_sd"))),
                ("degrees of freedom", c.num(fit.get("dof")))])

    pdf.heading("Uncertainty budget (GUM)", need=60)
    rows, totals = c.budget_parts(budget)
    pdf.grid(c.BUDGET_COLUMNS, rows, widths=(34, 10, 20, 18, 18, 18, 12))
    pdf.fields(totals, key_width=72)

    pdf.heading("Reference standards")
    pdf.grid(c.REFERENCE_COLUMNS, c.reference_rows(list(record.get("references") or [])),
             widths=(22, 36, 26, 22, 22, 26))

    pdf.heading("Conditions")
    cond = c.pairs(record.get("conditions"))
    if cond:
        pdf.fields(cond)
    else:
        pdf.para("none stated")

    pdf.heading("Recalibration")
    pdf.fields(c.pairs(record.get("interval_suggestion")) or [("interval suggestion", "-")])
    forecast = c.forecast_text(channel.get("forecast"))
    if forecast:
        pdf.fields([("forecast", forecast)])

    pdf.heading("Statements")
    pdf.para(c.ONLY_THE_ITEM)
    pdf.para(c.CAUTION)
    return bytes(pdf.output())
