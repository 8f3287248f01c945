"""Design floor: candidate sampling layouts, coverage of scale classes and simulated power,
running the pipeline's steps on simulated surveys. Imports the floors below it."""
