"""The invented demo surveys and their generators (beside the floors: used by the command line
and the tests)."""
