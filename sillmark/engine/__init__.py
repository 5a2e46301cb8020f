"""The Priority-Flood engine: onset stage, flood tree, depressions, in memory or by tiles."""
