"""The report's slice browser: the data it shows, packed into the page, and the page's
content-security policy.

The browser (``templates/browser.js``, plain JavaScript drawing on a canvas) shows the
z map of each result over the template, slice by slice in three planes, with the atlas
outlines; the pointer reads AP/ML/DV from the origin, the region, z, effect and p; a
click shows each animal's own estimate there (a small forest plot and a table).

Everything it needs is embedded in the page as one JSON block of compressed arrays
(deflate, then base64; the page inflates them with the browser's own
``DecompressionStream``):

- the template as 8-bit grey levels and the atlas's leaf labels on the whole grid;
- per result, over its in-mask voxels: z and effect (float32; the browser computes the
  two-sided p from z, which grouplevel writes with the same p as t), the voxels that
  survive the report's correction (one byte each), and each animal's estimate and its
  standard error quantised to 16 bits per animal (largest magnitude → 32000) with the
  number of its runs with data (one byte);
- the signed colour scale of the static figures (:func:`grouplevel.report.colours.signed_colormap`).

Each run's own value is shown when the result folder keeps it (``run_effect.nii.gz``,
small studies only) and it fits :data:`RUN_VALUES_EMBED`; otherwise the browser lists
each animal's runs and how many have data at the voxel, and says so.

When the packed data exceed :data:`BROWSER_BUDGET_BYTES`, the grid is shown at every
2nd (3rd, 4th) voxel along each axis, then without the per-animal estimates, and the
browser says so; beyond that it is left out with the reason.

The policy (:func:`content_security_policy`) allows nothing but the page's own inline
scripts and styles, named by the SHA-256 of their text, and images from ``data:`` URIs
(W3C Content Security Policy Level 3, hash-source).
"""

from __future__ import annotations

import base64
import hashlib
import json
import re
import zlib
from collections.abc import Iterator
from importlib import resources
from pathlib import Path

import nibabel as nib
import numpy as np

from grouplevel.errors import UserError
from grouplevel.intake.images import Grid
from grouplevel.outputs.animal_maps import read_animal_maps
from grouplevel.report.colours import TEMPLATE_GREY_MAX, signed_colormap

#: Largest size of the embedded data (base64 text) before the grid is thinned. Our own
#: choice: a report of a few tens of MB still opens in a second from a shared drive or
#: an e-mail; the demo needs about a tenth of it.
BROWSER_BUDGET_BYTES = 24_000_000
#: Thinning steps tried, in order (every k-th voxel along each axis).
THINNING_STEPS = (1, 2, 3, 4)
_ORDINAL = {2: "2nd", 3: "3rd"}
#: Largest runs × voxels whose run values are embedded (the folder keeps them up to
#: grouplevel.outputs.animal_maps.RUN_VALUES_MAX; the same bound, our own choice).
RUN_VALUES_EMBED = 250_000
#: Largest magnitude of a per-animal quantity after quantisation to int16; -32768
#: marks "no value" (no data, or an unknown SE).
QUANT_MAX = 32000
QUANT_MISSING = -32768
#: Grey levels of the template: the 1st to 99.5th percentile of the in-brain values
#: (common practice for display windows) spread over 0..255.
TEMPLATE_WINDOW = (1.0, 99.5)
COLOUR_TABLE_SIZE = 256

_POLICY_TOKEN = "grouplevel-content-security-policy"
_OPENING = re.compile(r"<(script|style)(\s[^>]*)?>", re.IGNORECASE)
_CLOSING = {kind: re.compile(f"</{kind}>", re.IGNORECASE) for kind in ("script", "style")}


# --------------------------------------------------------------------------------------
# Content-security policy
# --------------------------------------------------------------------------------------


def policy_placeholder() -> str:
    """What the template puts in the policy's ``content`` until the page is complete."""
    return _POLICY_TOKEN


