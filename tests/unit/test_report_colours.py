"""The signed colour scale of the report's maps (grouplevel.report.colours).

Outside references:
- CIELAB of sRGB colours: the CIE 15:2004 / IEC 61966-2-1 definitions; sRGB red
  (1, 0, 0) is L*a*b* = (53.24, 80.09, 67.20) and white is (100, 0, 0) in the published
  calculators (B. Lindbloom's colour calculator; values from memory).
- Colour-vision deficiency: Machado, Oliveira & Fernandes (2009), IEEE TVCG 15:1291,
  severity-1.0 matrices (values from memory); each row sums to 1, so grey stays grey
  (a property of the published matrices).
- A colour difference ΔE*ab of about 2.3 is just noticeable (Sharma 2003, Digital Color
  Imaging Handbook; value from memory); we ask for ten times that between the two
  sides of the scale.
"""

from __future__ import annotations

import numpy as np
import pytest

from grouplevel.report import colours


def test_lab_of_reference_colours():
    red = colours.srgb_to_lab(np.array([1.0, 0.0, 0.0]))
    np.testing.assert_allclose(red, [53.24, 80.09, 67.20], atol=0.1)
    white = colours.srgb_to_lab(np.array([1.0, 1.0, 1.0]))
    np.testing.assert_allclose(white, [100.0, 0.0, 0.0], atol=0.05)
    rgb = np.random.default_rng(0).uniform(0, 1, size=(50, 3))
    np.testing.assert_allclose(colours.lab_to_srgb(colours.srgb_to_lab(rgb)), rgb, atol=1e-9)


def _sides():
    table = colours.signed_colormap()(np.linspace(0, 1, 2 * colours.ENTRIES))[:, :3]
    negative = table[: colours.ENTRIES][::-1]  # from the weakest to the strongest
    positive = table[colours.ENTRIES :]
    return negative, positive


def test_lightness_rises_with_magnitude_and_stays_above_the_template():
    template_l = colours.srgb_to_lab(np.full(3, colours.TEMPLATE_GREY_MAX))[0]
    for side in _sides():
        lightness = colours.srgb_to_lab(side)[:, 0]
        assert np.all(np.diff(lightness) > 0)  # ordered without a legend, also in grey
        assert lightness[0] == pytest.approx(colours.LIGHTNESS_WEAK, abs=0.5)
        assert lightness[-1] == pytest.approx(colours.LIGHTNESS_STRONG, abs=0.5)
        assert lightness.min() > template_l + 5  # every shown voxel lighter than the brain


def test_one_hue_per_side_and_vivid():
    for side, hue in zip(_sides(), (colours.NEGATIVE_HUE, colours.POSITIVE_HUE), strict=True):
        lab = colours.srgb_to_lab(side)
        angle = np.degrees(np.arctan2(lab[:, 2], lab[:, 1])) % 360
        assert np.all(np.abs((angle - hue + 180) % 360 - 180) < 3.0)
        assert np.hypot(lab[0, 1], lab[0, 2]) > 40  # the weakest shown value is not pale


def test_simulation_matrices_keep_grey():
    for matrix in colours._SIMULATION.values():
        np.testing.assert_allclose(matrix.sum(axis=1), 1.0, atol=1e-5)


@pytest.mark.parametrize("kind", ["protanopia", "deuteranopia"])
def test_sides_stay_apart_for_colour_blind_readers(kind):
    negative, positive = _sides()
    seen_neg = colours.srgb_to_lab(colours.simulate_deficiency(negative, kind))
    seen_pos = colours.srgb_to_lab(colours.simulate_deficiency(positive, kind))
    difference = np.linalg.norm(seen_neg - seen_pos, axis=1)  # same |value|, both signs
    assert difference.min() > 23.0


def test_threshold_norm_maps_the_shown_range_onto_each_half():
    norm = colours.threshold_norm(3.0, 5.0)
    values = np.array([-5.0, -4.0, -3.0, 3.0, 4.0, 5.0, 9.0])
    np.testing.assert_allclose(norm(values), [0.0, 0.25, 0.5, 0.5, 0.75, 1.0, 1.0])
    away = np.array([-5.0, -4.0, 3.5, 4.0, 5.0])  # ±3 meet in the middle (0.5)
    np.testing.assert_allclose(norm.inverse(norm(away)), away)
    masked = norm(np.ma.masked_equal(np.array([0.0, 4.0]), 0.0))
    assert masked.mask.tolist() == [True, False]
