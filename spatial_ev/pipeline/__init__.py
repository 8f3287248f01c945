"""Pipeline floor: the whole analysis as named steps (trend, environment, space, partition, scale
classes) that the design simulator reuses, scale-class fits, notes as data, and rebuilding a
pilot from its run folder. Imports the floors below it."""
