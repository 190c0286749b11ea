"""The colour-fused preview image of one slice: map over M0, colour bar, title, research mark.

Pillow draws only text, and the parts that are the same for every slice (title band, colour
bar with its scale, the research band) are drawn once per series by :class:`SliceRenderer`.
The pixels of a slice are fused and upscaled into the canvas in one compiled pass
(:func:`_fuse_upscale`, numba), with the values the numpy reference :func:`fuse` gives, to the
bit.

The colour ramp is our own: five anchors from deep ink blue through teal, moss green and
amber to a warm near-white, chosen so that luminance rises monotonically from low to high
values (ordered on a greyscale print too; monotonic luminance is common practice for
sequential maps).
"""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np
from numba import njit
from PIL import Image, ImageDraw, ImageFont

RESEARCH_BANNER = "RESEARCH USE ONLY \u2014 NOT FOR DIAGNOSIS"

# (position in [0, 1], R, G, B): our own anchors (Rec. 601 luma 33, 92, 140, 180, 239)
_ANCHORS = np.array(
    [
        [0.00, 28, 26, 92],
        [0.25, 22, 104, 132],
        [0.50, 96, 150, 82],
        [0.75, 214, 164, 52],
        [1.00, 252, 238, 214],
    ],
    dtype=np.float64,
)
MIN_IMAGE_PX = 512  # previews are upscaled to at least this size so the text is readable
OVERLAY_ALPHA = 0.7

_BG = (12, 12, 14)
_FG = (235, 235, 235)
_BANNER_FG = (255, 214, 64)


def colour_lut(n: int = 256) -> np.ndarray:
    """The colour ramp as an ``(n, 3)`` uint8 table (linear between our anchors)."""
    t = np.linspace(0.0, 1.0, n)
    rgb = np.stack([np.interp(t, _ANCHORS[:, 0], _ANCHORS[:, c]) for c in (1, 2, 3)], axis=1)
    return np.rint(rgb).astype(np.uint8)


_LUT = colour_lut()


def robust_range(m0: np.ndarray) -> tuple[float, float]:
    """Grey window of the M0 images: 0 to the 99.5th percentile of the finite voxels."""
    finite = m0[np.isfinite(m0)]
    hi = float(np.percentile(finite, 99.5)) if finite.size else 1.0
    return 0.0, hi if hi > 0.0 else 1.0


def fuse(values: np.ndarray, m0: np.ndarray, *, display_range: tuple[float, float],
         m0_range: tuple[float, float], alpha: float = OVERLAY_ALPHA) -> np.ndarray:
    """Colour the map over the grey M0 image: ``(rows, cols, 3)`` uint8.

    Valid voxels get ``(1 - alpha) * grey + alpha * ramp(value)``, the value clipped to the
    display range; NaN voxels show the grey M0 alone.
    """
    lo, hi = display_range
    g_lo, g_hi = m0_range
    grey = np.clip((np.nan_to_num(m0, nan=0.0) - g_lo) * (255.0 / (g_hi - g_lo)), 0.0, 255.0)
    valid = np.isfinite(values)
    idx = np.clip((np.where(valid, values, lo) - lo) * (255.0 / (hi - lo)), 0.0, 255.0)
    colour = _LUT[np.rint(idx).astype(np.intp)].astype(np.float32)
    g3 = grey.astype(np.float32)[..., None]
    out = np.where(valid[..., None], (1.0 - alpha) * g3 + alpha * colour, g3)
    return np.rint(out).astype(np.uint8)


@njit(cache=True)
def _fuse_upscale(values, m0, lo, s_val, g_lo, s_grey, keep, alpha, lut, k, out, top):  # pragma: no cover - compiled
    """:func:`fuse` of one slice written into rows ``top ..`` and columns ``0 .. cols k`` of
    ``out`` (the whole canvas, C-contiguous uint8 ``(height, width, 3)``), each voxel a
    ``k x k`` block: the first row of each block pixel by pixel, the others copied from it.

    The same operations in the same dtypes as the numpy expression (the constants come in the
    arrays' dtypes, float32 for the blend, no fastmath), so every pixel is the numpy one; in
    one call, holding the GIL: the numpy form was some fifteen array operations a slice, each
    of which let another thread take the interpreter."""
    rows, cols = values.shape
    fmax = np.finfo(m0.dtype).max
    flat = out.reshape(out.shape[0], out.shape[1] * 3)
    n = cols * k * 3
    for r in range(rows):
        y = top + r * k
        for c in range(cols):
            g = m0[r, c]
            if np.isnan(g):
                g = 0.0
            elif g > fmax:
                g = fmax
            elif g < -fmax:
                g = -fmax
            g = (g - g_lo) * s_grey
            g = min(max(g, 0.0), 255.0)
            g3 = np.float32(g)
            v = values[r, c]
            if np.isfinite(v):
                x = min(max((v - lo) * s_val, 0.0), 255.0)
                i = int(np.rint(x))
                red = np.rint(keep * g3 + alpha * np.float32(lut[i, 0]))
                grn = np.rint(keep * g3 + alpha * np.float32(lut[i, 1]))
                blu = np.rint(keep * g3 + alpha * np.float32(lut[i, 2]))
            else:
                red = grn = blu = np.rint(g3)
            rr, gg, bb = np.uint8(red), np.uint8(grn), np.uint8(blu)
            for b in range(k):
                xo = c * k + b
                out[y, xo, 0] = rr
                out[y, xo, 1] = gg
                out[y, xo, 2] = bb
        for a in range(1, k):
            for j in range(n):
                flat[y + a, j] = flat[y, j]


