"""Group results: what the fit and the correction produce for one output folder.

* :mod:`~grouplevel.results.maps` — ``GroupMap`` (one fitted contrast with its
  corrected maps) and ``Corrected`` (one correction method's maps);
* :mod:`~grouplevel.results.compute` — where the fit and the permutations run (local
  threads or a dask cluster).

The package imports nothing on its own: import the module you need.
"""
