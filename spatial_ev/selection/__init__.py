"""Selection floor: forward selection, weighting-scheme comparison, residual-autocorrelation
selection, variation partitioning and its tests. Imports the floors below it."""