def fuse_upscale(values: np.ndarray, m0: np.ndarray, out: np.ndarray, *,
                 display_range: tuple[float, float], m0_range: tuple[float, float], k: int,
                 top: int = 0, alpha: float = OVERLAY_ALPHA) -> None:
    """``out[top:top + rows k, :cols k] = np.repeat(np.repeat(fuse(values, m0, ...), k, 0),
    k, 1)`` in one compiled pass; ``out`` is a C-contiguous ``(height, width, 3)`` uint8
    canvas that holds that block."""
    values = np.asarray(values)
    m0 = np.asarray(m0)
    if values.dtype.kind != "f":
        values = values.astype(np.float64)
    if m0.dtype.kind != "f":
        m0 = m0.astype(np.float64)
    rows, cols = values.shape
    if (m0.shape != values.shape or out.ndim != 3 or out.shape[2] != 3 or out.dtype != np.uint8
            or not out.flags.c_contiguous or k < 1 or top < 0
            or out.shape[0] < top + rows * k or out.shape[1] < cols * k):
        raise ValueError(f"fuse_upscale: values {values.shape}, m0 {m0.shape}, out "
                         f"{out.shape} {out.dtype} for k = {k}, top = {top}")
    lo, hi = display_range
    g_lo, g_hi = m0_range
    vt, mt = values.dtype.type, m0.dtype.type
    # the constants as numpy takes them next to arrays of these dtypes (NEP 50 weak scalars)
    _fuse_upscale(values, m0, vt(lo), vt(255.0 / (hi - lo)), mt(g_lo), mt(255.0 / (g_hi - g_lo)),
                  np.float32(1.0 - alpha), np.float32(alpha), _LUT, k, out, top)


def warm_render() -> None:
    """Compile (or load from the on-disk cache) the render loop for float32 and float64."""
    out = np.empty((2, 2, 3), np.uint8)
    for dt in (np.float32, np.float64):
        a = np.ones((1, 1), dt)
        fuse_upscale(a, a, out, display_range=(0.0, 2.0), m0_range=(0.0, 2.0), k=2)


@lru_cache(maxsize=32)
def font(size: int) -> ImageFont.FreeTypeFont | ImageFont.ImageFont:
    """Pillow's bundled font at ``size`` pixels (the bitmap default where FreeType lacks)."""
    try:
        return ImageFont.load_default(size=size)
    except (TypeError, ImportError, OSError):
        return ImageFont.load_default()


def _fit_font(draw: ImageDraw.ImageDraw, text: str, size: int, max_width: int):
    while size > 8:
        f = font(size)
        if draw.textlength(text, font=f) <= max_width:
            return f
        size -= 1
    return font(8)


def _has_glyph(f, ch: str) -> bool:
    """False when the font draws ``ch`` as its missing-glyph box (measured: Pillow's bundled
    font has no em dash)."""
    missing = "\ue000"  # a private-use code point no bundled font draws
    a, b = f.getmask(ch), f.getmask(missing)
    return a.size != b.size or bytes(a) != bytes(b)


def _draw_banner(draw: ImageDraw.ImageDraw, centre: tuple[int, int], f) -> None:
    """Draw :data:`RESEARCH_BANNER` centred; the em dash is drawn as a line if the font
    has no glyph for it."""
    if _has_glyph(f, "\u2014"):
        draw.text(centre, RESEARCH_BANNER, fill=_BANNER_FG, font=f, anchor="mm")
        return
    left, right = (part.strip() for part in RESEARCH_BANNER.split("\u2014"))
    gap = draw.textlength("M", font=f) * 1.6
    wl, wr = draw.textlength(left, font=f), draw.textlength(right, font=f)
    x = centre[0] - (wl + gap + wr) / 2
    cy = centre[1]
    draw.text((x, cy), left, fill=_BANNER_FG, font=f, anchor="lm")
    thick = max(1, round(gap / 12))
    draw.line((x + wl + gap * 0.2, cy, x + wl + gap * 0.8, cy), fill=_BANNER_FG, width=thick)
    draw.text((x + wl + gap, cy), right, fill=_BANNER_FG, font=f, anchor="lm")


