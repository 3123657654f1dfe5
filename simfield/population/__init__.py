"""population stage of simfield."""
