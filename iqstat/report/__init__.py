"""Renderers of iqstat's results: terminal tables (rich) and JSON."""
