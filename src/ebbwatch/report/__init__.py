"""Renderers: terminal table, JSON lines, CSV, Markdown, JSON."""

from .tables import ALERT_FORMATS, render_alerts

__all__ = ["ALERT_FORMATS", "render_alerts"]
