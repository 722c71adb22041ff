"""Figures for the report: one module per pipeline step, matplotlib only."""
