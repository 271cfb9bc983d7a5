"""Workflows: a study from a scenario, corridor planning, spread, sweeps; one Python call each."""
