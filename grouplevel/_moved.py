"""Old import paths of modules that moved into the stage sub-packages (kept for 0.2).

Until version 0.2 the modules lived flat in ``grouplevel/``. Each old dotted name below
is imported as *the same module object* as its new home, so ``from grouplevel.study
import load_study``, private names and ``monkeypatch.setattr(grouplevel.study, ...)``
keep working. The aliases are served by an import hook rather than by small files at
the old paths, so that no file remains at an old path (git follows a moved file only
when its old path is gone). Remove this module, and its installation in
``grouplevel/__init__.py``, in the release after 0.2.
"""

from __future__ import annotations

import importlib
import importlib.abc
import importlib.machinery
import sys
from types import ModuleType

# old dotted name -> new dotted name
MOVED = {
    "grouplevel.config": "grouplevel.intake.settings",
    "grouplevel.study": "grouplevel.intake.study",
    "grouplevel.images": "grouplevel.intake.images",
    "grouplevel.design": "grouplevel.intake.design",
    "grouplevel.memory": "grouplevel.model.memory",
    "grouplevel.atlas": "grouplevel.anatomy.atlas",
    "grouplevel.coordinates": "grouplevel.anatomy.coordinates",
    "grouplevel.regions": "grouplevel.anatomy.regions",
    "grouplevel.tables": "grouplevel.anatomy.tables",
    "grouplevel.symmetry": "grouplevel.questions.symmetry",
    "grouplevel.specificity": "grouplevel.questions.specificity",
    "grouplevel.quality": "grouplevel.questions.quality",
    "grouplevel.compute": "grouplevel.results.compute",
    "grouplevel.overview": "grouplevel.cli.overview",
}
# `grouplevel.questions`, `grouplevel.planning` and `grouplevel.cli` are now packages of
# the same name; each re-exports the public names of the old module (the module itself
# is `grouplevel.questions.ask`, `grouplevel.planning.power` + `.plan`, `grouplevel.cli.commands`).


class _SameModule(importlib.abc.Loader):
    """Loader that hands out an already imported module under a second name."""

    def __init__(self, target: str) -> None:
        self.target = target

    def create_module(self, spec: importlib.machinery.ModuleSpec) -> ModuleType:
        module = importlib.import_module(self.target)
        self._spec = module.__spec__
        return module

    def exec_module(self, module: ModuleType) -> None:
        # the import system has just stamped the old name's spec on the module: give the
        # module its own spec back (reload, pickling and tracebacks use it)
        module.__spec__ = self._spec


class _MovedFinder(importlib.abc.MetaPathFinder):
    """Finds the old dotted names of moved modules (and nothing else)."""

    def find_spec(self, fullname, path=None, target=None):  # noqa: ANN001, ANN201
        new = MOVED.get(fullname)
        if new is None:
            return None
        return importlib.machinery.ModuleSpec(fullname, _SameModule(new))


def install() -> None:
    """Put the finder on ``sys.meta_path`` once."""
    if not any(isinstance(finder, _MovedFinder) for finder in sys.meta_path):
        sys.meta_path.insert(0, _MovedFinder())
