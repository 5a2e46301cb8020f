"""What sits on a grid: DEM reading and checks, CRS helpers, outlets."""
