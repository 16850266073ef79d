"""NIfTI maps saved on threads (grouplevel.outputs.files.parallel_saves).

Each map read back with nibabel (the reference reader) holds exactly the array saved;
every save has finished when the block ends; a failed save raises there, not later; and
outside a block a save is immediate.
"""

from __future__ import annotations

import nibabel as nib
import numpy as np
import pytest

from grouplevel.outputs.files import parallel_saves, save_image


def _image(seed: int) -> nib.Nifti1Image:
    values = np.random.default_rng(seed).normal(size=(6, 5, 4)).astype(np.float32)
    return nib.Nifti1Image(values, np.diag([0.2, 0.2, 0.2, 1.0]))


def test_every_map_is_complete_when_the_block_ends(tmp_path):
    images = {tmp_path / f"map{k}.nii.gz": _image(k) for k in range(9)}  # > pending bound
    with parallel_saves(threads=2):
        for path, img in images.items():
            save_image(img, path)
    for path, img in images.items():
        np.testing.assert_array_equal(np.asarray(nib.load(path).dataobj), img.get_fdata())


def test_a_failed_save_raises_at_the_end_of_the_block(tmp_path):
    with pytest.raises(FileNotFoundError), parallel_saves(threads=2):
        save_image(_image(0), tmp_path / "ok.nii.gz")
        save_image(_image(1), tmp_path / "no such folder" / "map.nii.gz")
    assert (tmp_path / "ok.nii.gz").is_file()


def test_outside_a_block_a_save_is_immediate(tmp_path):
    img = _image(3)
    save_image(img, tmp_path / "now.nii.gz")
    np.testing.assert_array_equal(
        np.asarray(nib.load(tmp_path / "now.nii.gz").dataobj), img.get_fdata()
    )
