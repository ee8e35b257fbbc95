"""The tuner: candidate grids, the record pass, K candidates on arrays, plots."""
