"""Inversion: settings, parameter grid, pyGIMLi operator, one image, the drive, contact fit."""
