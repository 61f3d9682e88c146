"""Light and dark themes, and matplotlib colours that follow the Qt palette.

The canvas never hard-codes a white background: :func:`figure_colors` reads
the window, base and text colours of the application palette, so plots stay
readable in both themes. Curve colours are our own pair per theme, chosen for
contrast on the matching background (and to stay distinct for the common
red-green colour-vision deficiencies: blue, orange and grey).
"""

from __future__ import annotations

from PySide6.QtGui import QColor, QPalette
from PySide6.QtWidgets import QApplication

__all__ = ["apply_theme", "figure_colors", "style_figure", "apply_colors", "THEMES"]

THEMES = ("system", "light", "dark")


def _dark_palette() -> QPalette:
    p = QPalette()
    c = {
        QPalette.Window: "#23262b", QPalette.WindowText: "#e6e6e6",
        QPalette.Base: "#1b1d21", QPalette.AlternateBase: "#2a2d33",
        QPalette.ToolTipBase: "#2f333a", QPalette.ToolTipText: "#f0f0f0",
        QPalette.Text: "#e6e6e6", QPalette.Button: "#2d3036",
        QPalette.ButtonText: "#e6e6e6", QPalette.BrightText: "#ff6b6b",
        QPalette.Highlight: "#3d7ab8", QPalette.HighlightedText: "#ffffff",
        QPalette.Link: "#7fb6ff", QPalette.PlaceholderText: "#8a8f98",
        QPalette.Mid: "#4a4e56", QPalette.Dark: "#15171a", QPalette.Light: "#3a3e45",
    }
    for role, col in c.items():
        p.setColor(role, QColor(col))
    for role in (QPalette.WindowText, QPalette.Text, QPalette.ButtonText):
        p.setColor(QPalette.Disabled, role, QColor("#7a7f87"))
    return p


def apply_theme(app: QApplication, name: str) -> None:
    """Switch the whole application to ``"light"``, ``"dark"`` or the ``"system"`` palette."""
    app.setStyle("Fusion")
    if name == "dark":
        app.setPalette(_dark_palette())
    elif name == "light":
        app.setPalette(app.style().standardPalette())
    else:
        app.setPalette(QPalette())


def is_dark(palette: QPalette | None = None) -> bool:
    pal = palette or QApplication.palette()
    return pal.color(QPalette.Window).lightness() < 128


def figure_colors(palette: QPalette | None = None) -> dict:
    """Colours for figures from the palette: background, axes, text, grid and curves."""
    pal = palette or QApplication.palette()
    dark = is_dark(pal)
    return {
        "figure": pal.color(QPalette.Window).name(),
        "axes": pal.color(QPalette.Base).name(),
        "text": pal.color(QPalette.WindowText).name(),
        "grid": pal.color(QPalette.Mid).name(),
        "measured": "#d8d8d8" if dark else "#3a3a3a",
        "model": "#6cb4ff" if dark else "#1565c0",
        "fitted": "#ffa94d" if dark else "#d9480f",
        "residual": "#ffa94d" if dark else "#d9480f",
        "unused": "#7a7f87",
        "mask": "#8a8f98",
        "band": "#6cb4ff" if dark else "#1565c0",
        "second": "#ffa94d" if dark else "#d9480f",
    }


def style_figure(fig, palette: QPalette | None = None) -> dict:
    """Apply the palette colours to an existing figure and all its axes."""
    return apply_colors(fig, figure_colors(palette))


def apply_colors(fig, col: dict) -> dict:
    """Apply a :func:`figure_colors` dict to a figure (no Qt: safe in a worker thread)."""
    fig.set_facecolor(col["figure"])
    for ax in fig.axes:
        ax.set_facecolor(col["axes"])
        for spine in ax.spines.values():
            spine.set_color(col["text"])
        ax.tick_params(colors=col["text"], which="both")
        ax.xaxis.label.set_color(col["text"])
        ax.yaxis.label.set_color(col["text"])
        ax.title.set_color(col["text"])
        leg = ax.get_legend()
        if leg is not None:
            leg.get_frame().set_facecolor(col["axes"])
            leg.get_frame().set_edgecolor(col["grid"])
            for t in leg.get_texts():
                t.set_color(col["text"])
    return col
