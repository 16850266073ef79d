"""The colours of the report's maps, built from perceptual principles.

Signed statistics (z, t) are drawn with :func:`signed_colormap`, a diverging map of our
own design, built in CIELAB (the CIE 1976 L*a*b* space, in which equal distances look
roughly equally different):

* **two opposite hues that colour-blind readers keep apart**: negative values in blue
  (hue angle :data:`NEGATIVE_HUE`), positive values in orange (:data:`POSITIVE_HUE`).
  The blue–yellow axis survives the red–green (protan and deutan) deficiencies, which
  affect about 8 % of men of northern European descent (common practice); the two sides
  are checked to stay distinct under simulated protanopia and deuteranopia
  (tests/unit/test_report_colours.py);
* **one hue per side and a lightness that rises with |value|**: lightness L* grows
  linearly from :data:`LIGHTNESS_WEAK` for the weakest shown value to
  :data:`LIGHTNESS_STRONG` at the largest, so a stronger value is always lighter and the
  order of values reads without a legend and in greyscale print;
* **brighter than the background**: the template under the map is drawn in greys no
  lighter than :data:`TEMPLATE_GREY_MAX` (L* ≈ 48), below the map's weakest lightness,
  so every shown voxel stands out by lightness as well as by colour;
* chroma as high as the sRGB gamut allows at each lightness (times
  :data:`CHROMA_SHARE`), so the overlay never looks pale.

The conversion CIELAB → sRGB follows the CIE and IEC definitions (D65 white); it is
written out here because no colour-science library is a dependency.

References
----------
CIE 15:2004, Colorimetry, 3rd ed. (CIELAB; the D65 white point).

IEC 61966-2-1:1999, sRGB (the transfer function and the XYZ → linear RGB matrix).

Machado GM, Oliveira MM, Fernandes LAF (2009). A physiologically-based model for
simulation of color vision deficiency. IEEE Trans Vis Comput Graph 15:1291-1298.

Moreland K (2009). Diverging color maps for scientific visualization. Advances in Visual
Computing, LNCS 5876:92-103 (diverging maps with matched lightness on both sides).
"""

from __future__ import annotations

import numpy as np
from matplotlib.colors import ListedColormap, Normalize

#: CIELAB hue angles (degrees) of the two sides: orange for positive, blue for negative
#: (our own choice, roughly opposite on the blue–yellow axis).
POSITIVE_HUE = 62.0
NEGATIVE_HUE = 282.0
#: L* of the weakest and the strongest value shown (our own choice: the weakest stays
#: above the template's lightest grey, the strongest below white).
LIGHTNESS_WEAK = 58.0
LIGHTNESS_STRONG = 86.0
#: Share of the largest in-gamut chroma used (a margin against clipping).
CHROMA_SHARE = 0.92
#: Lightest grey of the template under a map (0–1; sRGB 0.45 is L* ≈ 48).
TEMPLATE_GREY_MAX = 0.45
#: Entries of the colormap per side.
ENTRIES = 128

# D65 white in XYZ (CIE 15:2004, 2° observer), and the sRGB matrices (IEC 61966-2-1).
_WHITE = np.array([0.95047, 1.0, 1.08883])
_XYZ_TO_RGB = np.array(
    [
        [3.2406, -1.5372, -0.4986],
        [-0.9689, 1.8758, 0.0415],
        [0.0557, -0.2040, 1.0570],
    ]
)
_RGB_TO_XYZ = np.linalg.inv(_XYZ_TO_RGB)
_EPSILON = 216 / 24389  # CIE: (6/29)^3
_KAPPA = 24389 / 27  # CIE: (29/3)^3


def _f_inverse(t: np.ndarray) -> np.ndarray:
    return np.where(t**3 > _EPSILON, t**3, (116 * t - 16) / _KAPPA)


def _f(t: np.ndarray) -> np.ndarray:
    return np.where(t > _EPSILON, np.cbrt(t), (_KAPPA * t + 16) / 116)


def _encode(linear: np.ndarray) -> np.ndarray:
    """Linear RGB → sRGB (the IEC transfer function), not clipped."""
    a = np.abs(linear)
    return np.sign(linear) * np.where(a <= 0.0031308, 12.92 * a, 1.055 * a ** (1 / 2.4) - 0.055)


def _decode(srgb: np.ndarray) -> np.ndarray:
    """sRGB → linear RGB."""
    return np.where(srgb <= 0.04045, srgb / 12.92, ((srgb + 0.055) / 1.055) ** 2.4)


def lab_to_srgb(lab: np.ndarray) -> np.ndarray:
    """CIELAB (…, 3) → sRGB (…, 3) in 0–1, not clipped (values outside: out of gamut)."""
    lab = np.asarray(lab, dtype=float)
    fy = (lab[..., 0] + 16) / 116
    fx = fy + lab[..., 1] / 500
    fz = fy - lab[..., 2] / 200
    xyz = np.stack([_f_inverse(fx), _f_inverse(fy), _f_inverse(fz)], axis=-1) * _WHITE
    return _encode(xyz @ _XYZ_TO_RGB.T)


