"""Jinja2 templates of grouplevel's printed and written texts (shipped in the wheel)."""
