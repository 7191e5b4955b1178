"""Readings: the log reader and its quarantine, the QC and error model, one advance's data."""