def inline_hashes(html: str) -> dict[str, list[str]]:
    """``sha256-…`` sources of every inline ``<script>`` and ``<style>`` block of a page.

    Data blocks (``<script type="application/json">``) are never run, so they are not
    listed. The hash is over the block's text exactly as written (CSP Level 3, §8.4).
    """
    out: dict[str, list[str]] = {"script": [], "style": []}
    for kind, attrs, body in _inline_blocks(html):
        kind = kind.lower()
        if kind == "script" and attrs and re.search(r"type\s*=\s*\"application/json\"", attrs):
            continue
        digest = base64.b64encode(hashlib.sha256(body.encode("utf-8")).digest()).decode()
        source = f"'sha256-{digest}'"
        if source not in out[kind]:
            out[kind].append(source)
    return out


def _inline_blocks(html: str) -> Iterator[tuple[str, str, str]]:
    """(tag, attributes, text) of every ``<script>`` or ``<style>`` block, in order: the
    text runs to the first closing tag of the same kind (in any letter case).

    The matches of ``<(script|style)(\\s[^>]*)?>(.*?)</\\1>`` (DOTALL, IGNORECASE),
    found with one search per tag, so that a page of megabytes of embedded data is not
    matched character by character.
    """
    pos = 0
    while (opening := _OPENING.search(html, pos)) is not None:
        kind = opening.group(1)
        closing = _CLOSING[kind.lower()].search(html, opening.end())
        if closing is None:  # an unclosed tag opens no block; look further on
            pos = opening.start() + 1
            continue
        yield kind, opening.group(2) or "", html[opening.end() : closing.start()]
        pos = closing.end()


def content_security_policy(html: str) -> str:
    """The page's policy: no source but its own inline code and ``data:`` images."""
    hashes = inline_hashes(html)
    parts = ["default-src 'none'", "img-src data:"]
    parts.append("style-src " + (" ".join(hashes["style"]) or "'none'"))
    parts.append("script-src " + (" ".join(hashes["script"]) or "'none'"))
    parts += ["base-uri 'none'", "form-action 'none'"]
    return "; ".join(parts)


def apply_content_security_policy(html: str) -> str:
    """Fill the policy placeholder of a finished page with its hashes."""
    if _POLICY_TOKEN not in html:
        raise ValueError("the page has no content-security-policy placeholder")
    return html.replace(_POLICY_TOKEN, content_security_policy(html), 1)


# --------------------------------------------------------------------------------------
# Packing
# --------------------------------------------------------------------------------------


def _pack(values: np.ndarray, dtype: str) -> str:
    """Deflate + base64 of an array in C order, little-endian ``dtype``."""
    raw = np.ascontiguousarray(values, dtype=np.dtype(dtype)).tobytes()
    return base64.b64encode(zlib.compress(raw, 6)).decode("ascii")


def _canonical(img) -> tuple[np.ndarray, np.ndarray]:
    """Data and affine of an image in the closest RAS+ order (3-D or 4-D)."""
    can = nib.as_closest_canonical(img)
    return np.asanyarray(can.dataobj), np.asarray(can.affine, dtype=float)


def _canonical_part(img, sl: tuple[slice, ...], dtype=None) -> np.ndarray:
    """The part ``sl`` (of the first three axes) of an image in the closest RAS+ order.

    The slices are taken from the image's data proxy before any conversion, so a 4-D
    map (animals or runs × voxels) is held only at the thinned size, never whole.
    """
    can = nib.as_closest_canonical(img)
    return np.asarray(can.dataobj[sl], dtype=dtype)


def _load(path: Path):
    return nib.load(str(path)) if path.is_file() else None


def _quantise(values: np.ndarray) -> tuple[np.ndarray, list[float]]:
    """Rows of ``values`` as int16 with one scale per row; NaN → QUANT_MISSING."""
    finite = np.isfinite(values)
    peak = np.max(np.abs(np.where(finite, values, 0.0)), axis=1) if values.size else np.zeros(0)
    scale = np.where(peak > 0, peak / QUANT_MAX, 1.0)
    q = np.round(np.where(finite, values, 0.0) / scale[:, None])
    q = np.where(finite, q, QUANT_MISSING).astype("<i2")
    return q, [float(s) for s in scale]


