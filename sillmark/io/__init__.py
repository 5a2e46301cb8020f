"""File formats only: GeoTIFF, GeoJSON, CSV, JSON and the results folder."""
