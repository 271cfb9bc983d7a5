"""The model: patches, the dispersal network, local dynamics, the coupled system, shocks."""