def _template_grey(summary: dict, reference) -> tuple[np.ndarray, str]:
    """The template in canonical order as 0..255, or the mask when it cannot be used."""
    path = ((summary.get("settings") or {}).get("study") or {}).get("template")
    ref_shape = reference.shape[:3]
    if path and Path(path).is_file():
        img = nib.load(path)
        if img.shape[:3] == ref_shape and np.allclose(img.affine, reference.affine, atol=1e-3):
            data, _ = _canonical(img)
            data = np.nan_to_num(np.asarray(data, dtype=float).reshape(data.shape[:3]))
            inside = data[data != 0]
            if inside.size:
                lo, hi = np.percentile(inside, TEMPLATE_WINDOW)
                span = hi - lo if hi > lo else 1.0
                # dark greys only, as in the static figures: every coloured voxel is
                # lighter than the brain under it (colours.TEMPLATE_GREY_MAX)
                grey = np.clip((data - lo) / span, 0.0, 1.0) * 255 * TEMPLATE_GREY_MAX
                return np.round(grey).astype(np.uint8), "the study template"
    data, _ = _canonical(reference)
    grey = np.where(np.asarray(data) > 0, round(110 * TEMPLATE_GREY_MAX), 10).astype(np.uint8)
    return grey, "the analysis mask (the template was not found or is on another grid)"


def _atlas_labels(
    summary: dict, reference, mask: np.ndarray
) -> tuple[np.ndarray | None, list, str]:
    """Leaf label positions on the canonical grid, the (name, hemisphere) of each
    position (0: unlabelled), and a note when the atlas cannot be shown."""
    from grouplevel.anatomy.atlas import read_atlas  # the label step's own reader

    settings = summary.get("settings") or {}
    atlas_settings = settings.get("atlas") or {}
    image, labels = atlas_settings.get("image"), atlas_settings.get("labels")
    if not image or not labels:
        return None, [], "No atlas was given: the pointer shows coordinates and values only."
    changed = _changed_inputs(summary, [image, labels])
    midline = (summary.get("atlas") or {}).get("midline_mm")
    grid = Grid(shape=tuple(reference.shape[:3]), affine=np.asarray(reference.affine, float))
    try:
        atlas = read_atlas(Path(image), Path(labels), grid, mask, midline_mm=midline)
    except UserError as exc:
        return None, [], f"The atlas could not be read again for the browser ({exc})."
    volume = nib.Nifti1Image(atlas.label_volume.astype(np.int32), grid.affine)
    data, _ = _canonical(volume)
    values, positions = np.unique(np.asarray(data), return_inverse=True)
    leaves = atlas.regions.set_index("index")
    names: list[list[str]] = []
    for v in values:
        if v == 0:
            names.append(["", ""])
        else:
            row = leaves.loc[int(v)]
            names.append([str(row["name"]), str(row["hemisphere"])])
    if values[0] != 0:  # keep position 0 for "unlabelled"
        names.insert(0, ["", ""])
        positions = positions + 1
    note = (
        f"The atlas files changed since the analysis ({', '.join(changed)}): region names "
        "are read from the files as they are now."
        if changed
        else ""
    )
    return positions.reshape(data.shape).astype(np.uint16), names, note


def _changed_inputs(summary: dict, paths: list[str]) -> list[str]:
    """Which of ``paths`` no longer match the SHA-256 recorded in summary.json."""
    recorded = {
        str(e.get("path")): e.get("sha256")
        for e in summary.get("inputs") or []
        if isinstance(e, dict)
    }
    changed = []
    for p in paths:
        want = recorded.get(str(p))
        if want and Path(p).is_file():
            if hashlib.sha256(Path(p).read_bytes()).hexdigest() != want:
                changed.append(Path(p).name)
    return changed


def _colour_table() -> list[list[int]]:
    rgba = signed_colormap()(np.linspace(0.0, 1.0, COLOUR_TABLE_SIZE))
    return np.round(rgba[:, :3] * 255).astype(int).tolist()


