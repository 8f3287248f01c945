"""Inference floor: the one null-distribution service (p-value and tie rule, seed blocks, run
options), the permutation tests built on it and the engines that run permutation batches.
Imports the base, input, space and statistics floors."""
