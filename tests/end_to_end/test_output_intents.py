"""Every NIfTI output says what it holds: intent code, parameters and name.

Outside reference: the NIfTI-1 intent codes as nibabel tabulates them
(``nibabel.nifti1.intent_codes``; nifti1.h: t test 3, z score 5, p-value 22,
estimate 1001, label 1002).
"""

from __future__ import annotations

import nibabel as nib
import pytest
from nibabel.nifti1 import intent_codes

from grouplevel.cli import main
from grouplevel.images import map_intent

EXPECTED = {
    "t": ("t test", "t"),
    "z": ("z score", "z"),
    "p": ("p value", "p uncorrected"),
    "q": ("estimate", "q FDR"),
    "effect": ("estimate", "effect"),
    "se": ("estimate", "standard error"),
    "var_animal": ("estimate", "variance"),
    "var_run": ("estimate", "variance"),
    "df": ("estimate", "df of t"),
    "mask": ("label", "analysis mask"),
    "clusters": ("label", "cluster labels"),
    "coverage": ("estimate", "coverage count"),
    "p_fwe_voxel": ("p value", "p FWE voxel"),
    "p_fwe_cluster": ("p value", "p FWE cluster"),
    "p_fwe_cluster_mass": ("p value", "p FWE cluster"),
    "p_fwe_tfce": ("p value", "p FWE TFCE"),
    "tfce": ("estimate", "TFCE"),
    "z_surviving": ("z score", "z surviving"),
    "animal_effect": ("estimate", "animal effect"),
    "animal_se": ("estimate", "animal SE"),
}


def test_every_output_map_carries_its_intent(tiny_study, tmp_path):
    out = tmp_path / "out"
    assert main(["run", str(tiny_study), "--out", str(out), "--permutations", "16"]) == 0
    seen = set()
    for path in sorted((out / "mean").glob("*.nii.gz")):
        stem = path.name.removesuffix(".nii.gz")
        header = nib.load(str(path)).header
        code, params, name = header.get_intent()
        if stem in EXPECTED:
            intent, label = EXPECTED[stem]
            assert intent_codes.code[code] == intent_codes.code[intent], stem
            assert name == label, stem
            seen.add(stem)
        else:  # every other map is at least not left without an intent
            assert code != "none", stem
        if stem == "t":
            # between-animal df of the tiny study: 6 animals − 1 (the same at every voxel)
            assert params == pytest.approx((5.0,))
    assert {"t", "z", "p", "q", "effect", "p_fwe_voxel", "mask", "z_surviving"} <= seen
    assert {"animal_effect", "animal_se"} <= seen


def test_t_with_varying_df_is_an_estimate():
    assert map_intent("t", None)[0] == "estimate"
    assert map_intent("t", 9.0) == ("t test", (9.0,), "t")
    assert map_intent("asymmetry_p_fwe_tfce")[0] == "p value"
    assert map_intent("something_new") == ("estimate", (), "something_new")
    # "targets" starts with "t" but is a label map, not a t test
    assert map_intent("targets", 9.0) == ("label", (), "target regions")
