"""The axisymmetric harmonic model: (x, r) mesh, element integrals, solver, layout adapter."""
