"""Survey geometry: the step from a catalogue file to data and randoms ready to count.

``readers`` (columns from FITS/HDF5/ECSV/CSV/Parquet) -> ``checks`` (every row validated) ->
``catalog`` (the :class:`~corrpipe.survey.catalog.Catalogue` type, cuts, sky -> Cartesian) ->
``footprint`` (angular masks: RA/Dec boxes, HEALPix maps, unions, vetoes) -> ``randoms``
(random catalogues following the mask and the radial selection) -> ``weights`` (n(z) and FKP
weights) -> ``regions`` (jackknife regions).

Nothing here imports a stage, the pipeline, the config loader or the API.
"""
