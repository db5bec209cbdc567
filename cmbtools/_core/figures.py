"""The house style of cmbtools figures, and the helpers every figure shares.

A figure is drawn on a :class:`matplotlib.figure.Figure` with the Agg canvas
(no global pyplot state, no display needed) and written atomically; the file
format comes from the suffix (``.png`` or ``.pdf``).
"""

from __future__ import annotations

from pathlib import Path

from cmbtools._core.files import atomic_output, check_output_path
from cmbtools._version import __version__
from cmbtools.exceptions import InvalidInputError

#: Colours: text and data, highlighted data, reference lines, scatter bands.
INK, ACCENT, SOFT, BAND = "#1b2a41", "#c8553d", "#8d99ae", "#9fb4c7"
#: Factor from K^2 to uK^2 (figures show D_l in uK^2).
UK2 = 1.0e12
#: Axis label of D_l.
DL_LABEL = r"$D_\ell = \ell(\ell+1)C_\ell/2\pi$  [$\mu$K$^2$]"
#: Axis label of the multipole.
ELL_LABEL = r"multipole $\ell$"


def check_figure_path(path, overwrite):
    """The output path of a figure, checked before drawing: ``(path, format)``; the suffix must be .png or .pdf."""
    suffix = Path(path).suffix.lower()
    if suffix not in (".png", ".pdf"):
        raise InvalidInputError(f"The figure file must end in .png or .pdf. Got {str(path)!r} instead.")
    return check_output_path(path, overwrite=overwrite), suffix[1:]


def new_figure(height, *, height_ratios=None, hspace=0.07):
    """A figure 7.5 inches wide with one panel, or two stacked panels sharing x (``height_ratios``).

    Returns ``(fig, top, bottom)``; ``bottom`` is None with one panel.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(7.5, height), dpi=130)
    FigureCanvasAgg(fig)
    if height_ratios is None:
        return fig, fig.add_subplot(1, 1, 1), None
    gs = fig.add_gridspec(2, 1, height_ratios=height_ratios, hspace=hspace)
    top = fig.add_subplot(gs[0])
    bottom = fig.add_subplot(gs[1], sharex=top)
    return fig, top, bottom


def style_axes(*axes):
    """Light grid below the data, no top or right spines."""
    for a in axes:
        if a is None:
            continue
        a.grid(True, color="#e5e8ec", lw=0.6)
        a.set_axisbelow(True)
        for side in ("top", "right"):
            a.spines[side].set_visible(False)


def save_figure(fig, top, bottom, title, out, fmt, *, overwrite):
    """Title the top panel, sign the figure with the cmbtools version, write it atomically; return ``out``.

    With a ``bottom`` panel, the top panel's x labels are hidden (the panels share x).
    """
    if bottom is not None:
        for lab in top.get_xticklabels():
            lab.set_visible(False)
    top.set_title(title, fontsize=10, loc="left", color=INK)
    fig.text(0.99, 0.005, f"cmbtools {__version__}", ha="right", va="bottom", fontsize=6, color=SOFT)
    with atomic_output(out, overwrite=overwrite) as tmp:
        fig.savefig(tmp, format=fmt, bbox_inches="tight")
    return out
