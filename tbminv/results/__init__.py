"""Results: the moving section (xarray), its NetCDF store, change ahead of the face."""
