"""The report's drawing primitives: palette, a rendered `Figure`, a new matplotlib figure,
rendering it once to PNG and SVG, and readable log-axis ticks.

Shared by every figure of the report (`benchharness.report.figures`) and the
trade-off figure of a choice (`benchharness.report.tradeoff`), so that neither
needs the other. No pyplot: figures are drawn on matplotlib's Agg and SVG
canvases, imported inside the functions.

The palette is our own choice of eight hues that stay apart under the common
forms of colour-vision deficiency (chosen along the lines of Okabe & Ito 2008:
vary lightness as well as hue, avoid pairing red with green).
"""

from __future__ import annotations

import io
from dataclasses import dataclass

# Our palette: deep blue, amber, teal, brick, sky, plum, olive-gold, slate.
PALETTE = ("#2b5c9e", "#e0a030", "#23917f", "#c2562b", "#6fb3de", "#a8578e",
           "#bfae3c", "#4d4d4d")
ACCENT = "#c2562b"        # significant things
MUTED = "#8a8a8a"         # not significant, reference lines
INK = "#222222"


@dataclass(frozen=True)
class Figure:
    """One rendered figure."""

    name: str          # file stem under figures/
    title: str
    caption: str
    png: bytes
    svg: str
    width_px: int
    height_px: int
    highlight: bool = False
    section: str = "effects"     # effects | diagnostics



def new_figure(width_in: float, height_in: float):
    from matplotlib.figure import Figure as MplFigure

    return MplFigure(figsize=(width_in, height_in), layout="constrained")


def render_figure(fig, name, title, caption, section="effects", highlight=False,
            dpi: int = 100) -> Figure:
    """Draw once with Agg for the PNG, then reuse that layout for the SVG."""
    import numpy as np
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.backends.backend_svg import FigureCanvasSVG

    canvas = FigureCanvasAgg(fig)
    fig.set_dpi(dpi)
    fig.set_facecolor("white")
    canvas.draw()
    width, height = canvas.get_width_height()
    png = encode_png(np.asarray(canvas.buffer_rgba()))
    fig.set_layout_engine("none")  # keep the layout just computed; the SVG reuses it
    FigureCanvasSVG(fig)
    sbuf = io.StringIO()
    fig.savefig(sbuf, format="svg", facecolor="white", metadata={"Date": None}, dpi=dpi)
    return Figure(name=name, title=title, caption=caption, png=png, svg=sbuf.getvalue(),
                  width_px=int(width), height_px=int(height), highlight=highlight,
                  section=section)


def encode_png(rgba) -> bytes:
    """PNG of an RGBA buffer, quantised to an adaptive 256-colour palette (plots have few
    colours, so the file shrinks several times at no visible cost; the octree method
    is several times faster than median cut, at the same size)."""
    from PIL import Image

    img = Image.fromarray(rgba[..., :3].copy())
    q = img.quantize(colors=256, method=Image.Quantize.FASTOCTREE, dither=Image.Dither.NONE)
    # the commonest colour is the background: keep it exactly white (the octree would
    # average it with the anti-aliased pixels next to it)
    counts = q.histogram()[:256]
    bg = max(range(len(counts)), key=counts.__getitem__)
    palette = q.getpalette()
    if all(v >= 248 for v in palette[3 * bg: 3 * bg + 3]):
        palette[3 * bg: 3 * bg + 3] = [255, 255, 255]
        q.putpalette(palette)
    out = io.BytesIO()
    q.save(out, format="PNG", optimize=False, compress_level=6)
    return out.getvalue()


def log_ticks(axis, lo: float, hi: float) -> None:
    """Readable ticks on a log axis: plain numbers, linear steps for a narrow range."""
    from matplotlib.ticker import FuncFormatter, LogLocator, MaxNLocator, NullLocator

    if lo > 0 and hi / lo < 4:
        axis.set_major_locator(MaxNLocator(nbins=6, steps=[1, 2, 2.5, 5, 10]))
    else:
        axis.set_major_locator(LogLocator(base=10, subs=(1.0, 2.0, 5.0)))
    axis.set_major_formatter(FuncFormatter(lambda v, _p: f"{v:g}"))
    axis.set_minor_locator(NullLocator())  # minor ticks cost draw time and add nothing here
