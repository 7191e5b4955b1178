"""Figures (matplotlib; saved as PDF and PNG): section, reach, QC, method comparison."""