class _Layer:
    """One result's arrays in canonical order on the full grid."""

    def __init__(self, folder: Path, spec: dict, entry: dict, alpha: float):
        name, heading, stem, words = spec["name"], spec["heading"], spec["stem"], spec["words"]
        self.name, self.heading = name, heading
        mask_img = nib.load(str(folder / "mask.nii.gz"))
        self.mask = np.asarray(_canonical(mask_img)[0]) > 0
        self.maps = {}
        for key in ("z", "effect"):
            img = _load(folder / f"{key}.nii.gz")
            self.maps[key] = (
                np.nan_to_num(np.asarray(_canonical(img)[0], dtype=np.float32))
                if img is not None
                else np.zeros(self.mask.shape)
            )
        survivors = _load(folder / f"{stem}.nii.gz")
        if survivors is None:
            stem, survivors = "q", _load(folder / "q.nii.gz")
            words = f"{words} (its maps are missing; FDR q shown)"
        self.survive = (
            np.asarray(_canonical(survivors)[0], dtype=float) <= alpha
            if survivors is not None
            else np.zeros(self.mask.shape, dtype=bool)
        )
        self.words = words
        self.animals = read_animal_maps(folder, entry.get("animal_maps"))

    def pack(self, step: int, with_animals: bool) -> dict:
        sl = (slice(None, None, step),) * 3
        mask = self.mask[sl]
        z = self.maps["z"][sl][mask]
        out = {
            "name": self.name,
            "heading": self.heading,
            "threshold": self.words,
            "mask": _pack(mask, "u1"),
            "voxels": int(mask.sum()),
            "z": _pack(z, "<f4"),
            "effect": _pack(self.maps["effect"][sl][mask], "<f4"),
            "survive": _pack(self.survive[sl][mask] & np.isfinite(z), "u1"),
            "zmax": float(np.max(np.abs(z))) if z.size else 1.0,
            "animals": None,
        }
        out["animals_left_out"] = False
        if self.animals is not None:
            # int16 effect and SE and a one-byte count per animal and voxel, before
            # compression: skip reading the 4-D maps when that alone exceeds the budget
            raw = 5 * len(self.animals.animals) * out["voxels"]
            if with_animals and raw <= BROWSER_BUDGET_BYTES:
                out["animals"] = self._pack_animals(sl, mask)
            else:
                out["animals_left_out"] = True
        return out

    def _pack_animals(self, sl, mask) -> dict:
        a = self.animals
        runs = _canonical_part(a.runs, sl)[mask].T  # (animals, voxels)
        effect = _canonical_part(a.effect, sl, float)[mask].T
        se = _canonical_part(a.se, sl, float)[mask].T
        has = runs > 0
        effect = np.where(has, effect, np.nan)
        se = np.where(has & (se > 0), se, np.nan)
        q_effect, effect_scale = _quantise(effect)
        q_se, se_scale = _quantise(se)
        out = {
            "ids": list(a.animals),
            "what": a.what,
            "run_labels": [a.run_labels.get(x, []) for x in a.animals],
            "effect": _pack(q_effect, "<i2"),
            "effect_scale": effect_scale,
            "se": _pack(q_se, "<i2"),
            "se_scale": se_scale,
            "runs": _pack(np.clip(runs, 0, 255), "u1"),
            "run_values": None,
        }
        if a.run_values is not None and a.run_values.shape[3] * mask.sum() <= RUN_VALUES_EMBED:
            values = _canonical_part(a.run_values, sl, np.float32)[mask].T
            q_values, value_scale = _quantise(values)
            out["run_values"] = _pack(q_values, "<i2")
            out["run_scale"] = value_scale
        return out


def _thin_affine(affine: np.ndarray, step: int) -> np.ndarray:
    out = affine.copy()
    out[:3, :3] = affine[:3, :3] * step
    return out