def srgb_to_lab(rgb: np.ndarray) -> np.ndarray:
    """sRGB (…, 3) in 0–1 → CIELAB (…, 3)."""
    xyz = _decode(np.asarray(rgb, dtype=float)) @ _RGB_TO_XYZ.T / _WHITE
    fx, fy, fz = _f(xyz[..., 0]), _f(xyz[..., 1]), _f(xyz[..., 2])
    return np.stack([116 * fy - 16, 500 * (fx - fy), 200 * (fy - fz)], axis=-1)


def _in_gamut(lab: np.ndarray) -> np.ndarray:
    rgb = lab_to_srgb(lab)
    return np.all((rgb >= -1e-9) & (rgb <= 1 + 1e-9), axis=-1)


def _ramp(hue_deg: float, n: int = ENTRIES) -> np.ndarray:
    """``(n, 3)`` sRGB colours of one hue with L* from weak to strong, chroma maximal."""
    lightness = np.linspace(LIGHTNESS_WEAK, LIGHTNESS_STRONG, n)
    direction = np.array([np.cos(np.radians(hue_deg)), np.sin(np.radians(hue_deg))])
    low, high = np.zeros(n), np.full(n, 150.0)
    for _ in range(40):  # bisection on chroma, all lightness steps at once
        mid = (low + high) / 2
        lab = np.column_stack([lightness, mid[:, None] * direction])
        ok = _in_gamut(lab)
        low, high = np.where(ok, mid, low), np.where(ok, high, mid)
    lab = np.column_stack([lightness, (CHROMA_SHARE * low)[:, None] * direction])
    return np.clip(lab_to_srgb(lab), 0.0, 1.0)


def signed_colormap() -> ListedColormap:
    """The diverging map of signed statistics: strong negative (light blue) → weak
    negative (deep blue) | weak positive (deep orange) → strong positive (light orange).

    Use it with :func:`threshold_norm`, which maps the shown range of |value| onto each
    half, so that the weakest shown value gets the deepest colour.
    """
    negative = _ramp(NEGATIVE_HUE)[::-1]
    positive = _ramp(POSITIVE_HUE)
    return ListedColormap(np.vstack([negative, positive]), name="grouplevel_signed")


class ThresholdNorm(Normalize):
    """Map ``±[threshold, limit]`` onto the two halves of :func:`signed_colormap`.

    Values with |v| below ``threshold`` are not shown (they collapse onto the middle of
    the colour bar); ``limit`` is the largest |value| (clipped beyond). Masked values
    stay masked (drawn transparent).
    """

    def __init__(self, threshold: float, limit: float) -> None:
        self.threshold = float(max(threshold, 0.0))
        limit = float(max(limit, self.threshold + 1e-9))
        super().__init__(vmin=-limit, vmax=limit, clip=False)

    def __call__(self, value, clip=None):
        result, is_scalar = self.process_value(value)
        span = self.vmax - self.threshold
        data = np.asarray(result.data, dtype=float)
        share = np.clip((np.abs(data) - self.threshold) / span, 0.0, 1.0)
        out = np.ma.array(0.5 + 0.5 * np.sign(data) * share, mask=np.ma.getmask(result))
        return out[0] if is_scalar else out

    def inverse(self, value):
        u = np.asarray(value, dtype=float)
        side = np.where(u >= 0.5, 1.0, -1.0)
        return side * (self.threshold + np.abs(2 * u - 1) * (self.vmax - self.threshold))


def threshold_norm(threshold: float, limit: float) -> ThresholdNorm:
    """:class:`ThresholdNorm` of the shown range ``threshold``–``limit`` of |value|."""
    return ThresholdNorm(threshold, limit)


# Machado et al. (2009), Table 1 at severity 1.0, applied to linear RGB (values from
# memory).
_SIMULATION = {
    "protanopia": np.array(
        [
            [0.152286, 1.052583, -0.204868],
            [0.114503, 0.786281, 0.099216],
            [-0.003882, -0.048116, 1.051998],
        ]
    ),
    "deuteranopia": np.array(
        [
            [0.367322, 0.860646, -0.227968],
            [0.280085, 0.672501, 0.047413],
            [-0.011820, 0.042940, 0.968881],
        ]
    ),
}


def simulate_deficiency(rgb: np.ndarray, kind: str) -> np.ndarray:
    """sRGB colours as seen with a complete protan or deutan deficiency (Machado et al.
    2009), in sRGB 0–1."""
    linear = _decode(np.asarray(rgb, dtype=float))
    seen = np.clip(linear @ _SIMULATION[kind].T, 0.0, 1.0)
    return np.clip(_encode(seen), 0.0, 1.0)
