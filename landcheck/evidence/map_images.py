"""8-bit RGBA map images drawn by nearest-neighbour resampling in 8 bits (matplotlib only).

matplotlib (3.11) turns every RGBA image into float32 before resampling it, premultiplied by alpha,
and back into bytes afterwards: for a 1429² image shown at 1240² pixels that is about 0.09 s a
draw, and the overview draws its images twice (PNG and SVG).  A nearest-neighbour resampling only
picks input pixels, so the maps' 8-bit images are resampled as bytes by the same Agg resampler
(``matplotlib.image._resample``), on the same pixel grid that matplotlib computes for them: opaque
pixels come out byte for byte as before; a semi-transparent one may differ by one level, where the
float round trip rounded down (tests/test_maps.py compares both).

The byte path follows matplotlib's private drawing code, so it is taken only on the matplotlib
versions it was checked against (:data:`CHECKED_MATPLOTLIB`); any other version draws through
matplotlib's own path, with the same look.

Imported only when a map is drawn.
"""

from __future__ import annotations

import numpy as np
from matplotlib import image as mimage
from matplotlib.transforms import Affine2D, Bbox, IdentityTransform

__all__ = ["RGBA8Image", "imshow_rgba8", "CHECKED_MATPLOTLIB"]

#: matplotlib minor versions whose private image code the byte path was checked against (tests/test_maps.py)
CHECKED_MATPLOTLIB = ("3.11",)


def _byte_path_checked() -> bool:
    import matplotlib

    return ".".join(matplotlib.__version__.split(".")[:2]) in CHECKED_MATPLOTLIB


class RGBA8Image(mimage.AxesImage):
    """An axes image of 8-bit RGBA cells drawn with nearest-neighbour resampling in 8 bits.

    Anything else (other data, interpolation or alpha, or an unsampled draw) is drawn by
    matplotlib's own path.
    """

    def _make_image(
        self, A, in_bbox, out_bbox, clip_bbox, magnification=1.0, unsampled=False, round_to_pixel_border=True
    ):
        resample = getattr(mimage, "_resample", None)
        if (
            not _BYTE_PATH
            or unsampled
            or not round_to_pixel_border
            or resample is None
            or A.dtype != np.uint8
            or A.ndim != 3
            or A.shape[2] != 4
            or self.get_interpolation() != "nearest"
            or self.get_alpha() is not None
        ):
            return super()._make_image(A, in_bbox, out_bbox, clip_bbox, magnification, unsampled, round_to_pixel_border)
        # the output pixel grid and the image-to-pixel transform as matplotlib's _ImageBase._make_image
        clipped = Bbox.intersection(out_bbox, clip_bbox)
        if clipped is None:
            return None, 0, 0, None
        e = clipped.extents * magnification
        x0 = np.floor(e[0] + 0.5)  # round half up
        y0 = np.ceil(e[1] - 0.5 - 1e-8)  # round half down
        x1 = np.floor(e[2] + 0.5 + 1e-8)
        y1 = np.ceil(e[3] - 0.5)
        out = Bbox.from_extents([x0, y0, x1, y1])
        if out.width == 0 or out.height == 0:
            return None, 0, 0, None
        if self.origin == "upper":
            t0 = Affine2D().translate(0, -A.shape[0]).scale(1, -1)
        else:
            t0 = IdentityTransform()
        t0 += (
            Affine2D().scale(in_bbox.width / A.shape[1], in_bbox.height / A.shape[0]).translate(in_bbox.x0, in_bbox.y0)
            + self.get_transform()
        )
        t = t0 + Affine2D().scale(magnification).translate(-out.x0, -out.y0)
        pixels = resample(self, A, (int(out.height), int(out.width)), t)
        return pixels, out.x0 / magnification, out.y0 / magnification, t


def imshow_rgba8(ax, rgba: np.ndarray, extent, zorder: float) -> RGBA8Image:
    """``ax.imshow(rgba, extent=extent, origin="upper", interpolation="nearest", zorder=zorder)`` as an
    :class:`RGBA8Image` (same aspect, clipping, data limits and drawing order)."""
    import matplotlib as mpl

    if rgba.dtype != np.uint8 or rgba.ndim != 3 or rgba.shape[2] != 4:
        raise ValueError(f"imshow_rgba8: got an array of {rgba.dtype} {rgba.shape}; expected (rows, columns, 4) uint8")
    im = RGBA8Image(ax, interpolation="nearest", origin="upper", extent=extent, zorder=zorder)
    ax.set_aspect(mpl.rcParams["image.aspect"])
    im.set_data(rgba)
    im.set_clip_path(ax.patch)
    im.set_extent(im.get_extent())
    ax.add_image(im)
    return im


_BYTE_PATH = _byte_path_checked()