def browser_context(out_dir: Path, summary: dict, layers: list[dict]) -> dict | None:
    """What the template needs for the slice browser, or None without any map to show.

    Parameters
    ----------
    out_dir
        The finished output folder.
    summary
        Its summary.json.
    layers
        One dict per result to show: ``name``, ``heading``, ``stem`` (the map whose
        values ≤ α are the surviving voxels, e.g. ``p_fwe_tfce``) and ``words`` (that
        threshold in words).

    Returns
    -------
    dict or None
        ``data`` (the JSON text, safe inside a ``<script>`` block), ``notes`` (what the
        browser shows and leaves out), ``bytes`` (size of the data), ``script`` and
        ``css``.
    """
    out_dir = Path(out_dir)
    alpha = float(((summary.get("settings") or {}).get("inference") or {}).get("alpha", 0.05))
    built = []
    for spec in layers:
        folder = out_dir / spec["name"]
        if not (folder / "mask.nii.gz").is_file() or not (folder / "z.nii.gz").is_file():
            continue
        entry = (summary.get("results") or {}).get(spec["name"]) or {}
        built.append(_Layer(folder, spec, entry, alpha))
    if not built:
        return None
    reference = nib.load(str(out_dir / built[0].name / "mask.nii.gz"))
    shapes_match = all(layer.mask.shape == built[0].mask.shape for layer in built)
    if not shapes_match:
        built = [layer for layer in built if layer.mask.shape == built[0].mask.shape]
    grey, background_words = _template_grey(summary, reference)
    union = np.zeros(reference.shape[:3], dtype=bool)
    for layer in built:
        union |= np.asarray(nib.load(str(out_dir / layer.name / "mask.nii.gz")).dataobj) > 0
    labels, regions, atlas_note = _atlas_labels(summary, reference, union)
    affine = np.asarray(_canonical(reference)[1])
    space = (summary.get("settings") or {}).get("space") or {}
    payload, notes = _fit_budget(built, grey, labels, affine)
    if payload is None:
        return {"data": None, "notes": notes, "bytes": 0}
    payload.update(
        {
            "origin": [float(v) for v in space.get("origin_mm", [0.0, 0.0, 0.0])],
            "origin_name": str(space.get("origin_name", "origin")),
            "regions": regions,
            "lut": _colour_table(),
            "background": background_words,
            "alpha": alpha,
        }
    )
    if atlas_note:
        notes.append(atlas_note)
    if any(layer.animals is None for layer in built):
        missing = ", ".join(layer.name for layer in built if layer.animals is None)
        notes.append(
            f"No per-animal estimates for {missing}: the folder holds none (a contrast "
            "that mixes levels, or one written by an older version)."
        )
    text = json.dumps(payload, separators=(",", ":"), allow_nan=False)
    text = text.replace("<", "\\u003c").replace(">", "\\u003e").replace("&", "\\u0026")
    files = resources.files("grouplevel.templates")
    return {
        "data": text,
        "notes": notes,
        "bytes": len(text.encode("utf-8")),
        "script": files.joinpath("browser.js").read_text("utf-8"),
        "css": files.joinpath("browser.css").read_text("utf-8"),
    }


def _fit_budget(built, grey, labels, affine) -> tuple[dict | None, list[str]]:
    """The packed arrays at the finest thinning step within the budget."""
    notes: list[str] = []
    for with_animals in (True, False):
        for step in THINNING_STEPS:
            sl = (slice(None, None, step),) * 3
            payload = {
                "shape": list(grey[sl].shape),
                "affine": _thin_affine(affine, step)[:3].tolist(),
                "step": step,
                "grey": _pack(grey[sl], "u1"),
                "labels": None if labels is None else _pack(labels[sl], "<u2"),
                "results": [layer.pack(step, with_animals) for layer in built],
            }
            size = len(json.dumps(payload))
            if size <= BROWSER_BUDGET_BYTES:
                if step > 1:
                    every = _ORDINAL.get(step, f"{step}th")
                    notes.append(
                        f"The grid is too large to embed in full: the browser shows every "
                        f"{every} voxel along each axis (the maps in the folder hold all)."
                    )
                if any(r.get("animals_left_out") for r in payload["results"]):
                    notes.append(
                        "The per-animal estimates are left out: they would not fit in the "
                        "page (they are in each result folder's animal_*.nii.gz maps)."
                    )
                return payload, notes
    notes.append(
        f"The maps are too large to embed even at every {THINNING_STEPS[-1]}th voxel "
        f"(more than {BROWSER_BUDGET_BYTES / 1e6:.0f} MB): the browser is left out; the "
        "static figures and the maps in the folder remain."
    )
    return None, notes
