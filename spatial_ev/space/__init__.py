"""Space floor: the geometry core (coordinate check, distances, Delaunay/MST edges), neighbour
graphs and weightings, spatial bases and their solvers, Moran's I and scales in map units.
Imports only the base modules."""
