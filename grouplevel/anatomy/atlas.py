"""A lab's own atlas on the study grid: regions, hierarchy, hemispheres and shares.

An atlas is an integer label image (0 = background) and a label table in the style of a
BIDS ``dseg.tsv``: columns ``index`` and ``name`` (required), and optionally
``abbreviation``, ``hemisphere`` (left / right / both or empty), ``parent`` (the index or
the name of the enclosing structure, empty for a top-level one) and ``color``. Usually
only the leaves of the hierarchy are painted in the image; their parents are the sums of
their children. Tables in other usual forms (other column names, the hemisphere in the
name, a JSON tree) are brought into this shape by :mod:`grouplevel.anatomy.labels`.

:func:`build_atlas` brings such an atlas onto the study grid and returns an
:class:`Atlas`. Its central piece is a sparse matrix ``shares`` with one row per in-mask
statistical voxel and one column per region (leaves *and* parents): the share of the
voxel that the region covers. How the shares are found depends on the atlas grid:

* same grid as the statistics: exact, every share is 0 or 1;
* atlas finer than the statistics (for example 25 µm labels and 0.2 mm maps): every
  atlas voxel centre is mapped to the statistical voxel that contains it and counted,
  so a structure smaller than one statistical voxel still gets its fraction;
* the same voxels stored in another order (an atlas array flipped or its axes
  exchanged, with the affine saying so): exact, like the same grid;
* atlas coarser (or of equal voxel size on another grid): nearest neighbour, the label
  of the atlas voxel that contains each statistical voxel centre.

The atlas image is processed in slabs of :data:`SLAB_VOXELS` voxels, and no step loops
over voxels in Python, so a 30-million-voxel atlas with thousands of regions fits in
modest memory and builds in seconds.

Hemispheres
-----------
Left and right come from world x of the image affine (RAS+: x grows towards the animal's
right), never from array order. The mid-sagittal plane ``x = midline_mm`` is, in order of
preference, given by the user, fitted as the plane that best separates the voxels of
left- and right-labelled regions (:func:`find_midline`) when the labels agree with the
header, or else the brain's own mirror plane: the plane about which the analysis mask
overlaps its mirror image best (:func:`grouplevel.anatomy.midplane.best_mirror_plane`).
The labels disagree with the header when more than :data:`LABEL_PLANE_DISAGREEMENT` of
the left- and right-labelled voxels lie on the wrong side of their best separating plane
(a table whose left and right are swapped against the header puts every one of them on
the wrong side of the brain's middle). When every region the table calls left lies on
the header's right and every right one on its left, one warning says so plainly.

A leaf without a hemisphere of its own (``both`` or empty, and none inherited from an
ancestor) is handled by this rule:

* it has voxels strictly left *and* strictly right of the midline, and some of them lie
  farther from the plane than one statistical voxel: it is bilateral and is **split**.
  Two new rows with the same name and abbreviation and hemisphere ``left`` / ``right``
  become its children, and the original row stays as their ``both`` parent. An atlas
  voxel whose centre lies on the plane (within :data:`MIDLINE_TOLERANCE_MM`) gives half
  of itself to each side;
* all its voxels lie within one statistical voxel of the plane: it is a **midline**
  structure (a septum, the third ventricle) and stays ``both``. Cutting it would make two
  slivers no wider than a statistical voxel whose sides would be decided by the midline
  estimate rather than by anatomy;
* it lies on one side only: it stays one row and takes that side as its hemisphere.

New rows get new indices above the largest index of the table, in table order: first the
"(other)" rows described below, then the left and right rows of each split leaf (left
before right).

A table row that has children but is also painted in the image gets an extra leaf child
``"<name> (other)"`` holding those voxels, so that a parent's share is always the sum of
its children's.
"""

from __future__ import annotations

import difflib
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np
import pandas as pd
import scipy.sparse as sp

from grouplevel.anatomy.coordinates import MIDLINE_TOLERANCE_MM, describe_orientation
from grouplevel.anatomy.labels import read_label_table
from grouplevel.anatomy.midplane import best_mirror_plane
from grouplevel.errors import UserError
from grouplevel.intake.images import AFFINE_TOLERANCE_MM, Grid, affine_problem
from grouplevel.intake.settings import DEFAULT_ATLAS_MIN_COVERAGE
from grouplevel.intake.textcheck import control_characters

# Smallest share of the analysis mask that the atlas labels must cover (defined with the
# other defaults in grouplevel.config).


#: Below this Dice of the mask with its mirror image a warning says that the midline may
#: be wrong or the mask one-sided. Our own choice: symmetric brain masks score above 0.9.
MIRROR_DICE_WARNING = 0.8

#: A region labelled left or right with more than this share of its voxels on the other
#: side of the midline triggers a warning about the image affine. Our own choice.
WRONG_SIDE_WARNING = 0.5

#: Above this share of left- and right-labelled voxels on the wrong side of their best
#: separating plane, the labels are taken to disagree with the header and the midline is
#: the mask's mirror plane instead. Our own choice: an atlas drawn on the template puts
#: well under 1% of its lateral voxels across the midline; a swapped table puts about
#: half of them on the wrong side of any plane.
LABEL_PLANE_DISAGREEMENT = 0.1

#: Voxels per slab when scanning a large atlas (about 16 MB per float64 work array).
SLAB_VOXELS = 2_000_000

#: Label lookup tables up to this size are used directly; larger label values (some atlases
#: use nine-digit identifiers) go through a sorted search instead.
LOOKUP_TABLE_LIMIT = 1 << 22

#: Resampling descriptions (``Atlas.resampling``).
RESAMPLING_SAME = "same grid"
RESAMPLING_FRACTIONAL = "fractional (atlas finer than the statistics)"
RESAMPLING_NEAREST = "nearest neighbour (atlas coarser than the statistics)"
RESAMPLING_NEAREST_SAME_SIZE = (
    "nearest neighbour (atlas voxels of the statistics' size on a shifted or turned grid)"
)
RESAMPLING_REORDERED = "same voxels stored in another order, copied exactly"

#: Midline sources (``Atlas.midline_source``).
MIDLINE_GIVEN = "given"
MIDLINE_FITTED = "fitted to left/right labels"
MIDLINE_MIRROR = "mirror plane of the analysis mask"
MIDLINE_GRID_CENTRE = "grid centre"

HEMISPHERES = ("left", "right", "both")
_HEMISPHERE_WORDS = {
    "": "",
    "n/a": "",
    "left": "left",
    "l": "left",
    "right": "right",
    "r": "right",
    "both": "both",
    "b": "both",
    "bilateral": "both",
}
_MISSING = {"", "n/a", "nan", "none", "<na>"}
_TOP_LEVEL_PARENTS = {"-1", "0"}
_SIDE_LEFT, _SIDE_RIGHT = 0, 1
_MAX_LISTED = 20


