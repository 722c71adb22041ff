"""Recovery benchmark: synthetic surveys with planted sources, their forward physics and scoring."""
