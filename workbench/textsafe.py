"""Text from users and files, made safe for HTML.

Every string that comes from a case file (title, scenario and other attributes, file and
folder names), a session file (piece, section, annotation and region names) or a user's
typing, and that is put into HTML (the page's header, status line, lists, notebook output),
goes through :func:`escape` first. ``<script>``, ``<img onerror=...>`` and the like are then
shown as the literal text they are and never run. Widgets that show plain text (Bokeh
titles, text glyphs, Select options, table cells) need no escaping.
"""
from __future__ import annotations

import html

__all__ = ["escape"]


def escape(value, limit: int | None = None) -> str:
    """``str(value)`` with ``& < > " '`` replaced by HTML entities (for element content and
    quoted attribute values). ``limit``: cut longer text to ``limit`` characters (plus "…")
    before escaping."""
    text = "" if value is None else str(value)
    if limit is not None and len(text) > limit:
        text = text[:limit] + "…"
    return html.escape(text, quote=True)
