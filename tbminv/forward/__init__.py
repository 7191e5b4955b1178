"""Forward models: closed forms, axisymmetric harmonics, pyGIMLi 3D, Cartesian 2.5D, ratios."""
