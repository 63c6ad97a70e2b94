"""What every figure shares: an Agg canvas (never pyplot), PNG bytes, colour-blind safe palettes, log axes."""

from __future__ import annotations

from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

OKABE_ITO = ("#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2", "#D55E00", "#CC79A7", "#000000")
"""The Okabe-Ito palette, safe for the common colour-vision deficiencies (Okabe & Ito, 2008): orange,
sky blue, bluish green, yellow, blue, vermillion, reddish purple, black."""
SMALLEST_FONT = "Smallest font (pt)"
"""The PNG text key under which :func:`figure_png` records the figure's smallest font size."""
HEATMAP = "cividis"
"""The heatmap colour map: perceptually uniform and colour-blind safe (Nunez, Anderton & Renslow, 2018)."""


def figure_png(fig: Figure, dpi: int = 150) -> bytes:
    """Return the figure as PNG bytes (for result folders and the report).

    Parameters
    ----------
    fig : matplotlib.figure.Figure
    dpi : int, default 150

    Returns
    -------
    bytes

    Notes
    -----
    A label with characters the plotting font lacks (an id in a non-Latin
    script) is drawn with empty boxes for them; matplotlib's warning about the
    missing glyphs is not passed on, since the tables beside every figure hold
    the labels in full.
    """
    import io
    import warnings

    buffer = io.BytesIO()
    metadata = {SMALLEST_FONT: f"{smallest_font(fig):g}"}
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=r"Glyph \d+ .*missing from (current )?font", category=UserWarning)
        fig.savefig(buffer, format="png", dpi=dpi, metadata=metadata)
    return buffer.getvalue()


def smallest_font(fig: Figure) -> float:
    """Return the size in points of the smallest visible, non-empty text of ``fig`` (0 when it has none).

    Parameters
    ----------
    fig : matplotlib.figure.Figure

    Returns
    -------
    float
        Written into every PNG (:data:`SMALLEST_FONT`), so that a reader of
        the image can tell how large its text is once displayed: pt x dpi / 72
        pixels at natural size.
    """
    from matplotlib.text import Text

    sizes = [t.get_fontsize() for t in fig.findobj(Text) if t.get_visible() and t.get_text().strip()]
    return float(min(sizes)) if sizes else 0.0


def new_figure(n_panels: int = 1, *, width: float = 4.2, height: float = 3.6) -> tuple[Figure, list]:
    """Return a Figure on an Agg canvas and its ``n_panels`` axes side by side.

    Never through pyplot: nothing opens a window or touches global state.

    Parameters
    ----------
    n_panels : int, default 1
    width, height : float
        Inches per panel, and the figure's height.

    Returns
    -------
    (matplotlib.figure.Figure, list of Axes)
    """
    fig = Figure(figsize=(width * n_panels, height), layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(1, n_panels, squeeze=False)[0]
    return fig, list(axes)


def colour(i: int) -> str:
    """Return the i-th categorical colour.

    Parameters
    ----------
    i : int

    Returns
    -------
    str
        The Okabe-Ito palette, then its tints (halfway to white), then
        cycling: sixteen colours that stay apart; beyond them colours repeat,
        so a figure with more categories should also label them in place.
    """
    base = OKABE_ITO[i % len(OKABE_ITO)]
    if (i // len(OKABE_ITO)) % 2 == 0:
        return base
    rgb = [int(base[k:k + 2], 16) for k in (1, 3, 5)]
    return "#" + "".join(f"{(c + 255) // 2:02X}" for c in rgb)


def text_colour(background: str) -> str:
    """Return black or white, whichever reads better on ``background``.

    Parameters
    ----------
    background : str
        A colour as "#RRGGBB".

    Returns
    -------
    str
        The one of higher contrast ratio by relative luminance (W3C, 2008, WCAG 2.0).
    """
    def linear(c: float) -> float:
        return c / 12.92 if c <= 0.03928 else ((c + 0.055) / 1.055) ** 2.4

    r, g, b = (linear(int(background[k:k + 2], 16) / 255) for k in (1, 3, 5))
    luminance = 0.2126 * r + 0.7152 * g + 0.0722 * b
    return "black" if (luminance + 0.05) / 0.05 >= 1.05 / (luminance + 0.05) else "white"


def log_axes(ax) -> None:
    """Put both axes of ``ax`` on a log scale with plain-number ticks (1, 2, 5 per decade over short spans).

    Parameters
    ----------
    ax : matplotlib.axes.Axes
    """
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.autoscale_view()
    plain_log_ticks(ax.xaxis, *ax.get_xlim())
    plain_log_ticks(ax.yaxis, *ax.get_ylim())


def plain_log_ticks(axis, low: float, high: float) -> None:
    """Give a log ``axis`` plain-number ticks ("0.6", "2", never "6 × 10⁻¹"): 1, 2, 5 per decade over short spans.

    Parameters
    ----------
    axis : matplotlib.axis.Axis
    low, high : float
        The axis's limits.
    """
    subs = (1.0, 2.0, 5.0) if high < 100 * low else (1.0,)
    if high < 3 * low:
        subs = tuple(float(k) for k in range(1, 10))
    axis.set_major_locator(LogLocator(base=10, subs=subs))
    axis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
    axis.set_minor_formatter(NullFormatter())
