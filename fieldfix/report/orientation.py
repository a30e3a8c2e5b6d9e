"""How a volume is laid on the screen, and what each screen edge points to in the head.

Every figure of the report shows axial planes in one convention: the voxel axes are
reordered and flipped to the closest of the world's right / anterior / superior axes
(:func:`nibabel.orientations.io_orientation`), then drawn with the subject's right on the
screen's right and anterior at the top. The letters on each panel's edges are not assumed
from that convention: they are read from the display affine, so a flipped or oblique
grid is labelled by where its screen directions really point (two letters, dominant
first, when a screen direction lies more than 20 degrees from every world axis). Slice
positions are world millimetres of the slice centre along the superior axis.

Examples
--------
>>> import numpy as np
>>> grid = DisplayGrid.of((4, 5, 6), np.diag([-2.0, 2.0, 3.0, 1.0]))
>>> grid.edge_letters()
{'left': 'L', 'right': 'R', 'top': 'A', 'bottom': 'P'}
>>> grid.shape
(4, 5, 6)
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["DisplayGrid", "direction_letters", "OBLIQUE_DEG"]

#: A screen direction further than this from every world axis gets two letters.
OBLIQUE_DEG = 20.0

_POSITIVE = ("R", "A", "S")
_NEGATIVE = ("L", "P", "I")


def direction_letters(vector) -> str:
    """World letters of a direction (RAS+): the dominant one, and a second one when oblique.

    Examples
    --------
    >>> direction_letters([0.0, -1.0, 0.0])
    'P'
    >>> direction_letters([0.8, 0.6, 0.0])
    'RA'
    """
    v = np.asarray(vector, float)
    v = v / np.linalg.norm(v)
    order = np.argsort(-np.abs(v))
    letter = lambda axis: _POSITIVE[axis] if v[axis] > 0 else _NEGATIVE[axis]  # noqa: E731
    first = letter(order[0])
    if abs(v[order[0]]) < math.cos(math.radians(OBLIQUE_DEG)):
        return first + letter(order[1])
    return first


@dataclass(frozen=True)
class DisplayGrid:
    """A voxel grid reoriented for display.

    Attributes
    ----------
    source_shape : tuple
        Shape of the volume as stored.
    transform : (3, 2) array
        nibabel orientation transform from stored to display axes.
    affine : (4, 4) array
        Display voxel index -> world mm.
    """

    source_shape: tuple
    transform: np.ndarray
    affine: np.ndarray

    @classmethod
    def of(cls, shape, affine) -> "DisplayGrid":
        import nibabel as nib

        shape = tuple(int(n) for n in shape[:3])
        affine = np.asarray(affine, float)
        ornt = nib.orientations.io_orientation(affine)
        transform = nib.orientations.ornt_transform(ornt, nib.orientations.axcodes2ornt("RAS"))
        back = nib.orientations.inv_ornt_aff(transform, shape)
        return cls(source_shape=shape, transform=transform, affine=affine @ back)

    @property
    def shape(self) -> tuple:
        order = self.transform[:, 0].astype(int)
        shape = [0, 0, 0]
        for source_axis, target_axis in enumerate(order):
            shape[target_axis] = self.source_shape[source_axis]
        return tuple(shape)

    @property
    def zooms(self) -> np.ndarray:
        return np.sqrt((self.affine[:3, :3] ** 2).sum(axis=0))

    def show(self, volume: np.ndarray) -> np.ndarray:
        """A stored volume (3D, or 3D plus trailing axes) in display order."""
        import nibabel as nib

        return nib.orientations.apply_orientation(np.asarray(volume), self.transform)

    def display_axis(self, source_axis: int) -> int:
        """The display axis a stored voxel axis became."""
        return int(self.transform[int(source_axis), 0])

    def to_display_index(self, index) -> tuple[int, int, int]:
        """A stored voxel index in display coordinates."""
        out = [0, 0, 0]
        for axis, (target, flip) in enumerate(self.transform.astype(int)):
            value = int(index[axis])
            out[target] = self.source_shape[axis] - 1 - value if flip < 0 else value
        return tuple(out)

    def edge_letters(self) -> dict[str, str]:
        """Letters of the four screen edges of an axial panel (read from the affine)."""
        right, up = self.affine[:3, 0], self.affine[:3, 1]
        return {"left": direction_letters(-right), "right": direction_letters(right),
                "top": direction_letters(up), "bottom": direction_letters(-up)}

    def slice_centre_mm(self, k: int) -> np.ndarray:
        """World position (mm) of the centre of display slice `k`."""
        nx, ny, _ = self.shape
        return (self.affine @ np.array([(nx - 1) / 2.0, (ny - 1) / 2.0, float(k), 1.0]))[:3]

    def slice_label(self, k: int) -> str:
        """``'z = 12.5 mm'`` (``'z ~ ...'`` when the slice is tilted from the axial plane)."""
        normal = self.affine[:3, 2] / np.linalg.norm(self.affine[:3, 2])
        z = float(self.slice_centre_mm(k)[2])
        sign = "\u2248" if abs(normal[2]) < math.cos(math.radians(10.0)) else "="
        return f"z {sign} {z:.1f} mm"

    def panel_map(self, k: int) -> dict:
        """World mm of an axial panel image: ``origin + fx * u + fy * v`` for fractions of
        its width (left to right) and height (top to bottom), for the page's crosshair."""
        nx, ny, _ = self.shape
        corner = self.affine @ np.array([-0.5, ny - 0.5, float(k), 1.0])
        u = self.affine[:3, 0] * nx
        v = -self.affine[:3, 1] * ny
        return {"o": [round(float(x), 3) for x in corner[:3]], "u": [round(float(x), 3) for x in u],
                "v": [round(float(x), 3) for x in v]}

    def aspect(self) -> float:
        """Height / width of an axial panel in millimetres."""
        nx, ny, _ = self.shape
        zx, zy, _ = self.zooms
        return (ny * zy) / max(nx * zx, 1e-9)
