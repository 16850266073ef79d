"""NIfTI reading and writing, grid and orientation checks, masked extraction.

Grids are compared through their affines (never through array order): two images share
a grid when their shapes are equal and their affines agree within a small tolerance.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from contextvars import ContextVar
from dataclasses import dataclass
from pathlib import Path

import nibabel as nib
import numpy as np

from grouplevel.errors import UserError
from grouplevel.outputs.files import save_image

# Affines may differ by rounding in the header (float32 storage); 1e-3 mm is far below
# any rodent voxel (0.05-0.3 mm) yet above float32 round-off for typical coordinates.
AFFINE_TOLERANCE_MM = 1e-3
# A voxel whose volume is below this fraction of the product of its edge lengths is flat
# (our own choice: only axes within about a millionth of a radian of a plane fall below
# it, far from the shear of any real acquisition).
SINGULAR_AFFINE_RATIO = 1e-6


@dataclass(frozen=True)
class Grid:
    """The voxel grid that every map of a study shares.

    ``affine`` maps voxel indices to true RAS+ millimetres: every length, volume and
    coordinate of the analysis comes from it. ``header_affine`` is the affine the image
    headers store, when ``[space]`` declares them scaled or their axes exchanged (None
    when the headers are true); output maps are written with it, so that they lie on
    the template in any viewer that reads those headers.
    """

    shape: tuple[int, int, int]
    affine: np.ndarray
    header_affine: np.ndarray | None = None

    def with_true_units(self, header_to_true: np.ndarray) -> Grid:
        """This header grid in true millimetres (``header_to_true @ affine``)."""
        matrix = np.asarray(header_to_true, dtype=float)
        if np.array_equal(matrix, np.eye(4)):
            return self
        return Grid(shape=self.shape, affine=matrix @ self.affine, header_affine=self.affine)

    @property
    def header_to_true(self) -> np.ndarray:
        """The 4 × 4 matrix from the headers' world coordinates to true mm (identity when
        the headers are true)."""
        if self.header_affine is None:
            return np.eye(4)
        return self.affine @ np.linalg.inv(self.header_affine)

    @property
    def written_affine(self) -> np.ndarray:
        """The affine that output maps carry: the headers' own."""
        return self.affine if self.header_affine is None else self.header_affine

    @property
    def voxel_size(self) -> np.ndarray:
        """Voxel edge lengths in mm along the three array axes."""
        return np.sqrt((self.affine[:3, :3] ** 2).sum(axis=0))

    @property
    def voxel_volume(self) -> float:
        """Voxel volume in mm³."""
        return float(abs(np.linalg.det(self.affine[:3, :3])))

    @property
    def orientation(self) -> str:
        """Axis codes of the affine, e.g. ``RAS`` (where each array axis points)."""
        return "".join(nib.aff2axcodes(self.affine))


def read_header_grid(path: Path) -> Grid:
    """Read only the header of a NIfTI file and return its grid.

    Raises
    ------
    UserError
        When the file is missing, unreadable or not a 3-D volume.
    """
    img = _open(path)
    _check_real(path, img)
    _check_scaling(path, img)
    shape = tuple(int(s) for s in img.shape)
    if len(shape) == 4 and shape[3] == 1:
        shape = shape[:3]
    if len(shape) != 3:
        raise UserError(
            f"{path}: expected one 3-D volume, found shape {shape}; write one map per file"
        )
    why = affine_problem(np.asarray(img.affine, dtype=float))
    if why:
        raise UserError(f"{path}: {why}")
    return Grid(shape=shape, affine=np.asarray(img.affine, dtype=float))  # type: ignore[arg-type]


def affine_problem(affine: np.ndarray) -> str | None:
    """Why a header's voxel-to-world affine cannot place the grid, or None if it can.

    The affine must hold finite numbers and its 3 × 3 part must be invertible (a zero
    voxel size, or two axes pointing the same way, collapse the grid onto a plane).
    """
    if not np.all(np.isfinite(affine)):
        return (
            "the header's affine (sform/qform) holds NaN or infinite values, so the map "
            "has no position in space; fix the header (e.g. copy the template's affine)"
        )
    sizes = np.sqrt((affine[:3, :3] ** 2).sum(axis=0))
    det = abs(float(np.linalg.det(affine[:3, :3])))
    # relative to the voxel sizes, so that 0.05 mm rodent voxels are not mistaken
    if sizes.min() == 0 or det <= SINGULAR_AFFINE_RATIO * float(np.prod(sizes)):
        return (
            "the header's affine (sform/qform) is degenerate: a voxel size is 0 or two "
            "axes point the same way, so the grid has no volume; fix the header (e.g. "
            "copy the template's affine)"
        )
    return None


