"""Reading and writing at the edges: vector layers, rasters, GeoPackage and CSV outputs."""
