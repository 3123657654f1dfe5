"""optics stage of simfield."""
