"""Analyses: functions over a trajectory (and the network), returning labelled tables."""

from .persistence import persistence_table, regional_persistence
from .synchrony import synchrony_table, standardized_log_series

__all__ = ["persistence_table", "regional_persistence", "synchrony_table",
           "standardized_log_series"]
