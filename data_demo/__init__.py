"""The invented demo town shipped with geopress (data files only)."""
