"""simulated_stage."""
