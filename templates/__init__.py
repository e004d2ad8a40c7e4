"""Jinja2 templates of the fitaudit report (package data)."""
