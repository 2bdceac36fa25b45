"""Result files: the table of trajectory variables (:mod:`.variables`), their metrics and
quantiles over members, the layout and CF dataset of a result, the brackets and
candidates of exact quantiles from a fraction of the values, and the finish that writes a
result from saved chunks of members or builds it in memory (:mod:`.finish`,
:mod:`.writer`).  Nothing is imported here, so that a light module of the package does
not load the netCDF and xarray stack."""
