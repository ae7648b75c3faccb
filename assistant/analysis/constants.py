"""Physical constants shared by the analysis families (exact values of the SI since 2019, CODATA 2022)."""

BOLTZMANN_J_PER_K = 1.380649e-23  # exact (SI 2019)
MU_0_N_PER_A2 = 1.25663706127e-6  # vacuum magnetic permeability, CODATA 2022 (measured since SI 2019, 1.6e-10 rel.)

__all__ = ["BOLTZMANN_J_PER_K", "MU_0_N_PER_A2"]
