"""Figure construction without pyplot's global state (safe in long runs and servers)."""

from __future__ import annotations

__all__ = ["subplots", "get_cmap", "literal_text", "png_data_uri"]

_FIGURE_KW = ("figsize", "dpi", "layout", "constrained_layout")


def subplots(*args, **kwargs):
    """Like ``matplotlib.pyplot.subplots`` but the figure is not registered anywhere."""
    from matplotlib.figure import Figure

    fig = Figure(**{k: kwargs.pop(k) for k in _FIGURE_KW if k in kwargs})
    return fig, fig.subplots(*args, **kwargs)


def get_cmap(name: str):
    """A registered colour map by name."""
    import matplotlib

    return matplotlib.colormaps[name]


def literal_text(fig):
    """Show every text of ``fig`` as written: no ``$...$`` maths, so a taxon name such
    as ``$\\x$`` is printed, not parsed (and cannot stop the writer)."""
    from matplotlib.text import Text

    for t in fig.findobj(Text):
        t.set_parse_math(False)
    return fig


def png_data_uri(png: bytes) -> str:
    """A PNG image as a ``data:`` URI, to inline it in an HTML page (no external file).

    Examples
    --------
    >>> png_data_uri(b"\\x89PNG")
    'data:image/png;base64,iVBORw=='
    """
    import base64

    return "data:image/png;base64," + base64.b64encode(png).decode("ascii")