def _tick_format(lo: float, hi: float) -> str:
    span = hi - lo
    decimals = max(0, min(4, 2 - math.floor(math.log10(span)))) if span > 0 else 2
    return f"{{:.{decimals}f}}"


class SliceRenderer:
    """Draws the preview of every slice of one series at the same layout.

    Parameters
    ----------
    rows, cols
        Size of the map's slices.
    title
        Method title, drawn at the top.
    unit
        Unit label of the colour bar (the UCUM code).
    display_range
        Low and high end of the colour scale.
    """

    def __init__(self, rows: int, cols: int, *, title: str, unit: str,
                 display_range: tuple[float, float]):
        self.rows, self.cols = rows, cols
        self.scale = max(1, math.ceil(MIN_IMAGE_PX / max(rows, cols)))
        self.img_h, self.img_w = rows * self.scale, cols * self.scale
        s = max(self.img_w, self.img_h) / 512.0
        self.top = int(round(46 * s))
        self.bottom = int(round(38 * s))
        self.panel = int(round(150 * s))
        self.width = self.img_w + self.panel
        self.height = self.top + self.img_h + self.bottom
        self.display_range = display_range
        self._label_size = max(10, int(round(16 * s)))
        self._canvas = self._static(title, unit, s)

    def _static(self, title: str, unit: str, s: float) -> np.ndarray:
        im = Image.new("RGB", (self.width, self.height), _BG)
        draw = ImageDraw.Draw(im)
        pad = int(round(10 * s))
        # title band
        f_title = _fit_font(draw, title, int(round(24 * s)), self.width - 2 * pad - int(140 * s))
        draw.text((pad, self.top // 2), title, fill=_FG, font=f_title, anchor="lm")
        # research band
        f_ban = _fit_font(draw, RESEARCH_BANNER, int(round(20 * s)), self.width - 2 * pad)
        y_ban = self.top + self.img_h + self.bottom // 2
        _draw_banner(draw, (self.width // 2, y_ban), f_ban)
        # colour bar with its numeric scale
        f_lab = font(self._label_size)
        x0 = self.img_w + int(round(18 * s))
        bar_w = int(round(26 * s))
        y0 = self.top + int(round(40 * s))
        y1 = self.top + self.img_h - int(round(70 * s))
        draw.text((x0, self.top + int(round(16 * s))), f"[{unit}]", fill=_FG, font=f_lab,
                  anchor="lm")
        canvas = np.asarray(im).copy()
        ramp = _LUT[np.rint(np.linspace(255, 0, y1 - y0)).astype(np.intp)]
        canvas[y0:y1, x0:x0 + bar_w] = ramp[:, None, :]
        im = Image.fromarray(canvas)
        draw = ImageDraw.Draw(im)
        draw.rectangle((x0 - 1, y0 - 1, x0 + bar_w, y1), outline=_FG)
        lo, hi = self.display_range
        fmt = _tick_format(lo, hi)
        for k in range(5):
            v = lo + (hi - lo) * k / 4
            y = y1 - 1 - round((y1 - 1 - y0) * k / 4)
            draw.line((x0 + bar_w, y, x0 + bar_w + int(6 * s), y), fill=_FG)
            draw.text((x0 + bar_w + int(9 * s), y), fmt.format(v), fill=_FG, font=f_lab,
                      anchor="lm")
        f_small = font(max(9, int(round(13 * s))))
        draw.text((x0, y1 + int(round(14 * s))), "grey only:", fill=_FG, font=f_small)
        draw.text((x0, y1 + int(round(30 * s))), "no valid value", fill=_FG, font=f_small)
        return np.asarray(im).copy()

    def render(self, values: np.ndarray, m0: np.ndarray, *, m0_range: tuple[float, float],
               label: str = "") -> np.ndarray:
        """The preview of one slice, ``(height, width, 3)`` uint8."""
        canvas = self._canvas.copy()
        # fused and upscaled (nearest neighbour) straight into the canvas, one compiled pass
        fuse_upscale(values, m0, canvas, display_range=self.display_range, m0_range=m0_range,
                     k=self.scale, top=self.top)
        if label:
            w = self.panel + int(self.img_w * 0.25)
            band = Image.fromarray(canvas[:self.top, self.width - w:])
            ImageDraw.Draw(band).text((w - 8, self.top // 2), label, fill=_FG,
                                      font=font(self._label_size), anchor="rm")
            canvas[:self.top, self.width - w:] = np.asarray(band)
        return canvas