#: The files opened in the current :func:`headers_read_once` block (path -> image).
_OPENED: ContextVar[dict[str, object] | None] = ContextVar("grouplevel_opened", default=None)


@contextmanager
def headers_read_once() -> Iterator[None]:
    """Within the block, each file's header is parsed once.

    A run reads every map's header when it checks the study, then every map while
    checking the data, then again to fit it; inside this block the later reads reuse
    the image parsed first (nibabel's header and a proxy of the file), and only the
    voxel values are read from the file again. Outside it (and in other threads)
    every read parses the file anew. A block inside another uses the outer one's files.
    """
    if _OPENED.get() is not None:
        yield
        return
    token = _OPENED.set({})
    try:
        yield
    finally:
        _OPENED.reset(token)


def _open(path: Path):
    opened = _OPENED.get()
    key = str(path)
    if opened is not None and key in opened:
        return opened[key]
    if not path.exists():
        raise UserError(f"{path}: file not found")
    try:
        img = nib.load(key)
    except Exception as exc:  # nibabel raises several types for unreadable files
        raise UserError(f"{path}: cannot read as NIfTI ({exc})") from None
    if opened is not None:
        opened[key] = img
    return img


def _check_real(path: Path, img) -> None:
    """Refuse complex or compound (e.g. RGB) voxel types: a map holds real numbers."""
    dtype = img.get_data_dtype()
    if dtype.kind == "c":
        raise UserError(
            f"{path}: the map holds complex numbers ({dtype}); an effect or variance map "
            "must hold real numbers: write the real-valued map from the first-level fit"
        )
    if dtype.kind not in "biuf":
        raise UserError(
            f"{path}: the map holds {dtype} voxels (not plain numbers, e.g. a colour "
            "image); write the map with one real number per voxel"
        )


def _check_scaling(path: Path, img) -> None:
    """Refuse an infinite scl_slope or scl_inter in a NIfTI header.

    nibabel replaces such values by NaN when it reads the header and then applies no
    scaling, so the voxel values would silently lose the scaling the writer meant. A
    NaN slope is accepted: NIfTI writers use it for "no scaling" (common practice).
    """
    if not isinstance(img, nib.Nifti1Image | nib.Nifti2Image):
        return
    try:
        with nib.openers.ImageOpener(str(path)) as fobj:
            raw = type(img.header).from_fileobj(fobj, check=False)
    except Exception:  # the header was readable a moment ago; leave it to nibabel
        return
    for key in ("scl_slope", "scl_inter"):
        value = float(raw[key])
        if np.isinf(value):
            raise UserError(
                f"{path}: the header's {key} is {value}, so the voxel values cannot be "
                "scaled to their true units; rewrite the map (without integer scaling)"
            )


def read_volume(path: Path) -> np.ndarray:
    """Read a 3-D volume as float64 (a trailing axis of length 1 is dropped)."""
    img = _open(path)
    _check_real(path, img)
    try:
        data = np.asarray(img.dataobj, dtype=np.float64)
    except Exception as exc:
        raise UserError(f"{path}: cannot read the image data ({exc})") from None
    if data.ndim == 4 and data.shape[3] == 1:
        data = data[..., 0]
    if data.ndim != 3:
        raise UserError(f"{path}: expected one 3-D volume, found shape {data.shape}")
    return data


def grid_mismatch(reference: Grid, other: Grid) -> str | None:
    """Describe how ``other`` differs from ``reference``, or return None if they match."""
    if other.shape != reference.shape:
        return f"grid {other.shape} differs from the study grid {reference.shape}"
    if other.orientation != reference.orientation:
        return (
            f"orientation {other.orientation} differs from the study's "
            f"{reference.orientation}; reorient it to the template"
        )
    diff = np.abs(other.affine - reference.affine).max()
    if diff > AFFINE_TOLERANCE_MM:
        return (
            f"affine differs from the study grid by up to {diff:.4g} mm "
            f"(tolerance {AFFINE_TOLERANCE_MM} mm); resample it to the template"
        )
    return None


