"""Jinja2 SQL templates, one per stage of a check (installed as ``toolkit.queries``)."""
