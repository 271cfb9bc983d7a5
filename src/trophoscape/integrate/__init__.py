"""Integration in time: the ODE solver, event-based (demographic) runs, environmental noise."""
