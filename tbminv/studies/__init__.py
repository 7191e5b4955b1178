"""Studies on the side of the shift chain: synthetic drives, reach, sweeps, method comparison."""
