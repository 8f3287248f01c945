"""Input floor: reading and validating surveys (CSV, GeoPackage, GeoJSON, Shapefile), coordinate
reference systems and the local metric projection. Imports only the base modules."""
