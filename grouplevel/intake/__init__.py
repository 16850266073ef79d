"""Intake: everything a study is made of, read and checked once, completely.

* :mod:`~grouplevel.intake.settings` — the study TOML file → frozen settings; every
  default in one place;
* :mod:`~grouplevel.intake.study` — the runs table and maps → a validated ``Study``;
  loading the runs × voxels arrays within the memory budget;
* :mod:`~grouplevel.intake.images` — NIfTI reading and writing, grid checks;
* :mod:`~grouplevel.intake.design` — formula → design matrix, group contrasts.

The package imports nothing on its own: import the module you need.
"""
