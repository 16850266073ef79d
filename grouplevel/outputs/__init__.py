"""The output folder: its layout, summary.json, and writing files atomically.

* :mod:`~grouplevel.outputs.summary` — the one reader and writer of ``summary.json``
  (versioned); everyone who reads an output folder goes through it;
* :mod:`~grouplevel.outputs.files` — writing a file so that it is either complete or
  absent.

The package imports nothing on its own: import the module you need.
"""
