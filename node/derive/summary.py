"""The summary page: one RGB Secondary Capture per series (PS3.3 A.8.1), with highdicom.

What a physicist opens first: every method's map of one representative slice (the slice
with the most brain voxels) side by side, each colour-fused over M0 with its colour bar and
scale (drawn by :class:`node.derive.render.SliceRenderer`, the same ramp, fonts and
upscaling as the per-slice previews), patient left/right marked at the image edges, the
hemisphere means, SDs and asymmetry index under each map, then the quality figures, the
outcome of the QC gates ("UNRELIABLE: ..." with the reason of each failed gate) and the
research banner. No patient attribute is drawn.
"""

from __future__ import annotations

import math

import highdicom as hd
import numpy as np
from PIL import Image, ImageDraw
from pydicom import Dataset
from pydicom.sequence import Sequence as DicomSequence

from node.derive.render import (
    _BG,
    _FG,
    RESEARCH_BANNER,
    SliceRenderer,
    _draw_banner,
    _fit_font,
    _tick_format,
    font,
)
from node.derive.report import MethodSummary, ReportRequest, report_description
from node.derive.request import (
    MANUFACTURER,
    RESEARCH_STATEMENT,
    SERIES_KEYWORDS,
    SOFTWARE_VERSIONS,
    copy_keywords,
    output_uid,
    source_image_item,
)
from node.derive.sc import patient_orientation

KIND = "summary"
_BAD = (255, 112, 92)   # failed QC gate (ours)
_GOOD = (132, 214, 140)  # every gate passed (ours)
_DIM = (170, 170, 178)   # secondary text (ours)


def grid_shape(n: int) -> tuple[int, int]:
    """Panel grid ``(rows, cols)`` for ``n`` maps: one row up to three, else two rows."""
    if n <= 3:
        return 1, n
    return 2, math.ceil(n / 2)


def _fmt(x: float | None, spec: str = ".2f", unit: str = "") -> str:
    if x is None or not math.isfinite(x):
        return "not measured"
    return f"{x:{spec}}{(' ' + unit) if unit else ''}"


def qc_lines(req: ReportRequest) -> list[str]:
    """The quality figures as text lines (a figure not measured says so)."""
    f = req.qc
    if f.b0_low_ppm is not None and f.b0_high_ppm is not None:
        b0 = f"{f.b0_low_ppm:+.2f} to {f.b0_high_ppm:+.2f} ppm"
    else:
        b0 = "not measured"
    if f.sampled_low_ppm is not None and f.sampled_high_ppm is not None:
        b0 += f"  (sampled {f.sampled_low_ppm:+.2f} to {f.sampled_high_ppm:+.2f} ppm)"
    valid = "not measured" if f.valid_fraction is None else f"{100 * f.valid_fraction:.1f} %"
    return [
        f"B0 range in brain: {b0}",
        f"Valid brain voxels: {valid}",
        f"M0 SNR: {_fmt(f.snr, '.1f')}",
        f"Largest in-plane motion: {_fmt(f.max_motion_mm, '.2f', 'mm')}",
    ]


def _side_letters(req: ReportRequest) -> dict[str, str]:
    """Patient side shown at each image edge (``left``/``right``/``top``/``bottom``)."""
    toward_left_high = "L" if req.left_is_increasing else "R"
    toward_left_low = "R" if req.left_is_increasing else "L"
    if req.left_axis % 3 == 2:  # columns run left-right
        return {"left": toward_left_low, "right": toward_left_high}
    return {"top": toward_left_low, "bottom": toward_left_high}


