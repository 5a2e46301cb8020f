"""What is derived from a flood result: water-level maps, stage tables, hierarchy, assets, outlines."""
