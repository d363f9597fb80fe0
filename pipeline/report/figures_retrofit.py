"""The what-if's figure: a retrofit class's fragility curves beside those of the class(es) it replaces."""
from __future__ import annotations

import numpy as np

from quakefolio.pipeline.report.figures import _STATES, _new_figure

__all__ = ["retrofit_fragility_figure"]


def retrofit_fragility_figure(originals, new):
    """Lognormal fragility curves of the retrofit class (solid) over those of the original classes (dashed).

    Parameters
    ----------
    originals : list of DamageStateSet
        The classes the alternative replaces (one panel each; the new class drawn in every panel).
    new : DamageStateSet
        The retrofit class.

    Returns
    -------
    matplotlib.figure.Figure
        One panel per original class, P(DS >= ds | IM) [-] against the IM [g] on a log axis; a
        panel whose class uses another IM than the new class says so in its title (the
        curves are then on different axes in truth and only the shapes compare).
    """
    from matplotlib.lines import Line2D
    from matplotlib.ticker import FuncFormatter

    n = max(len(originals), 1)
    fig = _new_figure(min(4.6 * n + 0.4, 9.6), 3.3)
    axes = fig.subplots(1, n, squeeze=False).ravel()
    for ax, old in zip(axes, originals or [new]):
        lo = min(old.medians[0] * np.exp(-2.5 * old.betas[0]), new.medians[0] * np.exp(-2.5 * new.betas[0]))
        hi = max(old.medians[-1] * np.exp(2.5 * old.betas[-1]), new.medians[-1] * np.exp(2.5 * new.betas[-1]))
        x = np.geomspace(float(lo), float(hi), 300)
        for dss, style in ((old, (0, (4, 2))), (new, "-")):
            p = dss.probabilities(x)
            for j in range(dss.n_states):
                colour = _STATES[j] if dss.n_states <= len(_STATES) else None
                ax.plot(x, p[:, j], color=colour, linestyle=style, linewidth=1.6 if style == "-" else 1.2)
        ax.set_xscale("log")
        ax.set_xlim(float(lo), float(hi))
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:g}"))
        ax.set_ylim(0, 1.0)
        same = old.im == new.im
        ax.set_title(f"{old.class_code} (dashed) → {new.class_code} (solid)" + ("" if same else
                                                                              f"; IMs differ: {old.im}, {new.im}"))
        ax.set_xlabel(f"{new.im} [g]")
    axes[0].set_ylabel("P(DS ≥ ds | IM) [-]")
    names = new.names
    handles = [Line2D([], [], color=_STATES[j] if len(names) <= len(_STATES) else None, label=name)
               for j, name in enumerate(names)]
    fig.legend(handles=handles, loc="outside upper center", ncol=len(handles),
               title="damage state of the retrofit class (reached or exceeded)", title_fontsize=7.5)
    return fig
