"""The slice browser's data packing and the report's content-security policy.

Outside references:
- W3C Content Security Policy Level 3, hash-source: the specification's own example, the
  inline script ``alert('Hello, world.');`` is allowed by
  ``'sha256-qznLcsROx4GACP2dm0UCKCzCG+HiZ1guq6ZZDob/Tng='`` (value from memory; it is
  the base64 SHA-256 of the script's text, which the test also checks with hashlib);
- zlib (RFC 1950) and base64 (RFC 4648) from the Python standard library to unpack the
  arrays as a browser's DecompressionStream("deflate") and atob do;
- int16 quantisation: rounding to the nearest step errs by at most half a step (common
  practice).
"""

from __future__ import annotations

import base64
import hashlib
import re
import zlib

import numpy as np
import pytest

from grouplevel.report import browser

SPEC_SCRIPT = "alert('Hello, world.');"
SPEC_HASH = "'sha256-qznLcsROx4GACP2dm0UCKCzCG+HiZ1guq6ZZDob/Tng='"


def test_hash_of_the_specification_example():
    assert browser.inline_hashes(f"<script>{SPEC_SCRIPT}</script>") == {
        "script": [SPEC_HASH],
        "style": [],
    }
    digest = base64.b64encode(hashlib.sha256(SPEC_SCRIPT.encode()).digest()).decode()
    assert SPEC_HASH == f"'sha256-{digest}'"


def test_policy_lists_own_code_only_and_skips_data_blocks():
    style = "\nbody { color: #111; }\n"
    page = (
        f'<html><head><meta content="{browser.policy_placeholder()}"><style>{style}</style>'
        '</head><body><script type="application/json" id="sb-data">{"a": 1}</script>'
        f"<script>{SPEC_SCRIPT}</script></body></html>"
    )
    done = browser.apply_content_security_policy(page)
    policy = done.split('content="')[1].split('"')[0]
    directives = dict(d.strip().split(" ", 1) for d in policy.split(";"))
    assert directives["default-src"] == "'none'"
    assert directives["img-src"] == "data:"
    assert directives["script-src"] == SPEC_HASH  # the JSON block is not code
    style_digest = base64.b64encode(hashlib.sha256(style.encode()).digest()).decode()
    assert directives["style-src"] == f"'sha256-{style_digest}'"
    assert "unsafe" not in policy
    with pytest.raises(ValueError):
        browser.apply_content_security_policy("<html></html>")


@pytest.mark.parametrize(
    "page",
    [
        '<script>a</SCRIPT><style x="1">b</style><script type="application/json">{}</script>',
        "<script>never closed <style>s</style>",
        "<SCRIPT>x</script></script><style>",
        "<scripts>x</scripts><script>y</script>",
        "<style>a<script>b</script>c</style><script>d</script>",
        "<p>no code</p>",
    ],
)
def test_inline_blocks_are_those_of_the_one_regular_expression(page):
    # reference: the blocks as one regular expression (Python's re, DOTALL and
    # IGNORECASE) finds them, scanning the page character by character
    reference = re.compile(r"<(script|style)(\s[^>]*)?>(.*?)</\1>", re.DOTALL | re.IGNORECASE)
    assert list(browser._inline_blocks(page)) == reference.findall(page)


def test_packed_arrays_unpack_with_zlib_and_base64():
    values = np.arange(-5, 7, dtype=np.float32).reshape(3, 4) / 3
    raw = zlib.decompress(base64.b64decode(browser._pack(values, "<f4")))
    np.testing.assert_array_equal(np.frombuffer(raw, "<f4").reshape(3, 4), values)


def test_quantisation_errs_by_at_most_half_a_step():
    rng = np.random.default_rng(3)
    values = rng.normal(0, [[0.01], [5.0], [300.0]], size=(3, 500))
    values[1, 7] = np.nan
    values = np.vstack([values, np.full((1, 500), np.nan)])  # an animal without data
    q, scale = browser._quantise(values)
    assert q.dtype == np.dtype("<i2")
    back = q.astype(float) * np.asarray(scale)[:, None]
    finite = np.isfinite(values)
    err = np.abs(np.where(finite, back - values, 0.0))
    assert np.all(err <= np.asarray(scale)[:, None] / 2 + 1e-12)
    assert np.all(np.abs(q[finite]) <= browser.QUANT_MAX)
    assert q[1, 7] == browser.QUANT_MISSING and np.all(q[3] == browser.QUANT_MISSING)
    # largest magnitude of each row maps to QUANT_MAX: relative precision 1/64000
    assert scale[1] == pytest.approx(np.nanmax(np.abs(values[1])) / browser.QUANT_MAX)


class _FakeLayer:
    """A result whose packed size is known: ``per_voxel`` bytes of text per voxel."""

    def __init__(self, voxels: int, animal_bytes: int) -> None:
        self.voxels, self.animal_bytes = voxels, animal_bytes

    def pack(self, step: int, with_animals: bool) -> dict:
        n = self.voxels // step**3
        return {
            "z": "x" * n,
            "animals": "y" * (self.animal_bytes // step**3 * with_animals),
            "animals_left_out": not with_animals,
        }


def test_budget_thins_the_grid_then_drops_animals_then_refuses(monkeypatch):
    grey = np.zeros((8, 8, 8), dtype=np.uint8)
    affine = np.diag([0.1, 0.1, 0.1, 1.0])
    layer = _FakeLayer(voxels=80_000, animal_bytes=400_000)
    monkeypatch.setattr(browser, "BROWSER_BUDGET_BYTES", 1_000_000)
    payload, notes = browser._fit_budget([layer], grey, None, affine)
    assert payload["step"] == 1 and notes == []
    monkeypatch.setattr(browser, "BROWSER_BUDGET_BYTES", 100_000)
    payload, notes = browser._fit_budget([layer], grey, None, affine)
    assert payload["step"] == 2 and payload["shape"] == [4, 4, 4]
    assert payload["affine"][0][0] == pytest.approx(0.2)  # voxel size doubles
    assert "every 2nd voxel" in notes[0]
    monkeypatch.setattr(browser, "BROWSER_BUDGET_BYTES", 3_000)
    payload, notes = browser._fit_budget([layer], grey, None, affine)
    assert payload["step"] == 4 and payload["results"][0]["animals"] == ""
    assert any("per-animal estimates are left out" in n for n in notes)
    monkeypatch.setattr(browser, "BROWSER_BUDGET_BYTES", 100)
    payload, notes = browser._fit_budget([layer], grey, None, affine)
    assert payload is None and "left out" in notes[-1]
