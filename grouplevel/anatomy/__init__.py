"""Anatomy: where the results are.

* :mod:`~grouplevel.anatomy.atlas` — label image + table → ``Atlas`` (hierarchy,
  hemispheres, each voxel's share of each region);
* :mod:`~grouplevel.anatomy.coordinates` — template millimetres ↔ stereotaxic
  coordinates; headers scaled ×10 or with exchanged axes → true millimetres;
* :mod:`~grouplevel.anatomy.midplane` — the brain's own mid-sagittal plane (the plane
  about which a mask mirrors itself best; pure);
* :mod:`~grouplevel.anatomy.regions` — cluster, region and per-animal tables (pure);
* :mod:`~grouplevel.anatomy.tables` — the step of the pipeline that labels a group map:
  atlas + group map → the three tables.

The package imports nothing on its own: import the module you need.
"""
