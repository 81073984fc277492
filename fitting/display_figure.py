"""Figure of photometer readings against the fitted gain–offset–gamma curves."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from fitting.display_model import ChannelFit
from fitting.figures import pyplot, save

#: Line colours per channel (grey drawn in near-black).
CHANNEL_COLOURS = {"grey": "#333333", "red": "#b8322a", "green": "#3f8f3a", "blue": "#2f5fa8"}


def light_figure(fits: dict[str, ChannelFit], base: str | Path, title: str = "") -> list[str]:
    """Readings and fitted curves (top), residuals in % of each maximum (bottom).

    Parameters
    ----------
    fits : dict of str to ChannelFit
    base : str or Path
        Path without suffix; ``.png`` and ``.pdf`` are written.
    title : str

    Returns
    -------
    list of str
        The files written.
    """
    plt = pyplot()
    fig, (top, bottom) = plt.subplots(2, 1, figsize=(5.0, 5.2), sharex=True,
                                      gridspec_kw={"height_ratios": [3, 1.3]})
    grid = np.linspace(0.0, 1.0, 401)
    for channel, fit in fits.items():
        colour = CHANNEL_COLOURS.get(channel, "#333333")
        r = fit.readings
        top.plot(grid, fit.model.luminance(grid), color=colour, lw=1.2,
                 label=f"{channel}: gamma {fit.model.gamma:.3g}, gain {fit.model.gain:.3g}")
        top.plot(r.level, r.cd_m2, "o", ms=3.2, mfc="none", mec=colour, mew=0.8)
        bottom.plot(r.level, 100.0 * fit.residuals_cd_m2 / fit.model.max_cd_m2, "o", ms=3, color=colour)
    bottom.axhline(0.0, color="#9a9a9a", lw=0.7)
    top.set_ylabel("luminance (cd/m²)")
    top.legend(loc="upper left")
    bottom.set_xlabel("grey level (0..1 of the display's range)")
    bottom.set_ylabel("reading − fit\n(% of max)")
    top.set_title(title or "photometer readings (circles) and gain–offset–gamma fit (lines)")
    fig.tight_layout()
    return save(fig, Path(base))