# NIfTI-1 intent of each output map, by file stem (NIfTI-1 standard, nifti1.h intent
# codes): (intent, short name ≤ 16 characters). Stems not listed are estimates.
_INTENTS: tuple[tuple[str, str, str], ...] = (
    # (stem prefix, intent, name) — the first matching prefix wins
    ("asymmetry_p_fwe", "p value", "p FWE asymmetry"),
    ("animal_effect", "estimate", "animal effect"),
    ("animal_se", "estimate", "animal SE"),
    ("targets", "label", "target regions"),
    ("z_surviving", "z score", "z surviving"),
    ("asymmetry_t", "estimate", "t asymmetry"),
    ("asymmetry_z", "z score", "z asymmetry"),
    ("asymmetry_q", "estimate", "q FDR asymmetry"),
    ("p_fwe_voxel", "p value", "p FWE voxel"),
    ("p_fwe_cluster", "p value", "p FWE cluster"),
    ("p_fwe_tfce", "p value", "p FWE TFCE"),
    ("clusters", "label", "cluster labels"),
    ("mask", "label", "analysis mask"),
    ("coverage", "estimate", "coverage count"),
    ("var_", "estimate", "variance"),
    ("effect", "estimate", "effect"),
    ("se", "estimate", "standard error"),
    ("df", "estimate", "df of t"),
    ("tfce", "estimate", "TFCE"),
    ("t", "t test", "t"),
    ("f", "f test", "F"),
    ("z", "z score", "z"),
    ("p", "p value", "p uncorrected"),
    ("q", "estimate", "q FDR"),
)


def map_intent(
    stem: str, df: float | tuple[float, float] | None = None
) -> tuple[str, tuple[float, ...], str]:
    """The NIfTI intent (code name, parameters, name) of an output map.

    A t map carries its degrees of freedom as the intent's parameter when they are the
    same at every voxel; otherwise it is stored as an estimate (see ``df.nii.gz``). An F
    map (``f``) carries its numerator and denominator degrees of freedom, ``df`` given
    as a pair, on the same condition.
    FDR q values are adjusted p-values, not p-values of one test, so they are estimates.
    """
    for prefix, intent, name in _INTENTS:
        exact = prefix in (
            "t",
            "f",
            "z",
            "p",
            "q",
            "se",
            "df",
            "effect",
            "tfce",
            "mask",
            "clusters",
        )
        if stem == prefix if exact else stem.startswith(prefix):
            if intent == "t test":
                if df is None or not np.isfinite(df):
                    return "estimate", (), "t (df varies)"
                return intent, (float(df),), name  # type: ignore[arg-type]
            if intent == "f test":
                if df is None or not np.all(np.isfinite(df)):
                    return "estimate", (), "F (df varies)"
                return intent, tuple(float(d) for d in df), name  # type: ignore[union-attr]
            return intent, (), name
    return "estimate", (), stem[:16]


def write_map(
    path: Path,
    values: np.ndarray,
    mask: np.ndarray,
    grid: Grid,
    description: str,
    dtype: type = np.float32,
    *,
    df: float | tuple[float, float] | None = None,
) -> None:
    """Write masked values as a 3-D NIfTI map on the study grid.

    Values outside the mask are 0, and NaN never leaks into the file (it becomes 0).

    Parameters
    ----------
    path
        Output file (``.nii.gz``).
    values
        Either a full 3-D array on the grid or a 1-D array of in-mask values.
    mask
        Boolean 3-D analysis mask.
    grid
        The study grid (its headers' affine, :attr:`Grid.written_affine`, goes into the
        header).
    description
        What the map holds; stored in the header's description field (80 bytes max).
    df
        For a t map, its degrees of freedom when they are the same at every voxel.

    The header's intent code and intent name say what the map holds
    (:func:`map_intent`, from the file name), so a viewer or script knows whether it
    opened a t, z or p map.
    """
    out = np.zeros(grid.shape, dtype=dtype)
    if values.ndim == 1:
        out[mask] = np.nan_to_num(values, nan=0.0, posinf=0.0, neginf=0.0)
    else:
        out[mask] = np.nan_to_num(values[mask], nan=0.0, posinf=0.0, neginf=0.0)
    affine = grid.written_affine  # the headers' own, so the map lies on the template
    img = nib.Nifti1Image(out, affine)
    img.header["descrip"] = description.encode("ascii", "replace")[:79]
    intent, params, name = map_intent(path.name.split(".")[0], df)
    img.header.set_intent(intent, params, name=name)
    img.header.set_xyzt_units("mm")
    img.set_qform(affine, code=1)
    img.set_sform(affine, code=1)
    save_image(img, path)  # on a thread inside outputs.files.parallel_saves
