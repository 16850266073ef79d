"""Questions a reviewer asks of a group result.

* :mod:`~grouplevel.questions.symmetry` — bilateral or lateralised (pure);
* :mod:`~grouplevel.questions.specificity` — specific to the target or an edge
  artefact, consistent across animals (pure);
* :mod:`~grouplevel.questions.quality` — run quality against the leave-one-animal-out
  map (pure);
* :mod:`~grouplevel.questions.ask` — the pipeline step: asks the configured questions of
  a group mean and collects the verdicts.

``Answers``, ``answer_questions``, ``question_plan`` and their helpers are re-exported
here (this was
the module ``grouplevel.questions`` before 0.2); they are imported on first use, so that
the pure modules can be imported without the settings.
"""

from __future__ import annotations

from typing import Any

_EXPORTS = {
    "Answers",
    "AsymmetryMap",
    "answer_questions",
    "answers_not_asked",
    "question_plan",
    "skipped_warning",
}

__all__ = sorted(_EXPORTS)


def __getattr__(name: str) -> Any:
    if name in _EXPORTS:
        from grouplevel.questions import ask

        return getattr(ask, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
