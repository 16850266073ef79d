"""The written verdict rules of the questions, in one place.

Each rule turns the numbers a question computed into a label and the sentences that
justify it; docs/verdicts-symmetry.md and docs/verdicts-specificity.md state the same
rules in words, with the constants below by name.

* :func:`symmetry_verdict` — bilateral, dominant, unilateral or no activation, from the
  hemispheric test of a region pair (:mod:`grouplevel.questions.symmetry`);
* :func:`specificity_rules` — the edge, rim and artefact-label rules and the verdict
  specific / plus off-target / mostly off-target, from where the surviving voxels lie
  (:mod:`grouplevel.questions.specificity`).

Pure: numbers in, labels and sentences out.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from grouplevel.errors import ArgumentError
from grouplevel.inference.significance import DEFAULT_ALPHA

if TYPE_CHECKING:  # the numbers the rules read
    from grouplevel.questions.specificity import Shares
    from grouplevel.questions.symmetry import HemisphereTest


def _float(value) -> float | None:
    """A plain float for JSON (None for NaN / infinity)."""
    value = float(value)
    return value if np.isfinite(value) else None


def _fmt_p(p: float) -> str:
    if not np.isfinite(p):
        return "p not available"
    return f"p = {p:.2g}" if p >= 1e-4 else "p < 0.0001"


# --------------------------------------------------------------------------------------
# Symmetry
# --------------------------------------------------------------------------------------

#: Stimulus sides understood by the verdict.
STIMULUS_SIDES = ("left", "right")
SIDES = STIMULUS_SIDES  # the name in grouplevel.questions.symmetry before 0.2

#: Signs a response may have, and the signs each ``[inference] sided`` counts.
SIGNS = ("positive", "negative")
SIGNS_COUNTED = {"two": SIGNS, "positive": ("positive",), "negative": ("negative",)}

#: Verdict labels, as written in the tables.
NO_ACTIVATION = "no activation"
UNILATERAL = "unilateral ({side})"
ONE_SIDE_ONLY = "{side} only, difference not significant"
DOMINANT = "{side}-dominant"
BILATERAL_EQUIVALENT = "bilateral (equivalence shown)"
BILATERAL_UNRESOLVED = "bilateral, asymmetry not excluded"
UNCLEAR = "unclear ({larger} larger, only {active} active)"
OPPOSITE_SIGNS = "opposite signs (left {left}, right {right})"
LATERALISATION_DIFFERS = "lateralisation differs (the contrast is larger on the {side})"
LATERALISATION_NOT_SHOWN = "no evidence that the lateralisation differs"
#: Put before the label of a negative response ("negative response, bilateral ...").
NEGATIVE_PREFIX = "negative response, "


@dataclass(frozen=True)
class Verdict:
    """A symmetry verdict in plain words.

    Attributes
    ----------
    label
        One of the labels of :func:`symmetry_verdict`.
    reasons
        Short sentences with the numbers that decided the label.
    numbers
        The deciding numbers (plain floats / bools / strings).
    side
        "contralateral" / "ipsilateral" for the dominant or only active side when the
        stimulated side is known, else "".
    sign
        "positive" / "negative": the sign of the response the label is about; "" when
        no side responds or the two sides respond with opposite signs.
    """

    label: str
    reasons: tuple[str, ...]
    numbers: dict
    side: str = ""
    sign: str = ""

    def summary(self) -> dict:
        return {
            "label": self.label,
            "side": self.side,
            "sign": self.sign,
            "reasons": list(self.reasons),
            "numbers": dict(self.numbers),
        }


def _sign_of(effect: float) -> str:
    if not np.isfinite(effect) or effect == 0:
        return ""
    return "positive" if effect > 0 else "negative"


def counted_signs(sided: str) -> tuple[str, ...]:
    """The response signs an ``[inference] sided`` value counts."""
    if sided not in SIGNS_COUNTED:
        raise ArgumentError(f"sided = {sided!r}: use one of {', '.join(map(repr, SIGNS_COUNTED))}")
    return SIGNS_COUNTED[sided]


def symmetry_verdict(
    test: HemisphereTest,
    *,
    alpha: float = DEFAULT_ALPHA,
    stimulus_side: str | None = None,
    sided: str = "two",
    signs: Sequence[str] | None = None,
) -> Verdict:
    """Turn the hemispheric test of a region pair into a verdict with its reasons.

    The rule, applied in this order:

    1. A side is **active** when its two-sided p < α and the sign of its region-mean
       effect is counted: ``sided = "positive"`` counts only positive effects,
       ``"negative"`` only negative ones, ``"two"`` either. ``signs`` narrows this further
       (the questions pass the signs of the map's surviving response).
    2. Neither side active → "no activation".
    3. The two sides active with opposite signs → "opposite signs (left ..., right ...)".
    4. Otherwise the response has one sign ``s``. The difference is **significant** when
       its two-sided p < α; the **larger** side is the one whose response is larger in
       magnitude in the direction of ``s`` (the left when ``s · (L − R) > 0``).
    5. One side active: significant difference towards it → "unilateral (<side>)";
       difference not significant → "<side> only, difference not significant";
       significant difference towards the inactive side → "unclear (...)".
    6. Both active: significant difference → "<side>-dominant"; otherwise TOST p < α →
       "bilateral (equivalence shown)"; otherwise "bilateral, asymmetry not excluded".
       "Bilateral" never follows from a non-significant difference alone.
    7. A negative response's label starts with "negative response, ".

    With ``stimulus_side`` the dominant (or only active) side is called
    "contralateral" when it is opposite to the stimulated side, else "ipsilateral".

    Parameters
    ----------
    test
        From :func:`hemisphere_test`.
    alpha
        Significance level of every test in the rule.
    stimulus_side
        "left", "right" or None.
    sided
        "two" (default), "positive" or "negative", as ``[inference] sided``.
    signs
        The signs that may count (a subset of those ``sided`` counts); default all of
        those ``sided`` counts. An empty sequence makes every side inactive.

    Returns
    -------
    Verdict

    References
    ----------
    Schuirmann DJ (1987). J Pharmacokinet Biopharm 15:657-680 (equivalence by TOST).
    """
    _check_verdict_arguments(alpha, stimulus_side)
    allowed = counted_signs(sided)
    if signs is not None:
        allowed = tuple(s for s in allowed if s in signs)
    active, reasons = _active_sides(test, alpha, allowed)
    numbers = _verdict_numbers(test, alpha, sided, active, stimulus_side)
    label, dominant, sign, label_reasons = _label_for_response(test, alpha, active)
    reasons.extend(label_reasons)
    side = ""
    if dominant and stimulus_side is not None:
        side, side_reason = _stimulus_side_word(dominant, stimulus_side)
        reasons.append(side_reason)
    numbers["dominant_side"] = dominant
    numbers["sign"] = sign
    return Verdict(label=label, reasons=tuple(reasons), numbers=numbers, side=side, sign=sign)


def _check_verdict_arguments(alpha: float, stimulus_side: str | None) -> None:
    """Refuse a level outside (0, 1) and an unknown stimulated side."""
    if not 0.0 < alpha < 1.0:
        raise ArgumentError(f"alpha = {alpha}: give a level between 0 and 1")
    if stimulus_side is not None and stimulus_side not in SIDES:
        raise ArgumentError(
            f'stimulus_side = {stimulus_side!r}: use "left", "right" or None when the '
            "stimulus was not lateralised"
        )


def _active_sides(
    test: HemisphereTest, alpha: float, allowed: tuple[str, ...]
) -> tuple[dict[str, str], list[str]]:
    """Step 1 of the rule: which sides are active, with one reason per side.

    Returns
    -------
    active
        Side ("left", "right") -> sign of its response, "" when the side is not active.
    reasons
        One sentence per side: its word, region-mean effect and p.
    """
    reasons: list[str] = []
    active: dict[str, str] = {}
    for side, effect, p in (
        ("left", test.left_effect, test.left_p),
        ("right", test.right_effect, test.right_p),
    ):
        sign = _sign_of(effect)
        significant_side = bool(np.isfinite(p) and p < alpha)
        active[side] = sign if (significant_side and sign in allowed) else ""
        if active[side]:
            word = f"active ({sign})"
        elif significant_side and sign:
            word = f"not counted ({sign} effect; counted: {' or '.join(allowed) or 'none'})"
        else:
            word = "not active"
        reasons.append(f"{side} side {word}: region-mean effect {effect:.3g}, {_fmt_p(p)}")
    return active, reasons


def _verdict_numbers(
    test: HemisphereTest,
    alpha: float,
    sided: str,
    active: dict[str, str],
    stimulus_side: str | None,
) -> dict:
    """The deciding numbers of a verdict as plain floats / bools / strings."""
    return {
        "alpha": float(alpha),
        "sided": sided,
        "left_active": bool(active["left"]),
        "right_active": bool(active["right"]),
        "left_effect": _float(test.left_effect),
        "left_p": _float(test.left_p),
        "right_effect": _float(test.right_effect),
        "right_p": _float(test.right_p),
        "difference": _float(test.difference),
        "difference_p": _float(test.p),
        "margin": _float(test.margin),
        "margin_li": float(test.margin_li),
        "tost_p": _float(test.tost_p),
        "stimulus_side": stimulus_side or "",
    }


def _label_for_response(
    test: HemisphereTest, alpha: float, active: dict[str, str]
) -> tuple[str, str, str, list[str]]:
    """Steps 2-7 of the rule: the label from the active sides and the difference tests.

    Returns
    -------
    label
        The verdict label, with the negative-response prefix where it applies.
    dominant
        The dominant or only active side ("left" / "right"), "" when there is none.
    sign
        The sign of the response the label is about, "" for none or opposite signs.
    reasons
        The sentences on the difference, the equivalence test and the sign.
    """
    on = [side for side in ("left", "right") if active[side]]
    response = active[on[0]] if on else ""
    if len(on) == 2 and active["left"] != active["right"]:
        label = OPPOSITE_SIGNS.format(left=active["left"], right=active["right"])
        return (
            label,
            "",
            "",
            [f"The two sides respond with opposite signs: {_difference_text(test)}"],
        )
    direction = -1.0 if response == "negative" else 1.0
    significant = bool(np.isfinite(test.p) and test.p < alpha)
    larger = "left" if direction * test.difference > 0 else "right"
    if not on:
        label, dominant, reasons = NO_ACTIVATION, "", []
    elif len(on) == 1:
        label, dominant, reasons = _one_side_label(test, on[0], larger, significant)
    else:
        equivalent = bool(np.isfinite(test.tost_p) and test.tost_p < alpha)
        label, dominant, reasons = _both_sides_label(test, larger, significant, equivalent)
    if response == "negative":
        label = NEGATIVE_PREFIX + label
        reasons.append(
            "The response is negative (both counted sides below 0); 'larger' means larger "
            "in magnitude"
            if len(on) == 2
            else "The response is negative; 'larger' means larger in magnitude"
        )
    return label, dominant, response, reasons


def _difference_text(test: HemisphereTest) -> str:
    """The sentence part on the difference L − R: estimate, 95% CI and p."""
    return (
        f"left minus right {test.difference:.3g} (95% CI {test.ci_low:.3g} to "
        f"{test.ci_high:.3g}), {_fmt_p(test.p)}"
    )


def _equivalence_text(test: HemisphereTest) -> str:
    """The sentence part on the equivalence test: margin and TOST p."""
    return (
        f"equivalence within ±{test.margin:.3g} (|LI| ≤ {test.margin_li:g}): TOST "
        f"{_fmt_p(test.tost_p)}"
    )


def _one_side_label(
    test: HemisphereTest, only: str, larger: str, significant: bool
) -> tuple[str, str, list[str]]:
    """Step 5 of the rule: exactly one side active (label, dominant side, reasons)."""
    reasons = [
        f"Difference {'significant' if significant else 'not significant'}: "
        f"{_difference_text(test)}"
    ]
    if significant and larger == only:
        return UNILATERAL.format(side=only), only, reasons
    if significant:
        return UNCLEAR.format(larger=larger, active=only), "", reasons
    return ONE_SIDE_ONLY.format(side=only), only, reasons


def _both_sides_label(
    test: HemisphereTest, larger: str, significant: bool, equivalent: bool
) -> tuple[str, str, list[str]]:
    """Step 6 of the rule: both sides active with one sign (label, dominant side, reasons)."""
    if significant:
        reasons = [f"Difference significant: {_difference_text(test)}"]
        if equivalent:
            reasons.append(f"The difference is small: {_equivalence_text(test)}")
        return DOMINANT.format(side=larger), larger, reasons
    reasons = [
        f"Difference not significant: {_difference_text(test)}",
        f"{'Equivalence shown' if equivalent else 'Equivalence not shown'}: "
        f"{_equivalence_text(test)}",
    ]
    return (BILATERAL_EQUIVALENT if equivalent else BILATERAL_UNRESOLVED), "", reasons


def _stimulus_side_word(dominant: str, stimulus_side: str) -> tuple[str, str]:
    """The side word ("contralateral" / "ipsilateral") of the dominant side, and its reason."""
    side = "ipsilateral" if dominant == stimulus_side else "contralateral"
    return side, f"The {dominant} side is {side} to the stimulated {stimulus_side} side"


# --------------------------------------------------------------------------------------

#: Edge rule: the shell holds at least this share of the surviving activation ...
EDGE_SHARE_MIN = 0.5
#: ... with odds of a surviving voxel lying in the shell at least this many times the odds
#: of any brain voxel lying there (an odds ratio rather than a ratio of shares, so that the
#: rule can fire on small brains whose shell is most of the brain) ...
EDGE_ODDS_RATIO_MIN = 3.0
#: ... and the activation is denser in the shell than in the equally thick layer just
#: inside it by at least this factor (a cortical activation near the surface continues
#: into the next layer; a motion rim does not). Our own choices.
EDGE_TO_INNER_MIN = 2.0
#: ... and the surviving voxels cover at least this share of the shell (a motion or
#: surface-vessel artefact runs along much of the edge; a genuine activation near the
#: surface covers one patch of it). Our own choice: on the example cohort the genuine
#: auditory activation covers 0.4% of the shell.
EDGE_COVERAGE_MIN = 0.10

#: Rim rule: sign-alternation score at least this ... (our own choice; the score is 1 for
#: a perfect dorsal-positive / ventral-negative rim or its mirror, 0 for no pattern)
RIM_SCORE_MIN = 0.5
#: ... with at least this many shell voxels of each sign (our own choice).
RIM_MIN_VOXELS = 10

#: Artefact-label rule: those labels hold at least this share of the activation and at
#: least this many times their share of the brain (our own choices).
ARTEFACT_SHARE_MIN = 0.25
ARTEFACT_ENRICHMENT_MIN = 2.0

#: Verdict thresholds on the share of the surviving activation inside the targets and
#: the enrichment (our own choices; see docs/verdicts-specificity.md).
SPECIFIC_SHARE_MIN = 0.75
SPECIFIC_ENRICHMENT_MIN = 2.0
MOSTLY_OFF_TARGET_SHARE = 0.25

VERDICT_SPECIFIC = "specific to target"
VERDICT_PLUS_OFF_TARGET = "target plus off-target"
VERDICT_OFF_TARGET = "mostly off-target"
VERDICT_NONE = "no activation"
VERDICT_EDGE = "likely artefact (edge)"

ARTEFACT_FLAG_TEXT = "likely motion or vascular artefact"


@dataclass(frozen=True)
class SpecificityRules:
    """The artefact rules that fired, the artefact flag, the verdict and its reasons."""

    edge_rule: bool
    rim_rule: bool
    artefact_rule: bool
    flag: str
    verdict: str
    reasons: tuple[str, ...]


def specificity_rules(
    s: Shares,
    rim: tuple[float, int, int, int, int],
    off: pd.DataFrame,
    artefact_names: list[str],
    difference_reason: str,
    rim_z_threshold: float,
) -> SpecificityRules:
    """The written rules (docs/verdicts-specificity.md): the artefact checks, then the
    verdict, each with its reasons.

    ``rim`` is :func:`~grouplevel.questions.specificity.rim_score`'s result;
    ``difference_reason`` the sentence on the target-minus-rest test.
    """
    score, p_d, n_v, n_d, p_v = rim
    n_surv = s.n_surviving
    edge_rule = bool(
        n_surv > 0
        and s.edge_share >= EDGE_SHARE_MIN
        and s.edge_odds_ratio >= EDGE_ODDS_RATIO_MIN
        and s.edge_to_inner >= EDGE_TO_INNER_MIN
        and s.edge_coverage >= EDGE_COVERAGE_MIN
    )
    rim_rule = bool(score >= RIM_SCORE_MIN and min(p_d + p_v, n_d + n_v) >= RIM_MIN_VOXELS)
    artefact_rule = bool(
        n_surv > 0
        and s.artefact_share >= ARTEFACT_SHARE_MIN
        and s.artefact_enrichment >= ARTEFACT_ENRICHMENT_MIN
    )
    reasons = _artefact_reasons(
        s, rim, (edge_rule, rim_rule, artefact_rule), artefact_names, rim_z_threshold
    )
    if n_surv == 0:
        verdict = VERDICT_NONE
        reasons.insert(0, "No voxel survives the correction.")
    elif edge_rule or rim_rule:
        verdict = VERDICT_EDGE
    else:
        verdict = _target_verdict(s)
        reasons.insert(
            0,
            f"{100 * s.target_share:.1f}% of the surviving activation lies in the targets, "
            f"which make up {100 * s.target_brain:.1f}% of the brain (enrichment "
            f"{s.enrichment:.2f}).",
        )
        big = off[off["surviving_voxels"] > 0].sort_values("rank_extent").head(3)
        if len(big):
            listed = "; ".join(
                f"{r['name']} ({r['hemisphere']}) {r['surviving_voxels']:.0f} voxels"
                for _, r in big.iterrows()
            )
            reasons.append(f"Largest off-target activation: {listed}.")
    reasons.append(difference_reason)
    flag = ARTEFACT_FLAG_TEXT if (edge_rule or rim_rule or artefact_rule) else ""
    return SpecificityRules(edge_rule, rim_rule, artefact_rule, flag, verdict, tuple(reasons))


def _target_verdict(s: Shares) -> str:
    """Specific, specific with off-target activation, or mostly off target."""
    if s.target_share >= SPECIFIC_SHARE_MIN and s.enrichment >= SPECIFIC_ENRICHMENT_MIN:
        return VERDICT_SPECIFIC
    if s.target_share < MOSTLY_OFF_TARGET_SHARE or not s.enrichment > 1.0:
        return VERDICT_OFF_TARGET
    return VERDICT_PLUS_OFF_TARGET


def _artefact_reasons(
    s: Shares, rim, fired: tuple[bool, bool, bool], artefact_names, rim_z_threshold: float
) -> list[str]:
    """The reasons that describe the edge shell, the rim score and the artefact labels."""
    score, p_d, n_v, n_d, p_v = rim
    edge_rule, rim_rule, artefact_rule = fired
    reasons: list[str] = []
    if s.n_surviving:
        reasons.append(
            f"{s.n_surviving} voxels survive; {100 * s.edge_share:.1f}% of them lie in the "
            f"{s.edge_brain * 100:.1f}% of the brain that is the edge shell (enrichment "
            f"{s.edge_enrichment:.2f}, odds ratio {s.edge_odds_ratio:.2f}; density "
            f"{s.edge_to_inner:.2f} times that of the layer just inside); they cover "
            f"{100 * s.edge_coverage:.1f}% of the shell."
        )
    reasons.append(
        f"Sign-alternation score of the edge shell {score:.2f} ({p_d} positive dorsal, "
        f"{n_v} negative ventral, {n_d} negative dorsal, {p_v} positive ventral voxels with "
        f"|z| > {rim_z_threshold:g} or surviving)."
    )
    if edge_rule:
        reasons.append(
            f"Edge rule fired: shell share ≥ {EDGE_SHARE_MIN:g}, odds ratio ≥ "
            f"{EDGE_ODDS_RATIO_MIN:g}, shell/inner density ≥ {EDGE_TO_INNER_MIN:g} and "
            f"shell coverage ≥ {EDGE_COVERAGE_MIN:g}."
        )
    if rim_rule:
        reasons.append(
            f"Rim rule fired: score ≥ {RIM_SCORE_MIN:g} with ≥ {RIM_MIN_VOXELS} voxels "
            "of each sign (the pattern stimulus-locked head motion leaves)."
        )
    if s.n_surviving and artefact_names:
        reasons.append(
            f"Artefact labels ({', '.join(artefact_names)}) hold "
            f"{100 * s.artefact_share:.1f}% of the surviving voxels and "
            f"{100 * s.artefact_brain:.1f}% of the brain (enrichment "
            f"{s.artefact_enrichment:.2f})"
            + ("; artefact-label rule fired." if artefact_rule else ".")
        )
    return reasons