# --------------------------------------------------------------------------------------
# The result
# --------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class Atlas:
    """An atlas brought onto the study grid.

    Attributes
    ----------
    regions
        One row per region (leaves and parents, after any hemisphere split), in the order
        of the columns of ``shares``. Columns: ``index`` (int), ``name``,
        ``abbreviation``, ``hemisphere`` ("left" / "right" / "both"), ``parent`` (index
        of the parent, -1 at the top), ``depth`` (0 at the top), ``is_leaf``,
        ``n_voxels`` (atlas voxels of the region over the whole atlas image; a voxel
        centred on the midline counts half to each side of a split region, so the count
        can end in .5), ``volume_mm3`` (``n_voxels`` times the atlas voxel volume),
        ``mask_volume_mm3`` (volume inside the analysis mask on the study grid),
        ``color``.
    shares
        ``(n_mask_voxels, n_regions)`` sparse matrix: share of each in-mask statistical
        voxel (mask voxels in C order, as ``volume[mask]``) covered by each region. A
        parent's column is the sum of its children's; the leaf entries of a row sum to at
        most 1.
    label_volume
        Study-grid int array: the index of the leaf with the largest share (the first
        leaf in ``regions`` order on ties), 0 outside the mask and where no label falls.
    resampling
        How the atlas reached the study grid (one of the ``RESAMPLING_*`` constants;
        :data:`RESAMPLING_REORDERED` is followed by the reordering in brackets).
    midline_mm
        World x of the mid-sagittal plane.
    midline_source
        Where ``midline_mm`` came from (one of the ``MIDLINE_*`` constants).
    mirror_dice
        Dice coefficient of the analysis mask with its mirror image about the midline.
    orientation
        The study grid's orientation in words, for ``check`` to print.
    coverage
        Share of the analysis mask covered by atlas labels (0 to 1).
    warnings
        Problems worth telling the user that did not stop the build.
    notes
        What reading the label table involved beyond reading it as written (see
        :func:`grouplevel.anatomy.labels.read_label_table`), for ``check`` to print.
    """

    regions: pd.DataFrame
    shares: sp.csr_matrix
    label_volume: np.ndarray
    resampling: str
    midline_mm: float
    midline_source: str
    mirror_dice: float
    orientation: str
    coverage: float
    warnings: tuple[str, ...]
    notes: tuple[str, ...] = ()

    def region_rows(self, name: str) -> list[int]:
        """Rows of ``regions`` (columns of ``shares``) whose name or abbreviation matches.

        Matching ignores case and surrounding spaces and covers every level and every
        hemisphere (a split structure gives its ``both`` row and both sides).

        Raises
        ------
        UserError
            When nothing matches; the message suggests close names.
        """
        wanted = str(name).strip().casefold()
        names = self.regions["name"].astype(str).str.strip().str.casefold()
        abbreviations = self.regions["abbreviation"].astype(str).str.strip().str.casefold()
        hits = np.flatnonzero((names == wanted).to_numpy() | (abbreviations == wanted).to_numpy())
        if hits.size:
            return [int(h) for h in hits]
        choices = sorted(
            {str(v) for v in self.regions["name"]}
            | {str(v) for v in self.regions["abbreviation"] if str(v)}
        )
        close = difflib.get_close_matches(str(name), choices, n=3, cutoff=0.5)
        hint = f"; did you mean {', '.join(repr(c) for c in close)}?" if close else ""
        raise UserError(
            f"region {name!r} is not in the atlas (neither a name nor an abbreviation of "
            f"its {len(self.regions)} regions){hint}"
        )

    def hemisphere_of(self, xyz_mm: np.ndarray | list | tuple) -> np.ndarray:
        """Hemisphere of world points: "left", "right" or "midline".

        Parameters
        ----------
        xyz_mm
            One point ``(3,)`` or many ``(n, 3)`` in world mm (RAS+).

        Returns
        -------
        numpy.ndarray
            Strings, one per point; points within :data:`MIDLINE_TOLERANCE_MM` of the
            plane ``x = midline_mm`` are "midline".
        """
        points = np.atleast_2d(np.asarray(xyz_mm, dtype=float))
        if points.shape[-1] != 3:
            raise ValueError(f"xyz_mm must have shape (3,) or (n, 3), got {points.shape}")
        offset = points[:, 0] - self.midline_mm
        out = np.full(offset.shape, "midline", dtype=object)
        out[offset < -MIDLINE_TOLERANCE_MM] = "left"
        out[offset > MIDLINE_TOLERANCE_MM] = "right"
        return out


# --------------------------------------------------------------------------------------
# File reading (the shell)
# --------------------------------------------------------------------------------------


def read_atlas(
    image: Path,
    labels: Path,
    grid: Grid,
    mask: np.ndarray,
    *,
    midline_mm: float | None = None,
    min_coverage: float = DEFAULT_ATLAS_MIN_COVERAGE,
) -> Atlas:
    """Read an atlas label image and its table and bring them onto the study grid.

    Parameters
    ----------
    image
        NIfTI label image (integers, 0 = background).
    labels
        Label table in any form :func:`grouplevel.anatomy.labels.read_label_table`
        reads (BIDS-style TSV, CSV/TSV with usual column names, JSON list or tree).
    grid
        The study grid. When its headers were declared scaled or their axes exchanged
        (:attr:`Grid.header_to_true`), the atlas header is read the same way.
    mask
        Boolean analysis mask on ``grid``.
    midline_mm
        World x of the mid-sagittal plane; fitted from the labels when omitted.
    min_coverage
        Smallest share of the mask the atlas must cover.

    Returns
    -------
    Atlas

    Raises
    ------
    UserError
        For unreadable files and every problem listed in :func:`build_atlas`.
    """
    image = Path(image)
    if not image.is_file():
        raise UserError(f"{image}: atlas image not found")
    try:
        img = nib.load(str(image))
        data = np.asanyarray(img.dataobj)
    except Exception as exc:  # nibabel raises several types for unreadable files
        raise UserError(f"{image}: cannot read the atlas image as NIfTI ({exc})") from None
    if data.ndim == 4 and data.shape[3] == 1:
        data = data[..., 0]
    if data.ndim != 3:
        raise UserError(
            f"{image}: an atlas image must be one 3-D volume of labels, found shape {data.shape}"
        )
    why = affine_problem(np.asarray(img.affine, dtype=float))
    if why:
        raise UserError(f"{image}: {why} ([atlas] image)")
    table = read_label_table(Path(labels))
    atlas = build_atlas(
        data,
        # the atlas header read like the maps' ([space] header_units_per_mm, header_axes)
        grid.header_to_true @ np.asarray(img.affine, dtype=float),
        table.table,
        grid,
        mask,
        midline_mm=midline_mm,
        min_coverage=min_coverage,
        image_name=str(image),
        table_name=str(labels),
    )
    return replace(atlas, notes=table.notes)


# --------------------------------------------------------------------------------------
# The label table
# --------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Table:
    index: np.ndarray  # int64, one per row
    name: list[str]
    abbreviation: list[str]
    hemisphere: list[str]  # own: "left" / "right" / "both" / ""
    parent: np.ndarray  # row position of the parent, -1 at the top
    color: list[str]
    line: list[int]  # line in the file (header = line 1)


def _cell(value: Any) -> str:
    if value is None:
        return ""
    try:
        if pd.isna(value):
            return ""
    except (TypeError, ValueError):
        pass
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    text = str(value).strip()
    return "" if text.casefold() in _MISSING else text


def _as_integer(text: str) -> int | None:
    try:
        number = float(text)
    except ValueError:
        return None
    if not np.isfinite(number) or not number.is_integer():
        return None
    return int(number)


def _validate_table(table: pd.DataFrame, source: str) -> _Table:
    """The label table checked row by row, then for duplicated indices, then parents."""
    table = table.rename(columns=lambda c: str(c).strip().lower())
    missing = [c for c in ("index", "name") if c not in table.columns]
    if missing:
        found = ", ".join(repr(c) for c in table.columns if c != "line") or "none"
        raise UserError(
            f"{source}: the atlas label table has no {' and no '.join(repr(c) for c in missing)} "
            f"column (found {found}); it needs at "
            "least 'index' and 'name', as in a BIDS dseg.tsv"
        )
    rows = _table_rows(table, source)
    idx = np.asarray(rows["index"], dtype=np.int64)
    _check_unique_indices(idx, rows["line"], source)
    parent = _resolve_parents(idx, rows, source)
    _check_cycles(parent, idx, rows["name"], source)
    return _Table(
        idx,
        rows["name"],
        rows["abbreviation"],
        rows["hemisphere"],
        parent,
        rows["color"],
        rows["line"],
    )


def _table_rows(table: pd.DataFrame, source: str) -> dict[str, list]:
    """Each row's cells as text (index 0, the background, is dropped); every row problem
    at once.

    Raises
    ------
    UserError
        Listing every row whose index is not a whole number ≥ 0, whose name is empty or
        whose hemisphere is not a known word.
    """

    def column(key: str) -> list[str]:
        if key not in table.columns:
            return [""] * len(table)
        return [_cell(v) for v in table[key].tolist()]

    raw = {key: column(key) for key in ("index", "name", "abbreviation", "hemisphere")}
    raw["parent"] = column("parent")
    raw["color"] = column("color")
    keys = ("index", "name", "abbreviation", "hemisphere", "parent", "color", "line")
    rows: dict[str, list] = {key: [] for key in keys}
    problems: list[str] = []
    # physical lines when the table was read by read_label_table, else header + row
    lines = table["line"].tolist() if "line" in table.columns else range(2, len(table) + 2)
    for row in range(len(table)):
        where = f"{source}, line {lines[row]}"
        value = _as_integer(raw["index"][row])
        if value is None or value < 0:
            problems.append(f"{where}: index {raw['index'][row]!r} is not a whole number ≥ 0")
            continue
        if value == 0:  # 0 is the background of the image; a row for it is ignored
            continue
        if not raw["name"][row]:
            problems.append(f"{where}: index {value} has an empty name")
        for key in ("name", "abbreviation"):
            bad = control_characters(raw[key][row])
            if bad:
                problems.append(
                    f"{where}: the {key} {raw[key][row]!r} of index {value} holds "
                    f"{', '.join(bad)}, which would break the rows of the region tables; "
                    "remove it"
                )
        side = raw["hemisphere"][row].casefold()
        if side not in _HEMISPHERE_WORDS:
            problems.append(
                f"{where}: hemisphere {raw['hemisphere'][row]!r} of index {value} is not "
                "left, right, both or empty"
            )
            side = ""
        for key, cell in (
            ("index", value),
            ("name", raw["name"][row]),
            ("abbreviation", raw["abbreviation"][row]),
            ("hemisphere", _HEMISPHERE_WORDS[side]),
            ("parent", raw["parent"][row]),
            ("color", raw["color"][row]),
            ("line", int(lines[row])),
        ):
            rows[key].append(cell)
    if problems:
        raise UserError(f"{source}: the atlas label table has {len(problems)} problem(s)", problems)
    return rows


