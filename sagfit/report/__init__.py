"""Figures and the HTML reports (matplotlib; reads the core's results)."""
