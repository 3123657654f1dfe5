"""lensing stage of simfield."""
