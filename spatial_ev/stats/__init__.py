"""Statistics floor: the linear-model core (checks, rank-revealing basis, residualising,
adjusted R²), transformations, redundancy analysis and beta diversity. Imports only the base
modules."""
