"""Figures and the annual report."""
