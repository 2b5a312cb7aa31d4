"""Presentation layer: table/CSV/JSON output, charts (the only altair user) and the HTML report."""
