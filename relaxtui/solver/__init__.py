"""The solve layer: method registry, operator, driver, stopping rule, ω theory, multigrid, memory model."""