def _check_unique_indices(idx: np.ndarray, line: list[int], source: str) -> None:
    """Every region needs its own index (the lines of each duplicate are listed)."""
    values, counts = np.unique(idx, return_counts=True)
    duplicated = values[counts > 1]
    if not duplicated.size:
        return
    problems = []
    for value in duplicated[:_MAX_LISTED]:
        lines = [str(line[r]) for r in np.flatnonzero(idx == value)]
        problems.append(f"index {value} appears on lines {', '.join(lines)}")
    raise UserError(
        f"{source}: duplicated index in the atlas label table "
        f"({duplicated.size} value(s)); every region needs its own index",
        problems,
    )


def _resolve_parents(idx: np.ndarray, rows: dict[str, list], source: str) -> np.ndarray:
    """Row position of each row's parent (-1 at the top); a parent is given by index or
    by name (a name on both sides is resolved to the child's side).

    Raises
    ------
    UserError
        Listing every parent that is not in the table or is ambiguous.
    """
    name, abbreviation, hemisphere = rows["name"], rows["abbreviation"], rows["hemisphere"]
    position = {int(v): r for r, v in enumerate(idx)}
    by_name: dict[str, list[int]] = {}
    for r in range(len(idx)):
        for key in {name[r].casefold(), abbreviation[r].casefold()} - {""}:
            by_name.setdefault(key, []).append(r)
    parent = np.full(len(idx), -1, dtype=np.int64)
    problems: list[str] = []
    for r, text in enumerate(rows["parent"]):
        where = f"{source}, line {rows['line'][r]}"
        if not text or text in _TOP_LEVEL_PARENTS:
            continue
        number = _as_integer(text)
        if number is not None:
            if number not in position:
                problems.append(
                    f"{where}: parent {number} of index {idx[r]} ({name[r]}) is not an "
                    "index of the table; add that row or correct the parent"
                )
                continue
            parent[r] = position[number]
            continue
        candidates = by_name.get(text.casefold(), [])
        if len(candidates) > 1:  # the same name on both sides: take the child's side
            same_side = [c for c in candidates if hemisphere[c] == hemisphere[r]]
            candidates = same_side if len(same_side) == 1 else candidates
        if not candidates:
            close = difflib.get_close_matches(text, list(dict.fromkeys(name)), n=1)
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            problems.append(
                f"{where}: parent {text!r} of index {idx[r]} ({name[r]}) is neither an index "
                f"nor a name in the table{hint}"
            )
        elif len(candidates) > 1:
            listed = ", ".join(str(idx[c]) for c in candidates)
            problems.append(
                f"{where}: parent {text!r} of index {idx[r]} is ambiguous (indices {listed}); "
                "give the parent's index instead of its name"
            )
        else:
            parent[r] = candidates[0]
    if problems:
        raise UserError(
            f"{source}: the atlas label table has {len(problems)} parent problem(s)", problems
        )
    return parent


def _check_cycles(parent: np.ndarray, index: np.ndarray, name: list[str], source: str) -> None:
    state = np.zeros(len(parent), dtype=np.int8)  # 0 unseen, 1 on the current path, 2 done
    for start in range(len(parent)):
        path: list[int] = []
        node = start
        while node >= 0 and state[node] == 0:
            state[node] = 1
            path.append(node)
            node = int(parent[node])
        if node >= 0 and state[node] == 1:
            cycle = path[path.index(node) :] + [node]
            described = " → ".join(f"{index[c]} ({name[c]})" for c in cycle)
            raise UserError(
                f"{source}: the parents in the atlas label table form a cycle: {described}; "
                "a structure cannot contain itself, so break the cycle by correcting one "
                "parent"
            )
        state[path] = 2


# --------------------------------------------------------------------------------------
# Labels: lookup and slabs
# --------------------------------------------------------------------------------------


class _Lookup:
    """Map label values to table rows: row ≥ 0, -1 for background 0, -2 for unknown."""

    def __init__(self, index: np.ndarray, max_label: int) -> None:
        self.index = index
        top = max(int(index.max(initial=0)), int(max_label))
        if top < LOOKUP_TABLE_LIMIT:
            self.table: np.ndarray | None = np.full(top + 1, -2, dtype=np.int64)
            self.table[index] = np.arange(index.size)
            self.table[0] = -1
        else:
            self.table = None
            self.order = np.argsort(index)
            self.sorted = index[self.order]

    def __call__(self, labels: np.ndarray) -> np.ndarray:
        labels = labels.astype(np.int64, copy=False)
        if self.table is not None:
            return self.table[labels]
        where = np.searchsorted(self.sorted, labels)
        where = np.minimum(where, max(self.sorted.size - 1, 0))
        rows = np.full(labels.shape, -2, dtype=np.int64)
        if self.sorted.size:
            hit = self.sorted[where] == labels
            rows[hit] = self.order[where[hit]]
        rows[labels == 0] = -1
        return rows


