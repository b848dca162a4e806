"""Layer 5, verification: the validation suite (cases, comparison, coverage, probe search), the
independent oracle, the seeded case generator and the simulated population cohorts."""
