"""Files: the staged output folder, tables, the NetCDF time series."""