class _Page:
    """Lays out the panels and the text blocks; all sizes scale with the panel size."""

    def __init__(self, req: ReportRequest, k: int):
        self.req, self.k = req, k
        rows, cols = req.mask.shape[1:]
        self.renderers = [
            SliceRenderer(rows, cols, title=ms.title, unit=ms.unit_ucum,
                          display_range=ms.display_range)
            for ms in req.methods.values()
        ]
        r0 = self.renderers[0]
        self.s = max(r0.img_w, r0.img_h) / 512.0
        self.pad = int(round(16 * self.s))
        self.panel_w = r0.width
        self.panel_h = r0.top + r0.img_h  # the per-panel research band is left off
        self.stats_h = int(round(84 * self.s))
        self.gr, self.gc = grid_shape(len(self.renderers))
        self.header_h = int(round(64 * self.s))
        self.line_h = int(round(24 * self.s))
        n_reasons = max(1, len(req.qc_reasons))
        self.qc_h = self.line_h * (len(qc_lines(req)) + n_reasons + 2) + self.pad
        self.banner_h = int(round(48 * self.s))
        self.width = self.gc * self.panel_w + (self.gc + 1) * self.pad
        self.height = (self.header_h + self.gr * (self.panel_h + self.stats_h + self.pad)
                       + self.qc_h + self.banner_h)

    def panel_origin(self, i: int) -> tuple[int, int]:
        r, c = divmod(i, self.gc)
        x = self.pad + c * (self.panel_w + self.pad)
        y = self.header_h + r * (self.panel_h + self.stats_h + self.pad)
        return x, y

    def render(self) -> np.ndarray:
        req, k = self.req, self.k
        assert req.m0 is not None
        canvas = np.empty((self.height, self.width, 3), dtype=np.uint8)
        canvas[...] = _BG
        assert req.m0_range is not None  # set with m0 (ReportRequest, DerivedRequest)
        m0_range = req.m0_range
        for i, (ms, rend) in enumerate(zip(req.methods.values(), self.renderers, strict=True)):
            x, y = self.panel_origin(i)
            tile = rend.render(ms.values[k], req.m0[k], m0_range=m0_range)
            canvas[y:y + self.panel_h, x:x + self.panel_w] = tile[:self.panel_h]
        im = Image.fromarray(canvas)
        draw = ImageDraw.Draw(im)
        self._header(draw)
        for i, (ms, rend) in enumerate(zip(req.methods.values(), self.renderers, strict=True)):
            x, y = self.panel_origin(i)
            self._sides(draw, x, y + rend.top, rend)
            self._stats(draw, ms, x, y + self.panel_h)
        self._qc(draw)
        f_ban = _fit_font(draw, RESEARCH_BANNER, int(round(26 * self.s)), self.width - 2 * self.pad)
        _draw_banner(draw, (self.width // 2, self.height - self.banner_h // 2), f_ban)
        return np.asarray(im)

    def _header(self, draw: ImageDraw.ImageDraw) -> None:
        req, k = self.req, self.k
        n = req.mask.shape[0]
        z = float(req.references[k].ImagePositionPatient[2])
        title = "CEST summary"
        if req.qc_reasons:
            title += "  -  UNRELIABLE (see quality gates)"
        f = _fit_font(draw, title, int(round(30 * self.s)), self.width - 2 * self.pad)
        draw.text((self.pad, self.header_h * 0.36), title, font=f, anchor="lm",
                  fill=_BAD if req.qc_reasons else _FG)
        sub = (f"slice {k + 1} of {n} (z {z:+.1f} mm, most brain voxels)   "
               f"{len(req.methods)} maps   series {req.series_number}")
        fs = _fit_font(draw, sub, int(round(17 * self.s)), self.width - 2 * self.pad)
        draw.text((self.pad, self.header_h * 0.78), sub, font=fs, anchor="lm", fill=_DIM)

    def _sides(self, draw: ImageDraw.ImageDraw, x: int, y: int, rend: SliceRenderer) -> None:
        f = font(max(10, int(round(20 * self.s))))
        m = int(round(6 * self.s))
        for edge, letter in _side_letters(self.req).items():
            if edge == "left":
                xy, anchor = (x + m, y + rend.img_h // 2), "lm"
            elif edge == "right":
                xy, anchor = (x + rend.img_w - m, y + rend.img_h // 2), "rm"
            elif edge == "top":
                xy, anchor = (x + rend.img_w // 2, y + m), "mt"
            else:
                xy, anchor = (x + rend.img_w // 2, y + rend.img_h - m), "mb"
            draw.text(xy, letter, font=f, anchor=anchor, fill=_FG, stroke_width=2,
                      stroke_fill=_BG)

    def _stats(self, draw: ImageDraw.ImageDraw, ms: MethodSummary, x: int, y: int) -> None:
        h = ms.hemispheres
        fmt = _tick_format(*ms.display_range)
        f = font(max(10, int(round(17 * self.s))))
        lines = []
        for name, st in (("Left ", h.left), ("Right", h.right)):
            mean = fmt.format(st.mean) if math.isfinite(st.mean) else "-"
            sd = fmt.format(st.sd) if math.isfinite(st.sd) else "-"
            lines.append(f"{name} hemisphere: {mean} \u00b1 {sd} {ms.unit_ucum}  (n {st.n})")
        ai = f"{h.asymmetry_index:+.3f}" if math.isfinite(h.asymmetry_index) else "-"
        lines.append(f"Asymmetry 2(L-R)/(L+R): {ai}   valid {100 * ms.valid_fraction:.0f} %")
        step = self.stats_h // 4
        for j, text in enumerate(lines):
            draw.text((x + int(4 * self.s), y + step * (j + 0.8)), text, font=f, anchor="lm",
                      fill=_FG if j < 2 else _DIM)

    def _qc(self, draw: ImageDraw.ImageDraw) -> None:
        req = self.req
        y = self.height - self.banner_h - self.qc_h
        draw.line((self.pad, y, self.width - self.pad, y), fill=_DIM, width=1)
        f_head = font(max(11, int(round(20 * self.s))))
        f = font(max(10, int(round(18 * self.s))))
        y += self.line_h
        draw.text((self.pad, y), "Quality figures", font=f_head, anchor="lm", fill=_FG)
        for text in qc_lines(req):
            y += self.line_h
            draw.text((self.pad + int(12 * self.s), y), text, font=f, anchor="lm", fill=_FG)
        y += self.line_h
        if not req.qc_reasons:
            draw.text((self.pad, y), "Quality gates: all passed", font=f_head, anchor="lm",
                      fill=_GOOD)
            return
        for r in req.qc_reasons:
            text = f"UNRELIABLE: {r.message}"
            ft = _fit_font(draw, text, int(round(20 * self.s)), self.width - 2 * self.pad)
            draw.text((self.pad, y), text, font=ft, anchor="lm", fill=_BAD)
            y += self.line_h


def render_page(req: ReportRequest, slice_index: int | None = None) -> np.ndarray:
    """The summary page of a request as ``(height, width, 3)`` uint8 (needs ``req.m0``)."""
    if req.m0 is None:
        raise ValueError("the summary page needs m0 images under the maps")
    k = req.representative_slice() if slice_index is None else int(slice_index)
    if not 0 <= k < req.mask.shape[0]:
        raise ValueError(f"slice_index {slice_index} is out of range for {req.mask.shape[0]} "
                         "slices")
    return _Page(req, k).render()


def build(req: ReportRequest) -> list[Dataset]:
    """Build the summary page of a request: one RGB Secondary Capture.

    Returns
    -------
    list of Dataset
        One Secondary Capture Image Storage dataset, of the representative slice.
    """
    k = req.representative_slice()
    rgb = render_page(req, k)
    ref = req.references[k]
    sc = hd.sc.SCImage.from_ref_dataset(
        ref_dataset=ref,
        pixel_array=rgb,
        photometric_interpretation=hd.PhotometricInterpretationValues.RGB,
        bits_allocated=8,
        coordinate_system=hd.CoordinateSystemNames.PATIENT,
        series_instance_uid=req.series_uid,
        series_number=req.series_number,
        sop_instance_uid=output_uid(req.series_uid, KIND, 0),
        instance_number=1,
        manufacturer=MANUFACTURER,
        patient_orientation=patient_orientation(ref),
        transfer_syntax_uid=hd.UID("1.2.840.10008.1.2.1"),
    )
    copy_keywords(sc, ref, SERIES_KEYWORDS)
    sc.SeriesDescription = report_description("CEST summary", "SC", req)
    sc.SoftwareVersions = SOFTWARE_VERSIONS
    sc.ContentQualification = "RESEARCH"
    sc.BurnedInAnnotation = "YES"
    sc.ImageType = ["DERIVED", "SECONDARY"]
    titles = ", ".join(f"{ms.title} [{ms.unit_ucum}]" for ms in req.methods.values())
    reasons = " ".join(f"UNRELIABLE: {r.message}." for r in req.qc_reasons)
    sc.ImageComments = (f"Summary of slice {k + 1}: {titles}. {reasons + ' ' if reasons else ''}"
                        f"{RESEARCH_STATEMENT}")[:10240]
    sc.DerivationDescription = (f"{SOFTWARE_VERSIONS}: maps colour-fused over M0, hemisphere "
                                f"statistics and quality figures. {RESEARCH_STATEMENT}")[:1024]
    sc.SourceImageSequence = DicomSequence([source_image_item(ref)])
    return [sc]
