"""Physical constants shared by the analysis families (exact values of the SI since 2019, CODATA 2022)."""

BOLTZMANN_J_PER_K = 1.380649e-23  # exact (SI 2019)

__all__ = ["BOLTZMANN_J_PER_K"]
