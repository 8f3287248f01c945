"""Everything that draws or writes files: figures, the HTML report, GeoPackage layers, JSON.

Statistics are computed elsewhere; this package only renders results. Importing the core of
spatial_ev never imports this package.
"""
