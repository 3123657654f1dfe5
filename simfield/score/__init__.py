"""score stage of simfield."""
