"""calibration.png: data, fit, confidence and prediction bands, residuals, LOD/LOQ.

Drawn with matplotlib's object API on an Agg canvas (no pyplot state), so it is safe in
worker processes and returns the PNG as bytes for the HTML report.
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from ._io import atomic_write, figure_png

if TYPE_CHECKING:
    from .calibration import Calibration

__all__ = ["plot_calibration"]


def plot_calibration(cal: Calibration, path: str | Path | None = None, *,
                     level: float | None = None, dpi: int = 110) -> bytes:
    """Draw the calibration figure; write it to ``path`` (atomically) when given.

    Parameters
    ----------
    cal : Calibration
    path : str or Path, optional
        Where to write the PNG.
    level : float, optional
        Band confidence level (default: the calibration's).
    dpi : int

    Returns
    -------
    bytes
        The PNG file content.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    lvl = cal.level if level is None else level
    cu = cal.units or "concentration units"
    ru = cal.response_units or "response units"
    log = cal.model == "power"
    fig = Figure(figsize=(7.0, 6.6), layout="constrained")
    FigureCanvasAgg(fig)
    gs = fig.add_gridspec(2, 1, height_ratios=(3, 1.2))
    ax = fig.add_subplot(gs[0])
    axr = fig.add_subplot(gs[1], sharex=ax)

    x_lo, x_hi = cal.x_fit_range
    if log:
        grid = np.geomspace(x_lo, x_hi, 300)
    else:
        span = x_hi - x_lo
        grid = np.linspace(max(0.0, x_lo - 0.02 * span), x_hi + 0.02 * span, 300)
    b = cal.bands(grid, level=lvl)
    pct = f"{100 * lvl:g} %"
    ax.fill_between(grid, b["conf_low"], b["conf_high"], color="tab:blue", alpha=0.25, lw=0,
                    label=f"{pct} confidence band (mean)")
    ax.plot(grid, b["pred_low"], color="tab:blue", ls="--", lw=0.9,
            label=f"{pct} prediction band (one reading)")
    ax.plot(grid, b["pred_high"], color="tab:blue", ls="--", lw=0.9)
    ax.plot(grid, b["fit"], color="tab:blue", lw=1.6, label=f"{cal.model} fit")

    fitted = cal.in_fit
    blank = cal.role == "blank"
    std = fitted & ~cal.outlier & ~blank
    ax.plot(cal.x[std], cal.y[std], "o", color="black", ms=4, label="standards")
    fb = fitted & blank & ~cal.outlier
    if np.any(fb):
        ax.plot(cal.x[fb], cal.y[fb], "s", color="tab:gray", ms=4, label="blanks (fitted at 0)")
    if np.any(blank & ~fitted):
        ax.plot(np.zeros(int(np.sum(blank & ~fitted))), cal.y[blank & ~fitted], "s", mfc="none",
                color="tab:gray", ms=5, label="blanks (not fitted)")
    if np.any(cal.outlier):
        ax.plot(cal.x[cal.outlier], cal.y[cal.outlier], "o", mfc="none", mec="tab:red", ms=8,
                mew=1.5, label="Grubbs outlier (kept)")
    for key, style, colour in (("lod", ":", "tab:orange"), ("loq", "-.", "tab:green")):
        val = cal.limits.get(key)
        if val is not None and np.isfinite(val) and (not log or val > 0):
            ax.axvline(val, color=colour, ls=style, lw=1.1,
                       label=f"{key.upper()} = {val:.3g} {cu} ({cal.limits.get('method')})")
    if log:
        ax.set_xscale("log")
        ax.set_yscale("log")
    ax.set_ylabel(f"response ({ru})")
    r2 = f"R$^2$ = {cal.r2:.5f}"
    ax.set_title(f"Calibration: {cal.model}, n = {cal.n}, s$_{{y/x}}$ = {cal.s_yx:.3g}, {r2}",
                 fontsize=10)
    ax.legend(fontsize=7, loc="best")
    ax.grid(alpha=0.3)

    res = cal.residuals()
    rf = res[res["in_fit"]]
    axr.axhline(0.0, color="black", lw=0.8)
    for lim in (-2.0, 2.0):
        axr.axhline(lim, color="tab:gray", ls=":", lw=0.8)
    axr.plot(rf["concentration"], rf["standardized"], "o", color="black", ms=3.5)
    out = rf[rf["outlier"]]
    if len(out):
        axr.plot(out["concentration"], out["standardized"], "o", mfc="none", mec="tab:red", ms=7)
    axr.set_ylabel("standardized\nresidual")
    axr.set_xlabel(f"concentration ({cu})")
    axr.grid(alpha=0.3)

    data = figure_png(fig, dpi=dpi)
    if path is not None:
        with atomic_write(path, "wb", encoding=None) as fh:
            fh.write(data)
    return data
