"""The slice browser reads only the thinned part of a 4-D per-animal map.

``_canonical_part`` slices the image's data proxy before converting it, so the part
must equal nibabel's whole image in closest RAS+ order (``nibabel.as_closest_canonical``,
Brett et al., NiBabel) sliced afterwards, exactly, for a map stored flipped on disk and
gzip-compressed (as the output folder writes it).
"""

from __future__ import annotations

import nibabel as nib
import numpy as np
import pytest

from grouplevel.report.browser import _canonical_part


@pytest.mark.parametrize("step", [1, 2, 3])
def test_thinned_part_of_a_flipped_4d_map_equals_the_whole_map_thinned(tmp_path, step):
    rng = np.random.default_rng(2)
    data = rng.normal(size=(6, 7, 5, 4)).astype(np.float32)
    affine = np.diag([-0.2, 0.2, -0.2, 1.0])  # x and z stored reversed (not RAS+)
    path = tmp_path / "animals.nii.gz"
    nib.save(nib.Nifti1Image(data, affine), path)
    img = nib.load(path)
    sl = (slice(None, None, step),) * 3
    whole = np.asarray(nib.as_closest_canonical(nib.load(path)).dataobj, dtype=float)[sl]
    part = _canonical_part(img, sl, float)
    assert part.shape == whole.shape and part.dtype == np.float64
    np.testing.assert_array_equal(part, whole)
    # the canonical order really reverses the stored x axis (the check can fail)
    np.testing.assert_array_equal(part[0, 0, 0], data[-1, 0, -1])
