"""Names of the per-patch columns trophoscape computes, in one place with no imports.

The analyses (:mod:`trophoscape.analysis`) write these columns; the patch reader
(:mod:`trophoscape.model.landscape`) keeps a user's column of the same name under another name.
Both read the names from here, so the reader does not import the analyses (a lower layer
never imports a higher one).
"""

from __future__ import annotations

__all__ = ["PERSISTENCE_COLUMNS", "SYNCHRONY_COLUMNS", "computed_columns"]

#: The two species, in the state's order (as :data:`trophoscape.model.system.SPECIES`).
SPECIES_NAMES = ("prey", "predator")
#: Per species ``S``: columns ``S_<name>`` of a single run (key 1) and of replicates.
PERSISTENCE_COLUMNS = {1: ("persists", "occupancy", "mean", "cv", "last_extinction",
                           "extinctions", "recolonisations", "time_to_extinction", "margin"),
                       "replicates": ("persistence_share", "persistence_low",
                                      "persistence_high")}
SYNCHRONY_COLUMNS = ("sync_local", "sync_region", "sync_all", "phase_locking", "sync_group")
CAPACITY_COLUMNS = ("capacity_share", "capacity_drop", "capacity_drop_approx")
STABILITY_COLUMNS = ("equilibrium",)


def computed_columns() -> frozenset[str]:
    """Every column name trophoscape writes beside the user's attributes: ``patch_id``,
    ``area_km2``, ``geometry``, ``links`` and each per-species result column."""
    per_species = (*PERSISTENCE_COLUMNS[1], *PERSISTENCE_COLUMNS["replicates"],
                   *SYNCHRONY_COLUMNS, *STABILITY_COLUMNS, *CAPACITY_COLUMNS)
    return frozenset({"patch_id", "area_km2", "geometry", "links"}
                     | {f"{s}_{c}" for s in SPECIES_NAMES for c in per_species})