def _slabs(shape: tuple[int, ...], axis: int):
    """Yield index ranges along ``axis`` holding about :data:`SLAB_VOXELS` voxels each."""
    per_plane = int(np.prod(shape)) // max(shape[axis], 1)
    step = max(1, SLAB_VOXELS // max(per_plane, 1))
    for start in range(0, shape[axis], step):
        yield start, min(start + step, shape[axis])


def _slab_axis(data: np.ndarray) -> int:
    # Cut along the slowest-varying axis of the array in memory so slabs are contiguous.
    return 2 if data.flags.f_contiguous and not data.flags.c_contiguous else 0


def _slab_coordinates(
    shape: tuple[int, int, int], axis: int, start: int, stop: int, matrix: np.ndarray
) -> list[np.ndarray]:
    """Rows of ``matrix @ [i, j, k, 1]`` for every voxel of a slab, raveled in C order."""
    ranges = [np.arange(n, dtype=np.float64) for n in shape]
    ranges[axis] = np.arange(start, stop, dtype=np.float64)
    i, j, k = ranges
    out = []
    for row in matrix:
        values = (
            row[0] * i[:, None, None] + row[1] * j[None, :, None] + row[2] * k[None, None, :]
        ) + row[3]
        out.append(values.ravel())
    return out


def _take_slab(data: np.ndarray, axis: int, start: int, stop: int) -> np.ndarray:
    index: list[slice] = [slice(None)] * 3
    index[axis] = slice(start, stop)
    return np.asarray(data[tuple(index)])


def _check_integer_labels(data: np.ndarray, source: str, axis: int) -> int:
    """Return the largest label after checking the image holds whole numbers ≥ 0."""
    if data.dtype.kind not in "iufb":
        raise UserError(
            f"{source}: the atlas image has data type {data.dtype}; it must hold whole-number "
            "labels"
        )
    top = 0
    for start, stop in _slabs(data.shape, axis):
        slab = _take_slab(data, axis, start, stop)
        if slab.dtype.kind == "f":
            bad = ~np.isfinite(slab) | (slab != np.round(slab))
            if bad.any():
                where = tuple(int(v) for v in np.argwhere(bad)[0])
                where = tuple(w + (start if a == axis else 0) for a, w in enumerate(where))
                raise UserError(
                    f"{source}: the atlas image holds non-integer values (e.g. "
                    f"{float(slab[bad][0])!r} at voxel {where}); an atlas must hold whole-"
                    "number labels — save it with an integer data type and resample it only "
                    "with nearest-neighbour interpolation"
                )
        if slab.size:
            low = slab.min()
            if low < 0:
                raise UserError(
                    f"{source}: the atlas image holds negative labels (e.g. {low!r}); labels "
                    "must be whole numbers ≥ 0 (0 = background)"
                )
            top = max(top, int(slab.max()))
    return top


# --------------------------------------------------------------------------------------
# Midline and mirror symmetry
# --------------------------------------------------------------------------------------


def _best_separating_plane(x: np.ndarray, n_left: np.ndarray, n_right: np.ndarray) -> float | None:
    """Plane ``x = c`` with the fewest left points right of it plus right points left of it.

    ``x`` are sorted distinct positions, ``n_left`` / ``n_right`` the point counts there.
    Among equally good planes the middle of the best run of gaps is taken; between
    several separate runs, the one nearest the middle of the two centroids.
    """
    if n_left.sum() == 0 or n_right.sum() == 0:
        return None
    # Gap g lies between x[g-1] and x[g] (g = 0: below all, g = m: above all).
    left_after = n_left.sum() - np.concatenate([[0], np.cumsum(n_left)])
    right_before = np.concatenate([[0], np.cumsum(n_right)])
    errors = left_after + right_before
    best = np.flatnonzero(errors == errors.min())
    runs = np.split(best, np.flatnonzero(np.diff(best) > 1) + 1)
    lows = np.array([x[r[0] - 1] if r[0] > 0 else x[0] for r in runs], dtype=float)
    highs = np.array([x[r[-1]] if r[-1] < x.size else x[-1] for r in runs], dtype=float)
    centres = (lows + highs) / 2.0
    target = (np.average(x, weights=n_left) + np.average(x, weights=n_right)) / 2.0
    return float(centres[np.argmin(np.abs(centres - target))])


def _x_histogram_bin(affine: np.ndarray) -> float:
    # Positions closer than a tenth of the smallest voxel edge are pooled when fitting the
    # midline: the answer is needed to within half a voxel, and pooling keeps the counts
    # small for oblique affines where every voxel has its own x.
    return float(np.sqrt((affine[:3, :3] ** 2).sum(axis=0)).min()) / 10.0


class _XHistogram:
    """Counts of left and right points over world x, pooled in narrow bins."""

    def __init__(self, affine: np.ndarray, shape: tuple[int, int, int]) -> None:
        corners = np.array(np.meshgrid(*[[0, n - 1] for n in shape], indexing="ij")).reshape(3, -1)
        xs = affine[0, :3] @ corners + affine[0, 3]
        self.low = float(xs.min())
        self.width = _x_histogram_bin(affine)
        self.n_bins = int(np.floor((float(xs.max()) - self.low) / self.width)) + 2
        self.sum_x = np.zeros(self.n_bins)
        self.left = np.zeros(self.n_bins)
        self.right = np.zeros(self.n_bins)

    def add(self, x: np.ndarray, left: np.ndarray, right: np.ndarray) -> None:
        bins = np.clip(((x - self.low) / self.width).astype(np.int64), 0, self.n_bins - 1)
        either = left | right
        self.sum_x += np.bincount(bins[either], weights=x[either], minlength=self.n_bins)
        self.left += np.bincount(bins[left], minlength=self.n_bins)
        self.right += np.bincount(bins[right], minlength=self.n_bins)

    def plane(self) -> float | None:
        used = (self.left + self.right) > 0
        x = self.sum_x[used] / (self.left + self.right)[used]
        return _best_separating_plane(x, self.left[used], self.right[used])

    def wrong_side_share(self, plane: float) -> float:
        """Share of left and right points on the wrong side of ``x = plane`` (points
        within the midline tolerance of the plane count on neither side)."""
        used = (self.left + self.right) > 0
        x = self.sum_x[used] / (self.left + self.right)[used]
        wrong = self.left[used][x > plane + MIDLINE_TOLERANCE_MM].sum()
        wrong += self.right[used][x < plane - MIDLINE_TOLERANCE_MM].sum()
        total = float((self.left + self.right).sum())
        return float(wrong) / total if total else 0.0


def find_midline(
    label_data: np.ndarray,
    affine: np.ndarray,
    left_mask: np.ndarray,
    right_mask: np.ndarray,
) -> float | None:
    """World x of the sagittal plane that best separates left from right labels.

    The plane ``x = c`` minimises the number of left-labelled voxels right of it plus
    right-labelled voxels left of it; among equally good planes the middle of the gap is
    taken, so an atlas whose two sides are separated by an unlabelled column gets its
    midline in the middle of that column.

    Parameters
    ----------
    label_data
        3-D label image (on the atlas grid).
    affine
        Its 4 × 4 voxel → mm affine.
    left_mask, right_mask
        Either boolean arrays of ``label_data``'s shape marking the voxels of left- and
        right-labelled regions, or 1-D arrays of the label values of left and right
        regions (the masks are then formed slab by slab, which saves memory on a large
        atlas).

    Returns
    -------
    float or None
        The plane's world x in mm, or None when either side has no voxel.
    """
    label_data = np.asarray(label_data)
    affine = np.asarray(affine, dtype=float)
    by_value = np.ndim(left_mask) == 1 and np.ndim(right_mask) == 1
    histogram = _XHistogram(affine, label_data.shape)
    axis = 0
    for start, stop in _slabs(label_data.shape, axis):
        (x,) = _slab_coordinates(label_data.shape, axis, start, stop, affine[:1])
        if by_value:
            slab = _take_slab(label_data, axis, start, stop).ravel()
            left = np.isin(slab, np.asarray(left_mask)) & (slab != 0)
            right = np.isin(slab, np.asarray(right_mask)) & (slab != 0)
        else:
            left = np.asarray(left_mask, dtype=bool)[start:stop].ravel()
            right = np.asarray(right_mask, dtype=bool)[start:stop].ravel()
        histogram.add(x, left, right)
    return histogram.plane()


def mirror_dice(mask: np.ndarray, affine: np.ndarray, midline_mm: float) -> float:
    """Dice coefficient of a mask with its mirror image about the plane ``x = midline_mm``.

    Each voxel centre is reflected in world space (``x → 2·midline − x``) and takes the
    mask value of the nearest voxel there (outside the grid counts as outside the mask).

    Parameters
    ----------
    mask
        3-D boolean mask.
    affine
        Its 4 × 4 voxel → mm affine.
    midline_mm
        World x of the mirror plane.

    Returns
    -------
    float
        ``2 |M ∩ M'| / (|M| + |M'|)``, 1 for a perfectly symmetric mask; NaN for an empty
        mask.

    References
    ----------
    Dice LR (1945). Measures of the amount of ecologic association between species.
    Ecology 26:297-302.
    """
    mask = np.asarray(mask, dtype=bool)
    affine = np.asarray(affine, dtype=float)
    reflect = np.eye(4)
    reflect[0, 0] = -1.0
    reflect[0, 3] = 2.0 * float(midline_mm)
    to_source = np.linalg.inv(affine) @ reflect @ affine
    shape = mask.shape
    mirrored_count = 0
    overlap = 0
    for start, stop in _slabs(shape, 0):
        ijk = _slab_coordinates(shape, 0, start, stop, to_source[:3])
        index = [np.floor(c + 0.5).astype(np.int64) for c in ijk]
        inside = np.ones(index[0].shape, dtype=bool)
        for d in range(3):
            inside &= (index[d] >= 0) & (index[d] < shape[d])
        mirrored = np.zeros(index[0].shape, dtype=bool)
        mirrored[inside] = mask[index[0][inside], index[1][inside], index[2][inside]]
        mirrored_count += int(mirrored.sum())
        overlap += int((mirrored & mask[start:stop].ravel()).sum())
    total = int(mask.sum()) + mirrored_count
    return float("nan") if total == 0 else 2.0 * overlap / total


# --------------------------------------------------------------------------------------
# Building the atlas
# --------------------------------------------------------------------------------------


def _same_grid(shape: tuple[int, ...], affine: np.ndarray, grid: Grid) -> bool:
    return tuple(shape) == tuple(grid.shape) and bool(
        np.abs(affine - grid.affine).max() <= AFFINE_TOLERANCE_MM
    )


def _world_box(shape: tuple[int, ...], affine: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    corners = np.array(np.meshgrid(*[[-0.5, n - 0.5] for n in shape], indexing="ij"))
    corners = corners.reshape(3, -1)
    xyz = affine[:3, :3] @ corners + affine[:3, 3:4]
    return xyz.min(axis=1), xyz.max(axis=1)


def _effective_hemisphere(table: _Table) -> list[str]:
    """Own hemisphere; when empty, the nearest ancestor's (left / right / both), else ""."""
    out: list[str] = [""] * len(table.index)
    done = np.zeros(len(table.index), dtype=bool)

    def resolve(row: int) -> str:
        chain = []
        node = row
        while node >= 0 and not done[node]:
            chain.append(node)
            node = int(table.parent[node])
        inherited = out[node] if node >= 0 else ""
        for r in reversed(chain):
            own = table.hemisphere[r]
            out[r] = own if own else inherited
            inherited = out[r]
            done[r] = True
        return out[row]

    for row in range(len(table.index)):
        resolve(row)
    return out


def _add_weighted(
    keys: list[np.ndarray], weights: list[np.ndarray], key: np.ndarray, weight: np.ndarray
) -> None:
    """Reduce (key, weight) pairs of one slab and keep them for the final sum."""
    if key.size == 0:
        return
    unique, inverse = np.unique(key, return_inverse=True)
    keys.append(unique)
    weights.append(np.bincount(inverse, weights=weight))


def build_atlas(
    label_data: np.ndarray,
    label_affine: np.ndarray,
    table: pd.DataFrame,
    grid: Grid,
    mask: np.ndarray,
    *,
    midline_mm: float | None = None,
    min_coverage: float = DEFAULT_ATLAS_MIN_COVERAGE,
    image_name: str = "atlas image",
    table_name: str = "atlas label table",
) -> Atlas:
    """Bring a label image and its table onto the study grid.

    Parameters
    ----------
    label_data
        3-D integer label image (0 = background); float arrays are accepted when every
        value is a whole number.
    label_affine
        Its 4 × 4 voxel → mm affine. The atlas must overlap the study grid in world space.
    table
        The label table (columns as in the module docstring; cells may be text or
        numbers).
    grid
        The study grid.
    mask
        Boolean analysis mask on ``grid``.
    midline_mm
        World x of the mid-sagittal plane; fitted when omitted (see the module docstring).
    min_coverage
        Smallest share of the mask that the atlas labels must cover
        (:data:`DEFAULT_ATLAS_MIN_COVERAGE`).
    image_name, table_name
        How to name the two inputs in messages (their file names when read from files).

    Returns
    -------
    Atlas

    Raises
    ------
    UserError
        For non-integer or negative labels; labels missing from the table (listed);
        duplicated indices; a parent that does not exist; a parent cycle (named); a
        missing ``index`` or ``name`` column; an atlas that covers less than
        ``min_coverage`` of the mask.

    Notes
    -----
    The steps, each a function of its own: check the inputs; validate the table; scan
    the image for unknown labels and left/right positions (:func:`_scan_labels`); place
    the midline (:func:`_place_midline`); make the leaves (:func:`_leaf_rows`); count
    every leaf's voxels per side and per statistical voxel (:func:`_count_leaves`);
    split bilateral leaves (:func:`_split_bilateral_leaves`); the shares matrix
    (:func:`_region_shares`), the regions table (:func:`_regions_table`) and the label
    volume (:func:`_label_volume`); refuse a low coverage (:func:`_check_coverage`);
    collect the warnings (:func:`_atlas_warnings`).
    """
    label_data, label_affine, mask = _check_build_inputs(
        label_data, label_affine, mask, grid, image_name
    )
    shape = tuple(int(s) for s in label_data.shape)
    rows = _validate_table(table, table_name)
    axis = _slab_axis(label_data)
    lookup = _Lookup(rows.index, _check_integer_labels(label_data, image_name, axis))
    hemisphere = _effective_hemisphere(rows)
    own_count, histogram = _scan_labels(
        label_data,
        label_affine,
        axis,
        lookup,
        hemisphere,
        midline_mm is None,
        image_name,
        table_name,
    )
    midline, midline_source, note = _place_midline(midline_mm, histogram, grid, mask, table_name)
    tree = _leaf_rows(rows, hemisphere, own_count)
    resampling, finer = _resampling(shape, label_affine, grid)
    counts = _count_leaves(label_data, label_affine, axis, lookup, tree, grid, mask, midline, finer)
    split_rows = _split_bilateral_leaves(tree, counts)
    shares, membership, order, ancestors = _region_shares(tree, split_rows, counts)
    n_voxels = counts.side_count.reshape(-1) @ membership  # atlas voxels per region row
    regions = _regions_table(tree, order, ancestors, n_voxels, shares, label_affine, grid)
    label_volume, coverage = _label_volume(regions, shares, grid, mask)
    _check_coverage(coverage, min_coverage, shape, label_affine, grid, image_name)
    warnings = [note] if note else []
    warnings += _atlas_warnings(tree, hemisphere, counts, n_voxels, midline, image_name, table_name)
    dice = mirror_dice(mask, grid.affine, midline)
    if np.isfinite(dice) and dice < MIRROR_DICE_WARNING:
        warnings.append(
            f"the analysis mask matches its mirror image about x = {midline:.3f} mm "
            f"({midline_source}) with a Dice of only {dice:.2f}; the midline may be wrong "
            "or the mask covers one side more than the other"
        )
    return Atlas(
        regions=regions,
        shares=shares,
        label_volume=label_volume,
        resampling=resampling,
        midline_mm=float(midline),
        midline_source=midline_source,
        mirror_dice=float(dice),
        orientation=describe_orientation(grid.affine),
        coverage=coverage,
        warnings=tuple(warnings),
    )


# --------------------------------------------------------------------------------------
# The steps of build_atlas
# --------------------------------------------------------------------------------------


def _check_build_inputs(
    label_data: np.ndarray, label_affine: np.ndarray, mask: np.ndarray, grid: Grid, image_name: str
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A 3-D label image (a 4-D image with one volume is accepted), the mask on the grid."""
    label_data = np.asarray(label_data)
    if label_data.ndim == 4 and label_data.shape[3] == 1:
        label_data = label_data[..., 0]
    if label_data.ndim != 3:
        raise UserError(f"{image_name}: an atlas image must be 3-D, found {label_data.shape}")
    mask = np.asarray(mask, dtype=bool)
    if mask.shape != tuple(grid.shape):
        raise ValueError(f"mask shape {mask.shape} differs from the grid {grid.shape}")
    return label_data, np.asarray(label_affine, dtype=float), mask


def _scan_labels(
    label_data: np.ndarray,
    label_affine: np.ndarray,
    axis: int,
    lookup: _Lookup,
    hemisphere: list[str],
    fit_midline: bool,
    image_name: str,
    table_name: str,
) -> tuple[np.ndarray, _XHistogram | None]:
    """First pass over the image: voxels per table row and, when the midline is to be
    fitted, a histogram of left- and right-labelled positions over world x.

    Raises
    ------
    UserError
        When label values of the image are missing from the table (listed).
    """
    shape = tuple(int(s) for s in label_data.shape)
    n_table = len(hemisphere)
    # Indexed by table row, or -1 / -2 (background / unknown) from the end.
    left_rows = np.array([h == "left" for h in hemisphere] + [False, False])
    right_rows = np.array([h == "right" for h in hemisphere] + [False, False])
    fit = fit_midline and left_rows.any() and right_rows.any()
    histogram = _XHistogram(label_affine, shape) if fit else None
    own_count = np.zeros(n_table, dtype=np.int64)
    unknown: set[int] = set()
    for start, stop in _slabs(shape, axis):
        labels = _take_slab(label_data, axis, start, stop).ravel()
        row = lookup(labels)
        bad = row == -2
        if bad.any():
            unknown.update(int(v) for v in np.unique(labels[bad])[:1000])
        own_count += np.bincount(row[row >= 0], minlength=n_table)
        if histogram is not None:
            (x,) = _slab_coordinates(shape, axis, start, stop, label_affine[:1])
            histogram.add(x, left_rows[row], right_rows[row])
    if unknown:
        listed = sorted(unknown)
        shown = ", ".join(str(v) for v in listed[:_MAX_LISTED])
        more = f" and {len(listed) - _MAX_LISTED} more" if len(listed) > _MAX_LISTED else ""
        raise UserError(
            f"{image_name}: {len(listed)} label value(s) in the image are missing from "
            f"{table_name}: {shown}{more}; add a row for each (index, name) or relabel them 0"
        )
    return own_count, histogram


def _place_midline(
    midline_mm: float | None,
    histogram: _XHistogram | None,
    grid: Grid,
    mask: np.ndarray,
    table_name: str,
) -> tuple[float, str, str | None]:
    """The midline's world x, where it came from, and a note when it is a guess.

    A given midline is used as it is. Otherwise the plane that separates the left- from
    the right-labelled voxels, unless the labels disagree with the header (more than
    :data:`LABEL_PLANE_DISAGREEMENT` of them on the wrong side of that plane); then, and
    when no regions are labelled left and right, the brain's own mirror plane.
    """
    if midline_mm is not None:
        return float(midline_mm), MIDLINE_GIVEN, None
    fitted = histogram.plane() if histogram is not None else None
    if fitted is not None and histogram.wrong_side_share(fitted) <= LABEL_PLANE_DISAGREEMENT:
        return fitted, MIDLINE_FITTED, None
    mirror = best_mirror_plane(mask, grid.affine)
    if mirror is not None and fitted is not None:
        # the labels disagree with the header: _atlas_warnings says how
        return mirror.x_mm, MIDLINE_MIRROR, None
    if mirror is not None:
        note = (
            f"{table_name}: no regions are labelled left and right on both sides, so the "
            f"midline is the plane about which the analysis mask mirrors itself best "
            f"(x = {mirror.x_mm:.3f} mm); give [atlas] midline_mm if that is wrong"
        )
        return mirror.x_mm, MIDLINE_MIRROR, note
    centre = grid.affine[:3, :3] @ ((np.asarray(grid.shape) - 1) / 2.0) + grid.affine[:3, 3]
    midline = float(centre[0])
    note = (
        f"{table_name}: no regions are labelled left and right on both sides and the mask "
        f"is empty, so the midline is taken as the centre of the study grid (x = "
        f"{midline:.3f} mm); give [atlas] midline_mm if that is wrong"
    )
    return midline, MIDLINE_GRID_CENTRE, note


@dataclass
class _RegionRows:
    """The region rows being built: the table's rows, then the rows made from them."""

    index: list[int]
    name: list[str]
    abbreviation: list[str]
    parent: list[int]  # row positions, -1 at the top
    color: list[str]
    hemisphere: list[str]
    next_index: int
    n_table: int
    leaves: np.ndarray = None  # type: ignore[assignment]  # rows that are leaves
    leaf_of_row: np.ndarray = None  # type: ignore[assignment]  # table row → leaf number

    def add(self, name: str, abbreviation: str, parent: int, color: str, hemi: str) -> int:
        """Append a row (a new index after the table's largest); return its position."""
        self.index.append(self.next_index)
        self.next_index += 1
        self.name.append(name)
        self.abbreviation.append(abbreviation)
        self.parent.append(int(parent))
        self.color.append(color)
        self.hemisphere.append(hemi)
        return len(self.index) - 1


def _leaf_rows(rows: _Table, hemisphere: list[str], own_count: np.ndarray) -> _RegionRows:
    """Leaves: table rows without children, plus an "(other)" leaf for each parent that is
    itself painted in the image."""
    n_table = len(rows.index)
    has_child = np.zeros(n_table, dtype=bool)
    has_child[rows.parent[rows.parent >= 0]] = True
    tree = _RegionRows(
        index=list(rows.index.tolist()),
        name=list(rows.name),
        abbreviation=list(rows.abbreviation),
        parent=list(rows.parent.tolist()),
        color=list(rows.color),
        hemisphere=list(hemisphere),
        next_index=int(rows.index.max(initial=0)) + 1,
        n_table=n_table,
    )
    leaf_of_table_row = np.where(has_child, -1, np.arange(n_table))
    for r in np.flatnonzero(has_child & (own_count > 0)):
        abbreviation = f"{rows.abbreviation[r]}-other" if rows.abbreviation[r] else ""
        leaf_of_table_row[r] = tree.add(
            f"{rows.name[r]} (other)", abbreviation, r, rows.color[r], hemisphere[r]
        )
    n_rows = len(tree.index)
    tree.leaves = np.flatnonzero(~np.append(has_child, np.zeros(n_rows - n_table, bool)))
    leaf_column = np.full(n_rows, -1, dtype=np.int64)
    leaf_column[tree.leaves] = np.arange(tree.leaves.size)
    # Table row → leaf number (0..n_leaves-1); -1 background (index -1 and -2).
    tree.leaf_of_row = np.append(leaf_column[leaf_of_table_row], [-1, -1])
    return tree


def _reordering(shape: tuple[int, ...], label_affine: np.ndarray, grid: Grid) -> str | None:
    """How the atlas array is stored relative to the study grid when both hold the same
    voxels (its index map to the grid is a signed permutation with whole-voxel shifts
    and the two cover the same box); None otherwise."""
    to_atlas = np.linalg.inv(label_affine) @ grid.affine
    linear, shift = to_atlas[:3, :3], to_atlas[:3, 3]
    rounded = np.rint(linear)
    # tolerance in voxels: the affine tolerance over the voxel size
    tolerance = AFFINE_TOLERANCE_MM / float(grid.voxel_size.min())
    if np.abs(linear - rounded).max() > tolerance or np.abs(shift - np.rint(shift)).max() > (
        tolerance * (1 + np.abs(grid.shape).max())
    ):
        return None
    if not (np.abs(rounded).sum(axis=0) == 1).all() or not (np.abs(rounded).sum(axis=1) == 1).all():
        return None
    source = np.argmax(np.abs(rounded), axis=0)  # atlas axis of each grid axis
    if tuple(shape[a] for a in source) != tuple(grid.shape):
        return None
    corners = np.array([[0, 0, 0], np.asarray(grid.shape) - 1], dtype=float)
    ends = corners @ rounded.T + np.rint(shift)
    if ends.min() < -0.5 or (ends.max(axis=0) > np.asarray(shape) - 0.5).any():
        return None
    words = []
    for g, a in enumerate(source):
        sign = rounded[a, g]
        if a != g:
            words.append(f"atlas axis {'ijk'[a]} holds study axis {'ijk'[g]}")
        if sign < 0:
            words.append(f"reversed along study axis {'ijk'[g]}")
    return ", ".join(words) if words else None


def _resampling(shape: tuple[int, ...], label_affine: np.ndarray, grid: Grid) -> tuple[str, bool]:
    """How the atlas reaches the study grid, and whether it is finer than the grid."""
    if _same_grid(shape, label_affine, grid):
        return RESAMPLING_SAME, False
    reordered = _reordering(shape, label_affine, grid)
    if reordered:
        # nearest-neighbour look-up lands exactly on the matching voxel: a copy
        return f"{RESAMPLING_REORDERED} ({reordered})", False
    ratio = abs(np.linalg.det(label_affine[:3, :3])) / grid.voxel_volume
    if ratio < 1.0 - 1e-6:
        return RESAMPLING_FRACTIONAL, True
    if ratio <= 1.0 + 1e-6:
        return RESAMPLING_NEAREST_SAME_SIZE, False
    return RESAMPLING_NEAREST, False


@dataclass
class _LeafCounts:
    """Per-leaf voxel counts by side, and weighted (statistical voxel, leaf side) pairs."""

    side_count: np.ndarray  # (n_leaves, 2) atlas voxels per side (midline voxels: half)
    strict: np.ndarray  # (n_leaves, 2) voxels strictly on each side
    far: np.ndarray  # (n_leaves,) voxels more than one study voxel from the midline
    keys: list[np.ndarray]  # statistical voxel * 2 n_leaves + 2 leaf + side
    weights: list[np.ndarray]
    denominator: np.ndarray  # (n_mask,) atlas voxels falling in each statistical voxel


def _left_weight(offset: np.ndarray) -> np.ndarray:
    """1 left of the midline, 0 right of it, 1/2 on it."""
    return np.where(
        offset < -MIDLINE_TOLERANCE_MM, 1.0, np.where(offset > MIDLINE_TOLERANCE_MM, 0.0, 0.5)
    )


def _count_leaves(
    label_data: np.ndarray,
    label_affine: np.ndarray,
    axis: int,
    lookup: _Lookup,
    tree: _RegionRows,
    grid: Grid,
    mask: np.ndarray,
    midline: float,
    finer: bool,
) -> _LeafCounts:
    """Second pass: counts per leaf and side over the whole atlas, and each statistical
    voxel's share of each leaf side (fractional when the atlas is finer, else nearest)."""
    shape = tuple(int(s) for s in label_data.shape)
    n_leaves = tree.leaves.size
    mask_row = np.full(grid.shape, -1, dtype=np.int64)
    n_mask = int(mask.sum())
    mask_row[mask] = np.arange(n_mask)
    band = float(np.abs(grid.affine[0, :3]).max())  # world-x extent of one study voxel step
    counts = _LeafCounts(
        side_count=np.zeros((n_leaves, 2)),
        strict=np.zeros((n_leaves, 2), dtype=np.int64),
        far=np.zeros(n_leaves, dtype=np.int64),
        keys=[],
        weights=[],
        denominator=np.zeros(n_mask),
    )
    to_grid = np.linalg.inv(grid.affine) @ label_affine
    for start, stop in _slabs(shape, axis):
        labels = _take_slab(label_data, axis, start, stop).ravel()
        leaf = tree.leaf_of_row[lookup(labels)]
        matrix = np.vstack([label_affine[:1], to_grid[:3]]) if finer else label_affine[:1]
        coords = _slab_coordinates(shape, axis, start, stop, matrix)
        offset = coords[0] - midline
        w_left = _left_weight(offset)
        labelled = leaf >= 0
        lf = leaf[labelled]
        wl = w_left[labelled]
        counts.side_count[:, 0] += np.bincount(lf, weights=wl, minlength=n_leaves)
        counts.side_count[:, 1] += np.bincount(lf, weights=1.0 - wl, minlength=n_leaves)
        counts.strict[:, 0] += np.bincount(lf[wl == 1.0], minlength=n_leaves)
        counts.strict[:, 1] += np.bincount(lf[wl == 0.0], minlength=n_leaves)
        counts.far += np.bincount(
            lf[np.abs(offset[labelled]) > band + MIDLINE_TOLERANCE_MM], minlength=n_leaves
        )
        if finer:
            _add_fine_shares(counts, coords[1:], labels, leaf, w_left, mask_row, grid, n_leaves)
    if not finer:
        _add_nearest_shares(counts, label_data, label_affine, lookup, tree, grid, mask, midline)
    return counts


def _add_fine_shares(
    counts: _LeafCounts,
    grid_coords: np.ndarray,
    labels: np.ndarray,
    leaf: np.ndarray,
    w_left: np.ndarray,
    mask_row: np.ndarray,
    grid: Grid,
    n_leaves: int,
) -> None:
    """Atlas finer than the statistics: each atlas voxel counts towards the statistical
    voxel its centre falls in."""
    n_mask = counts.denominator.size
    ijk = [np.floor(c + 0.5).astype(np.int64) for c in grid_coords]
    inside = np.ones(labels.shape, dtype=bool)
    for d in range(3):
        inside &= (ijk[d] >= 0) & (ijk[d] < grid.shape[d])
    target = np.full(labels.shape, -1, dtype=np.int64)
    target[inside] = mask_row[ijk[0][inside], ijk[1][inside], ijk[2][inside]]
    in_mask = target >= 0
    counts.denominator += np.bincount(target[in_mask], minlength=n_mask)
    use = in_mask & (leaf >= 0)
    t, lf2, wl2 = target[use], leaf[use], w_left[use]
    for side, weight in ((_SIDE_LEFT, wl2), (_SIDE_RIGHT, 1.0 - wl2)):
        keep = weight > 0
        key = t[keep] * (2 * n_leaves) + lf2[keep] * 2 + side
        _add_weighted(counts.keys, counts.weights, key, weight[keep])


def _add_nearest_shares(
    counts: _LeafCounts,
    label_data: np.ndarray,
    label_affine: np.ndarray,
    lookup: _Lookup,
    tree: _RegionRows,
    grid: Grid,
    mask: np.ndarray,
    midline: float,
) -> None:
    """Nearest neighbour (or the same grid): the atlas label at each statistical voxel's
    centre."""
    shape = tuple(int(s) for s in label_data.shape)
    n_leaves = tree.leaves.size
    to_atlas = np.linalg.inv(label_affine) @ grid.affine
    mask_ijk = np.argwhere(mask)  # C order, the order of volume[mask]
    n_mask = mask_ijk.shape[0]
    counts.denominator = np.ones(n_mask)
    for start in range(0, n_mask, SLAB_VOXELS):
        chunk = mask_ijk[start : start + SLAB_VOXELS].astype(np.float64)
        atlas_ijk = np.floor(chunk @ to_atlas[:3, :3].T + to_atlas[:3, 3] + 0.5).astype(np.int64)
        inside = np.all((atlas_ijk >= 0) & (atlas_ijk < np.asarray(shape)), axis=1)
        labels = np.zeros(chunk.shape[0], dtype=np.int64)
        a = atlas_ijk[inside]
        labels[inside] = np.asarray(label_data[a[:, 0], a[:, 1], a[:, 2]], dtype=np.int64)
        leaf = tree.leaf_of_row[lookup(labels)]
        x = chunk @ grid.affine[0, :3] + grid.affine[0, 3]
        w_left = _left_weight(x - midline)
        t = np.arange(start, start + chunk.shape[0])
        use = leaf >= 0
        for side, weight in ((_SIDE_LEFT, w_left), (_SIDE_RIGHT, 1.0 - w_left)):
            keep = use & (weight > 0)
            key = t[keep] * (2 * n_leaves) + leaf[keep] * 2 + side
            _add_weighted(counts.keys, counts.weights, key, weight[keep])


def _split_bilateral_leaves(tree: _RegionRows, counts: _LeafCounts) -> dict[int, tuple[int, int]]:
    """Leaves without a hemisphere of their own that lie on both sides of the midline
    get a left and a right row; one-sided ones get that side, the rest "both".

    Returns leaf number → (left row, right row) of the split leaves.
    """
    split_rows: dict[int, tuple[int, int]] = {}
    for number, region in enumerate(tree.leaves):
        if tree.hemisphere[region] in ("left", "right"):
            continue
        on_left, on_right = counts.strict[number]
        far = counts.far[number] > 0
        if on_left > 0 and on_right > 0 and far:
            name, abbreviation, color = (
                tree.name[region],
                tree.abbreviation[region],
                tree.color[region],
            )
            left = tree.add(name, abbreviation, region, color, "left")
            right = tree.add(name, abbreviation, region, color, "right")
            split_rows[number] = (left, right)
        elif on_left > 0 and on_right == 0 and far:
            tree.hemisphere[region] = "left"
        elif on_right > 0 and on_left == 0 and far:
            tree.hemisphere[region] = "right"
        else:
            tree.hemisphere[region] = "both"
    return split_rows


def _region_shares(
    tree: _RegionRows, split_rows: dict[int, tuple[int, int]], counts: _LeafCounts
) -> tuple[sp.csr_matrix, sp.csr_matrix, np.ndarray, list[list[int]]]:
    """Each in-mask voxel's share of every region (columns in display order), the leaf
    side → region membership, the display order and each row's ancestors."""
    n_leaves = tree.leaves.size
    n_regions = len(tree.index)
    parent = np.asarray(tree.parent, dtype=np.int64)
    # Display order: each row followed by the rows made from it.
    order = _display_order(parent, tree.n_table)
    ancestors = _ancestor_lists(parent)
    # Leaf side (2·leaf + side) → every region row it belongs to.
    src, dst = [], []
    for number, region in enumerate(tree.leaves):
        for side in (_SIDE_LEFT, _SIDE_RIGHT):
            target = split_rows[number][side] if number in split_rows else int(region)
            for a in ancestors[target]:
                src.append(2 * number + side)
                dst.append(a)
    membership = sp.csr_matrix(
        (np.ones(len(src)), (np.asarray(src, dtype=np.int64), np.asarray(dst, dtype=np.int64))),
        shape=(2 * n_leaves, n_regions),
    )
    if counts.keys:
        key = np.concatenate(counts.keys)
        weight = np.concatenate(counts.weights)
    else:
        key = np.zeros(0, dtype=np.int64)
        weight = np.zeros(0)
    denominator = counts.denominator
    n_mask = denominator.size
    with np.errstate(divide="ignore", invalid="ignore"):
        scale = np.where(denominator > 0, 1.0 / np.maximum(denominator, 1e-300), 0.0)
    voxel_counts = sp.csr_matrix(
        (weight * scale[key // (2 * n_leaves)], (key // (2 * n_leaves), key % (2 * n_leaves))),
        shape=(n_mask, 2 * n_leaves),
    )
    voxel_counts.sum_duplicates()
    shares = (voxel_counts @ membership).tocsr()
    shares = shares[:, order].tocsr()
    shares.sort_indices()
    return shares, membership, order, ancestors


def _regions_table(
    tree: _RegionRows,
    order: np.ndarray,
    ancestors: list[list[int]],
    n_voxels: np.ndarray,
    shares: sp.csr_matrix,
    label_affine: np.ndarray,
    grid: Grid,
) -> pd.DataFrame:
    """One row per region in display order (the columns of :attr:`Atlas.regions`)."""
    n_regions = len(tree.index)
    parent = np.asarray(tree.parent, dtype=np.int64)
    is_leaf = np.ones(n_regions, dtype=bool)
    is_leaf[parent[parent >= 0]] = False
    depth = np.array([len(ancestors[r]) - 1 for r in range(n_regions)], dtype=np.int64)
    hemisphere_final = _aggregate_hemispheres(parent, tree.hemisphere, is_leaf, n_voxels)
    index_array = np.asarray(tree.index, dtype=np.int64)
    parent_index = np.where(parent >= 0, index_array[np.maximum(parent, 0)], -1)
    atlas_voxel_volume = float(abs(np.linalg.det(label_affine[:3, :3])))
    mask_volume = np.asarray(shares.sum(axis=0)).ravel() * grid.voxel_volume
    return pd.DataFrame(
        {
            "index": index_array[order],
            "name": np.asarray(tree.name, dtype=object)[order],
            "abbreviation": np.asarray(tree.abbreviation, dtype=object)[order],
            "hemisphere": np.asarray(hemisphere_final, dtype=object)[order],
            "parent": parent_index[order],
            "depth": depth[order],
            "is_leaf": is_leaf[order],
            "n_voxels": n_voxels[order],
            "volume_mm3": n_voxels[order] * atlas_voxel_volume,
            "mask_volume_mm3": mask_volume,
            "color": np.asarray(tree.color, dtype=object)[order],
        }
    )


def _label_volume(
    regions: pd.DataFrame, shares: sp.csr_matrix, grid: Grid, mask: np.ndarray
) -> tuple[np.ndarray, float]:
    """The leaf with the largest share at each in-mask voxel, and the mask's coverage."""
    leaf_positions = np.flatnonzero(regions["is_leaf"].to_numpy())
    leaf_shares = shares[:, leaf_positions].tocsr()
    label_volume = np.zeros(grid.shape, dtype=np.int64)
    covered = np.asarray(leaf_shares.sum(axis=1)).ravel()
    best_leaf = _row_argmax(leaf_shares)
    leaf_indices = regions["index"].to_numpy()[leaf_positions]
    label_volume[mask] = np.where(best_leaf >= 0, leaf_indices[np.maximum(best_leaf, 0)], 0)
    coverage = float(covered.mean()) if covered.size else 0.0
    return label_volume, coverage


def _check_coverage(
    coverage: float,
    min_coverage: float,
    shape: tuple[int, ...],
    label_affine: np.ndarray,
    grid: Grid,
    image_name: str,
) -> None:
    """Refuse an atlas that labels less than ``min_coverage`` of the mask."""
    if coverage >= min_coverage:
        return
    low, high = _world_box(shape, label_affine)
    glow, ghigh = _world_box(tuple(grid.shape), grid.affine)
    apart = bool(np.any(high < glow) or np.any(ghigh < low))
    where = (
        " — the atlas does not overlap the study grid in world space at all "
        f"(atlas x,y,z from {np.round(low, 2).tolist()} to {np.round(high, 2).tolist()} "
        f"mm, study grid from {np.round(glow, 2).tolist()} to {np.round(ghigh, 2).tolist()}"
        " mm)"
        if apart
        else ""
    )
    raise UserError(
        f"{image_name}: the atlas labels cover {100 * coverage:.1f}% of the analysis mask, "
        f"less than the {100 * min_coverage:.0f}% required{where}; check that the atlas "
        "is in the template's space (same affine origin and orientation)"
    )


def _atlas_warnings(
    tree: _RegionRows,
    hemisphere: list[str],
    counts: _LeafCounts,
    n_voxels: np.ndarray,
    midline: float,
    image_name: str,
    table_name: str,
) -> list[str]:
    """Table regions absent from the image; left/right regions on the wrong side."""
    warnings: list[str] = []
    leaf_total = counts.side_count.sum(axis=1)
    absent = [r for r in range(tree.n_table) if n_voxels[r] == 0]
    if absent:
        shown = ", ".join(f"{tree.index[r]} ({tree.name[r]})" for r in absent[:_MAX_LISTED])
        more = f" and {len(absent) - _MAX_LISTED} more" if len(absent) > _MAX_LISTED else ""
        warnings.append(
            f"{table_name}: {len(absent)} region(s) of the table are not in the image "
            f"(nor any of their sub-regions): {shown}{more}"
        )
    wrong = []
    lateral = 0
    wrong_sides: set[str] = set()
    for number, region in enumerate(tree.leaves):
        own = hemisphere[region] if region < tree.n_table else tree.hemisphere[region]
        total = leaf_total[number]
        if own in ("left", "right") and total > 0:
            lateral += 1
            other = counts.side_count[number, 1 if own == "left" else 0] / total
            if other > WRONG_SIDE_WARNING:
                wrong.append(f"{tree.index[region]} ({tree.name[region]}, {own})")
                wrong_sides.add(own)
    if wrong and len(wrong) == lateral:
        warnings.append(_swapped_sides_message(midline, wrong_sides, image_name, table_name))
    elif wrong:
        warnings.append(
            f"{image_name}: {len(wrong)} region(s) labelled left or right lie mostly on the "
            f"other side of the midline x = {midline:.3f} mm: {', '.join(wrong[:_MAX_LISTED])}"
            "; check the atlas affine (x must grow towards the animal's right) and the table"
        )
    return warnings


def _swapped_sides_message(
    midline: float, sides: set[str], image_name: str, table_name: str
) -> str:
    """One sentence for a table whose left and right are the header's right and left
    (``sides``: the sides the table names, every region of which is on the other)."""
    other = {"left": "right", "right": "left"}
    where = ", and ".join(
        f"every region the table calls {side} lies on the header's {other[side]}"
        for side in ("left", "right")
        if side in sides
    )
    return (
        f"{table_name}: the table's left and right are swapped against the header of "
        f"{image_name}: {where} of the midline x = {midline:.3f} mm; if the header is "
        "right (x grows towards the animal's right), swap 'left' and 'right' in the "
        "table's hemisphere column, otherwise correct the headers of the atlas, template "
        "and maps; until then region sides taken from the table contradict the positions "
        "that mirror maps and asymmetry tests use"
    )


def _row_argmax(matrix: sp.csr_matrix) -> np.ndarray:
    """Column of the largest positive entry of each row (first on ties), -1 for empty rows.

    A vectorised replacement for ``csr_matrix.argmax(axis=1)``, which loops over rows in
    Python.
    """
    matrix = matrix.tocsr()
    matrix.sort_indices()
    n_rows = matrix.shape[0]
    out = np.full(n_rows, -1, dtype=np.int64)
    counts = np.diff(matrix.indptr)
    filled = counts > 0
    if not filled.any():
        return out
    row_max = np.zeros(n_rows)
    row_max[filled] = np.maximum.reduceat(matrix.data, matrix.indptr[:-1][filled])
    row_of = np.repeat(np.arange(n_rows), counts)
    hit = (matrix.data == row_max[row_of]) & (matrix.data > 0)
    rows, first = np.unique(row_of[hit], return_index=True)
    out[rows] = matrix.indices[np.flatnonzero(hit)[first]]
    return out


def _ancestor_lists(parent: np.ndarray) -> list[list[int]]:
    """For every row: itself, its parent, ..., its top-level ancestor."""
    out: list[list[int] | None] = [None] * len(parent)
    for row in range(len(parent)):
        chain = []
        node = row
        while node >= 0 and out[node] is None:
            chain.append(node)
            node = int(parent[node])
        tail: list[int] = out[node] if node >= 0 else []  # type: ignore[assignment]
        for r in reversed(chain):
            tail = [r, *tail]
            out[r] = tail
    return out  # type: ignore[return-value]


def _display_order(parent: np.ndarray, n_table: int) -> np.ndarray:
    """Table order, each row followed by the rows made from it ("(other)", left, right)."""
    made_from: dict[int, list[int]] = {}
    for row in range(n_table, len(parent)):
        made_from.setdefault(int(parent[row]), []).append(row)
    order: list[int] = []
    for row in range(n_table):
        stack = [row]
        while stack:
            node = stack.pop()
            order.append(node)
            stack.extend(reversed(made_from.get(node, [])))
    return np.asarray(order, dtype=np.int64)


def _aggregate_hemispheres(
    parent: np.ndarray, hemisphere: list[str], is_leaf: np.ndarray, n_voxels: np.ndarray
) -> list[str]:
    """Leaves keep theirs; a parent without its own side is left or right when every
    painted leaf below it is, else both."""
    sides: list[set[str]] = [set() for _ in parent]
    for row in np.flatnonzero(is_leaf):
        side = hemisphere[row] if hemisphere[row] in HEMISPHERES else "both"
        if n_voxels[row] > 0:
            node = int(row)
            while node >= 0:
                sides[node].add(side)
                node = int(parent[node])
    out = []
    for row in range(len(parent)):
        own = hemisphere[row]
        if is_leaf[row] or own in ("left", "right"):
            out.append(own if own in HEMISPHERES else "both")
        elif len(sides[row]) == 1:
            out.append(next(iter(sides[row])))
        else:
            out.append("both")
    return out
