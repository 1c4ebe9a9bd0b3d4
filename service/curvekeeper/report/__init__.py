"""The calibration report: a calibration record and its channel rendered as PDF bytes
(``render_report``), with plots drawn by matplotlib. No I/O besides building bytes."""

from .pdf import render_report

__all__ = ["render_report"]
