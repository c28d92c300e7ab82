"""Figures of a loaded OTOC ensemble (matplotlib, one function per figure).

Each ``plot_*`` function takes a loaded ensemble (see :func:`mpo_fronts.load`) and returns a
:class:`matplotlib.figure.Figure` built without pyplot, so nothing touches the user's interactive backend;
:func:`write_figures` saves them as PNG and PDF through the Agg renderer.

Every ``plot_*`` function also draws into Axes the caller made (``ax=``): one Axes for the one-panel figures
(``heatmap``, ``convergence``, ``discarded``), a sequence of two for the two-panel ones (``light_cone``,
``front``, ``growth``, ``entropy``: in the order of the panels, left to right), and a (2, n) array (or a flat
sequence of 2 n, density panels first) for ``distribution`` with n sites. It then returns the figure those Axes
belong to (``ax.figure``), so the return value is always the Figure drawn into, and it leaves that figure's
suptitle and legends alone: what the own figure says in its suptitle goes into the title of the first Axes, and
a figure legend becomes a legend below the first Axes. With ``ax=None`` each function makes its own figure.

Colour maps are perceptually uniform and stay ordered in greyscale (cividis for C, viridis for densities and
entropies, reversed magma for discarded weights); lines also differ by style and marker, so every figure reads
in black and white.

Figures (names for ``only``):

* ``heatmap``: ensemble-mean C(r, t) on a log-time axis, threshold contours of the mean and median curves,
  untrusted points hatched;
* ``distribution``: per-realization C at one site (by default one the front reaches) as a density over time,
  with mean, median and Sarle's bimodality coefficient;
* ``light_cone``: t*(d) of the ensemble curve and of every realization, with the ballistic and logarithmic
  fits and their bands, on linear and logarithmic time axes;
* ``convergence``: the largest |dC| between successive bond dimensions, at, ahead of and behind the front
  (needs convergence data, see ``fronts converge``);
* ``front``: right-weight profiles at several times and the front width against time on log axes;
* ``growth``: the local growth exponent alpha = d ln C / d ln t per distance (median and interquartile band) and
  the histogram of the exponents of the growth stages (see :mod:`mpo_fronts.growth`);
* ``entropy``: the heat map of C beside the operator entanglement entropy of W(t) at every bond (mean over
  realizations, bond index vs log time, W's site marked), with the bond-saturation contour of the trust mask;
* ``discarded``: the cumulative discarded weight at every bond (mean over realizations, log colour), i.e. where
  along the chain the truncation lost weight and when.

``entropy`` and ``discarded`` need the per-bond datasets ``bond_entropy`` and ``bond_discarded`` (result files
from version 0.2 on); :func:`write_figures` skips them for older files and says why.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Callable, Iterable, Sequence

import numpy as np

from . import analysis as an
from . import trust
from .errors import InputError, require

__all__ = ["FIGURES", "plot_heatmap", "plot_distribution", "plot_light_cone", "plot_convergence", "plot_front",
           "plot_growth", "plot_entropy", "plot_discarded", "write_figures", "FigureSkipped"]

_FORMATS = ("png", "pdf", "svg")
_C_LABEL = "C(r, t) = 1 - Re Tr[W(t) V_r W(t) V_r] / 2^L"
_T_LABEL = "time t (1/J)"
_D_LABEL = "distance d = |r - i| (sites)"
_B_LABEL = "bond b (between sites b and b + 1)"


def _mpl():
    require("matplotlib", "plot")
    from matplotlib.figure import Figure

    return Figure


def _figure(width: float, height: float, ncols: int = 1, nrows: int = 1, **kw):
    Figure = _mpl()
    fig = Figure(figsize=(width, height), layout="constrained")
    axes = fig.subplots(nrows, ncols, squeeze=False, **kw)
    return fig, axes


def _axes(ax, width: float, height: float, ncols: int = 1, nrows: int = 1, *, what: str, **kw):
    """The figure and the (nrows, ncols) array of Axes to draw into, and whether the figure is our own.

    ``ax=None``: a new figure (:func:`_figure`). Otherwise ``ax`` must hold exactly nrows * ncols Axes of one
    figure (a single Axes, a sequence, or an array such as ``fig.subplots(...)`` returns; flattened in C order);
    ``what`` says in words what is expected, for the error.
    """
    if ax is None:
        fig, axes = _figure(width, height, ncols, nrows, **kw)
        return fig, axes, True
    _mpl()
    from matplotlib.axes import Axes

    try:
        flat = np.asarray(ax, dtype=object).ravel()
    except ValueError:  # ragged nesting
        flat = np.asarray([ax], dtype=object)
    n = nrows * ncols
    kinds = sorted({type(a).__name__ for a in flat if not isinstance(a, Axes)})
    if flat.size != n or kinds:
        got = (f"{flat.size} Axes" if not kinds else f"{flat.size} object(s) of type {', '.join(kinds)}")
        raise InputError(f"ax must be {what} (or None for a new figure), got {got}", arg="ax")
    if len({id(a.figure) for a in flat}) > 1:
        raise InputError("ax: the Axes must all belong to one figure", arg="ax")
    return flat[0].figure, flat.reshape(nrows, ncols), False


def _finish(fig, own: bool, ax, suptitle: str, handles=None, ncols: int = 4) -> None:
    """The suptitle and figure legend of our own figure; on the caller's figure, the first Axes' title and a
    legend below that Axes instead (their figure's suptitle and legends are left alone)."""
    if own:
        if handles:
            fig.legend(handles=handles, loc="outside lower center", ncols=min(len(handles), ncols), fontsize=7,
                       frameon=False)
        fig.suptitle(suptitle, fontsize=8)
        return
    if handles:
        ax.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, -0.16), ncols=min(len(handles), 2),
                  fontsize=7, frameon=False)
    import textwrap

    # one Axes is narrower than a figure: wrap what a suptitle says on one line (about 64 characters at 8 pt)
    text = "\n".join(textwrap.fill(line, 64) for line in suptitle.split("\n"))
    title = ax.get_title()
    ax.set_title(f"{title}\n{text}" if title else text, fontsize=8)


def _log_edges(t: np.ndarray) -> np.ndarray:
    """Cell edges of positive times on a log axis (geometric midpoints)."""
    if t.size == 1:
        return np.array([t[0] / 1.5, t[0] * 1.5])
    mid = np.sqrt(t[1:] * t[:-1])
    return np.concatenate([[t[0] ** 2 / mid[0]], mid, [t[-1] ** 2 / mid[-1]]])


def _positive_times(t: np.ndarray) -> np.ndarray:
    """Indices of times > 0 (t = 0 has no place on a log axis and is left out of such plots)."""
    keep = np.flatnonzero(t > 0)
    if keep.size == 0:
        raise InputError("the ensemble has no output time t > 0; a log-time figure needs some")
    return keep


def _title(ens, probe: str | None) -> str:
    desc = getattr(ens, "description", {}) or {}
    m = desc.get("model")
    params = m if isinstance(m, dict) else desc
    model = getattr(ens, "model", None) or params.get("kind") or (m if isinstance(m, str) else "")
    if isinstance(params.get("W"), (int, float)):
        model = f"{model} (disorder W = {params['W']:g})"
    R = len(ens.realizations)
    w = getattr(ens, "w", "W")
    v = f", V = {probe}" if probe else ""
    return f"{model} L = {ens.L}, operator {w} at site {ens.site}{v}, {R} realization(s)".strip()


def _colors(n: int, cmap: str = "viridis", lo: float = 0.1, hi: float = 0.8):
    import matplotlib

    cm = matplotlib.colormaps[cmap]
    return [cm(x) for x in np.linspace(lo, hi, max(n, 1))]


# ------------------------------------------------------------------------------------------ figures
def plot_heatmap(ens, threshold: float = 0.5, probe: str = "Z", *, levels: Sequence[float] | None = None,
                 use_trust: bool = True, max_discarded: float = trust.DEFAULT_MAX_DISCARDED,
                 color_scale: str = "linear", c_min: float = 1e-4, ax=None):
    """Ensemble-mean C(r, t) as a heat map on a log-time axis.

    Solid contour: mean curve at ``threshold``; dashed: median curve at ``threshold``; dotted: mean curve at
    the extra ``levels``. Hatched cells are untrusted (see :func:`mpo_fronts.trust.trust_mask`).
    ``color_scale="log"`` colours log10 C from ``c_min`` up (a front at C ~ 0.05 or a tail at 1e-3 is invisible
    on the linear 0..2 scale); values below ``c_min`` take the lowest colour. The legend sits below the axes.
    ``ax``: one matplotlib Axes to draw into (its figure gets the colour bar; see the module docstring), or None
    for a new figure. Returns the figure drawn into.
    """
    fig, axes, own = _axes(ax, 6.4, 4.8, what="one matplotlib Axes")
    a = axes[0, 0]
    handles, info = _heatmap_panel(fig, a, ens, threshold, probe, levels, use_trust, max_discarded, color_scale,
                                   c_min)
    _finish(fig, own, a, f"{_C_LABEL}; trust: {info['source']}", handles)
    return fig


def _heatmap_panel(fig, ax, ens, threshold, probe, levels, use_trust, max_discarded, color_scale, c_min):
    """The heat map of :func:`plot_heatmap` on ``ax``; returns the legend handles and the trust-mask info."""
    if color_scale not in ("linear", "log"):
        raise InputError(f"color_scale must be 'linear' or 'log', got {color_scale!r}", arg="color_scale")
    if not (isinstance(c_min, (int, float)) and 0 < c_min < 2):
        raise InputError(f"c_min must be a number in (0, 2), got {c_min!r}", arg="c_min")
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    theta = an.check_threshold(threshold)
    C = an.probe_otoc(ens, probe)
    t = np.asarray(ens.times, dtype=float)
    keep = _positive_times(t)
    t = t[keep]
    mean = C.mean(axis=0)[keep]
    median = np.median(C, axis=0)[keep]
    mask, info = trust.trust_mask(ens, use_trust, max_discarded, probe)
    L = C.shape[2]
    untrusted = (~np.broadcast_to(mask, C.shape).all(axis=0))[keep] if mask is not None else np.zeros(mean.shape, bool)
    xe = np.arange(L + 1) - 0.5
    te = _log_edges(t)
    vmax = max(float(np.nanmax(mean)), 1.1 * theta)
    if color_scale == "log":
        from matplotlib.colors import LogNorm

        norm = LogNorm(vmin=c_min, vmax=max(vmax, 10 * c_min))
        mesh = ax.pcolormesh(xe, te, np.clip(mean, c_min, None), cmap="cividis", norm=norm, shading="flat",
                             rasterized=True)
    else:
        mesh = ax.pcolormesh(xe, te, mean, cmap="cividis", vmin=0.0, vmax=vmax, shading="flat", rasterized=True)
    cb = fig.colorbar(mesh, ax=ax)
    cb.set_label(f"ensemble mean of C(r, t), V = {probe.upper()}" + (" (log scale)" if color_scale == "log" else ""))
    r = np.arange(L)
    handles = []
    for curve, style, name in ((mean, "-", "mean"), (median, "--", "median")):
        if np.nanmax(curve) >= theta and np.nanmin(curve) < theta and t.size > 1:
            ax.contour(r, t, curve, levels=[theta], colors="k", linewidths=2.6, linestyles=style)
            ax.contour(r, t, curve, levels=[theta], colors="w", linewidths=1.2, linestyles=style)
        handles.append(Line2D([], [], color="k", ls=style, lw=1.8, label=f"{name} C = {theta:g}"))
    for lev in levels or ():
        if np.nanmax(mean) >= lev > np.nanmin(mean) and t.size > 1:
            ax.contour(r, t, mean, levels=[lev], colors="0.9", linewidths=1.0, linestyles=":")
            handles.append(Line2D([], [], color="0.5", ls=":", label=f"mean C = {lev:g}"))
    if untrusted.any():
        from matplotlib.collections import PatchCollection
        from matplotlib.patches import Rectangle

        rects = []
        for j in range(L):  # one rectangle per run of untrusted times in each column
            col = np.concatenate([[False], untrusted[:, j], [False]]).astype(int)
            starts, stops = np.flatnonzero(np.diff(col) == 1), np.flatnonzero(np.diff(col) == -1)
            rects += [Rectangle((xe[j], te[a]), 1.0, te[b] - te[a]) for a, b in zip(starts, stops)]
        ax.add_collection(PatchCollection(rects, facecolor="none", edgecolor="0.85", linewidth=0.0,
                                          hatch="///", zorder=3))
        handles.append(Patch(facecolor="none", edgecolor="0.3", hatch="///", label="untrusted"))
    ax.axvline(ens.site, color="0.85", lw=0.8, ls=(0, (1, 2)))
    ax.set_yscale("log")
    ax.set_ylim(te[0], te[-1])
    ax.set_xlim(xe[0], xe[-1])
    ax.set_xlabel(f"site r (W at site i = {ens.site})")
    ax.set_ylabel(_T_LABEL)
    ax.set_title(_title(ens, probe.upper()), fontsize=9)
    return handles, info


def plot_distribution(ens, r: int | Sequence[int] | None = None, probe: str = "Z", *, bins: int = 40, ax=None):
    """Distribution of C(r, t) over realizations at one site r (or several, side by side), as a density over time.

    Top: histogram density (viridis) with the mean (solid) and median (dashed). Bottom: Sarle's bimodality
    coefficient with its uniform-distribution value 5/9 (dotted). ``r`` is a site or a sequence of sites (one
    column each); the default is a distance that the front reaches within the data
    (:func:`mpo_fronts.analysis.reached_site`).
    ``ax``: 2 n Axes for n sites, as a (2, n) array (row 0: densities, row 1: bimodality; ``fig.subplots(2, n)``)
    or a flat sequence with the n density Axes first, or None for a new figure. Returns the figure drawn into.
    """
    sites = [r] if r is None or isinstance(r, (int, np.integer)) else list(r)
    if not sites:
        raise InputError("r must be a site, a non-empty sequence of sites or None (the default)", arg="r")
    n = len(sites)
    fig, axes, _ = _axes(ax, 1.0 + 5.4 * n, 5.2, ncols=n, nrows=2, sharex=True, gridspec_kw={"height_ratios": [3, 1]},
                         what=f"2 x {n} matplotlib Axes for {n} site(s): a density and a bimodality panel per site")
    dists = [an.ensemble_distribution(ens, r=s, probe=probe, bins=bins) for s in sites]
    for j, dist in enumerate(dists):
        _distribution_panel(fig, axes[0, j], axes[1, j], ens, dist, probe)
    return fig


def _distribution_panel(fig, ax, bx, ens, dist: dict, probe: str):
    """One column of :func:`plot_distribution`: the density over time (ax) and the bimodality (bx)."""
    t = dist["times"]
    keep = _positive_times(t)
    t = t[keep]
    te = _log_edges(t)
    dens = dist["density"][keep]
    from matplotlib.colors import PowerNorm

    mesh = ax.pcolormesh(te, dist["edges"], dens.T, cmap="viridis", shading="flat", rasterized=True,
                         norm=PowerNorm(0.5, vmin=0.0, vmax=max(float(dens.max()), 1e-12)))
    cb = fig.colorbar(mesh, ax=[ax, bx])
    cb.set_label("density over realizations (per unit C, square-root scale)")
    ax.plot(t, dist["mean"][keep], color="w", lw=2.4)
    ax.plot(t, dist["mean"][keep], color="k", lw=1.2, label="mean")
    ax.plot(t, dist["median"][keep], color="w", lw=2.4, ls="--")
    ax.plot(t, dist["median"][keep], color="k", lw=1.2, ls="--", label="median")
    ax.set_xscale("log")
    ax.set_ylim(dist["edges"][0], dist["edges"][-1])
    ax.set_ylabel(f"C(r, t) at r = {dist['r']} (d = {dist['d']})")
    ax.legend(loc="best", fontsize=7, framealpha=0.85)
    ax.set_title(_title(ens, probe.upper()), fontsize=9)
    b = dist["bimodality"][keep]
    if np.any(np.isfinite(b)):
        bx.plot(t, b, color="k", marker=".", ms=3, lw=1.0)
        bx.axhline(5 / 9, color="0.4", ls=":", lw=1.0, label="5/9 (uniform)")
        bx.legend(loc="best", fontsize=7)
    else:
        n = len(ens.realizations)
        why = (f"{n} realization{'s' if n != 1 else ''}: Sarle's bimodality coefficient needs at least 4 "
               "realizations with spread" if n < 4 else "no spread over realizations at this site: bimodality "
               "undefined")
        bx.text(0.5, 0.5, why, ha="center", va="center", transform=bx.transAxes, fontsize=8, color="0.3")
    bx.set_ylim(0, 1.05)
    bx.set_xlabel(_T_LABEL)
    bx.set_ylabel("Sarle's b")
    return fig


def plot_light_cone(ens, threshold: float = 0.5, probe: str = "Z", *, lc: dict | None = None, ax=None, **opts):
    """Crossing times t*(d; theta) with the ballistic and logarithmic fits and their confidence bands.

    Left: linear time axis (a ballistic cone is a straight line); right: log time axis (a logarithmic cone is
    a straight line). Filled circles: the ensemble curve, with bootstrap standard deviations; open circles:
    crossings excluded as untrusted; small grey points: single realizations.
    ``ax``: two matplotlib Axes (linear, log time) to draw into, or None for a new figure. Returns the figure
    drawn into.
    """
    fig, axes, own = _axes(ax, 8.8, 4.0, ncols=2, what="2 matplotlib Axes (linear and log time axis)")
    if lc is None:
        lc = trust.ensemble_light_cone(ens, threshold, probe, **opts)
    d = lc["d"]
    cross, real = lc["crossings"], lc["realization_crossings"]
    colors = _colors(2, lo=0.2, hi=0.65)
    bands_drawn = False
    for j, ax in enumerate(axes[0]):
        R = real.tstar.shape[0]
        jitter = np.linspace(-0.15, 0.15, R) if R > 1 else np.zeros(1)
        ax.plot((d[None, :] + jitter[:, None]).ravel(), real.tstar.ravel(), ".", color="0.6", ms=2.5,
                label="single realizations", zorder=1)
        ok = cross.status == an.CROSSED
        err = np.where(np.isfinite(lc["tstar_boot_std"]), lc["tstar_boot_std"], 0.0)
        ax.errorbar(d[ok], cross.tstar[ok], yerr=err[ok], fmt="o", color="k", ms=4, capsize=2,
                    label=f"ensemble {lc['curve']}", zorder=3)
        bad = cross.status == an.UNTRUSTED
        if np.any(bad & np.isfinite(cross.tstar_any)):
            ax.plot(d[bad], cross.tstar_any[bad], "o", mfc="none", mec="k", ms=5, label="untrusted (excluded)",
                    zorder=3)
        for (law, style), c in zip((("ballistic", "-"), ("log", "--")), colors):
            f = lc["fits"][law]
            band = f["band"]
            if band["d"].size and np.any(np.isfinite(band["fit"])):
                if np.any(np.isfinite(band["low"])):
                    bands_drawn = True
                    ax.fill_between(band["d"], band["low"], band["high"], color=c, alpha=0.25, lw=0,
                                    hatch="...." if law == "log" else None)
                val = f["value"]
                name = (f"{f['law']}, v_B = {val:.3g}" if law == "ballistic" else f"{f['law']}, xi = {val:.3g}")
                ax.plot(band["d"], band["fit"], ls=style, color=c, lw=1.6, label=name, zorder=2)
        ax.set_xlim(-0.5, d.max() + 0.5)
        if not np.any(ok & (d >= 1)):
            ax.text(0.5, 0.5, f"no trusted crossing of C = {lc['threshold']:g} at d >= 1", ha="center",
                    va="center", transform=ax.transAxes, fontsize=8, color="0.3")
        ax.set_xlabel(_D_LABEL)
        if j == 0:
            ax.set_ylabel("crossing time t* (1/J)")
        elif np.any(np.isfinite(real.tstar) & (real.tstar > 0)) or np.any(cross.tstar[ok] > 0):
            ax.set_yscale("log")
            ax.set_ylabel("crossing time t* (1/J), log scale")
        else:  # nothing crossed: a log axis has no positive data to scale
            ax.set_ylabel("crossing time t* (1/J)")
    axes[0, 0].legend(fontsize=7, loc="best", framealpha=0.85)
    rr = lc["fits"]["ballistic"]["r_range"]
    ci = int(round(100 * lc["fits"]["ballistic"]["ci"]))
    bands = f"shaded: {ci}% bands of the fits" if bands_drawn else "no fit band (too few crossings or realizations)"
    _finish(fig, own, axes[0, 0], f"{_title(ens, lc['probe'])}; threshold C = {lc['threshold']:g}, fit range "
            f"d = {rr[0]}..{rr[1]}, {bands}")
    return fig


def plot_convergence(ens, threshold: float = 0.5, probe: str = "Z", *, ax=None):
    """Largest |dC| between successive bond dimensions at, ahead of and behind the threshold contour.

    The changes are those of the probe of the convergence study (``probe`` is used only if the study does not
    name one); the contour is that of the ensemble-mean C of the loaded run for the same probe, on the side of
    W used for the light cone. The dotted line is the tolerance of the trust mask.
    ``ax``: one matplotlib Axes to draw into, or None for a new figure. Returns the figure drawn into.
    """
    conv = getattr(ens, "convergence", None)
    if conv is None:
        raise InputError("this ensemble has no bond-dimension convergence data; run 'fronts converge' first "
                         "(or leave the 'convergence' figure out)")
    theta = an.check_threshold(threshold)
    probe = str(conv.get("probe") or probe)  # the changes were measured with the probe of the study
    C = an.probe_otoc(ens, probe)
    chis = [int(c) for c in np.asarray(conv["chis"]).reshape(-1)]
    dC = np.asarray(conv["max_dC"], dtype=float)
    cols, _, side = an.one_side(C.shape[2], int(ens.site))
    regions = an.front_sites(C.mean(axis=0)[:, cols], theta)
    fig, axes, _ = _axes(ax, 5.6, 4.2, what="one matplotlib Axes")
    ax = axes[0, 0]
    x = chis[1:]
    kinds = (("front", "at the front", "-", "o"), ("behind", "behind the front", "--", "s"),
             ("ahead", "ahead of the front", ":", "^"))
    for (name, label, style, marker), c in zip(kinds, _colors(3, lo=0.1, hi=0.7)):
        m = regions[name]
        if not m.any():
            continue
        y = [float(np.max(dC[k][:, cols][m])) for k in range(dC.shape[0])]
        ax.plot(x, np.maximum(y, 1e-16), ls=style, marker=marker, color=c, label=f"{label} (C = {theta:g} contour)")
    ax.axhline(float(conv["tol"]), color="0.3", ls=(0, (1, 2)), lw=1.0, label=f"tolerance {float(conv['tol']):g}")
    ax.set_xscale("log", base=2)
    ax.set_yscale("log")
    ax.set_xticks(x)
    ax.set_xticklabels([f"{a}->{b}" for a, b in zip(chis[:-1], chis[1:])])
    ax.set_xlabel("bond dimension chi (successive pairs)")
    ax.set_ylabel(f"largest |C_chi - C_chi'| over realizations, V = {probe.upper()}")
    ax.set_title(_title(ens, probe.upper()) + f", {side} side", fontsize=9)
    ax.legend(fontsize=7, loc="best")
    return fig


def plot_front(ens, n_profiles: int = 6, *, ax=None, **opts):
    """Right-weight front profiles at several times, and the front width against time on log axes.

    ``ax``: two matplotlib Axes (profiles, width) to draw into, or None for a new figure. Returns the figure
    drawn into.
    """
    fig, axes, own = _axes(ax, 8.8, 3.8, ncols=2, what="2 matplotlib Axes (profiles and width)")
    fr = trust.ensemble_front(ens, **opts)
    t = fr["times"]
    keep = _positive_times(t)
    # The output grid is usually log-spaced, so equally spaced indices are equally spaced in ln t.
    idx = np.unique(np.round(np.linspace(keep[0], keep[-1], min(n_profiles, keep.size))).astype(int))
    ax, bx = axes[0]
    markers = "osD^vP*X"
    for j, (k, c) in enumerate(zip(idx, _colors(idx.size, "cividis", 0.0, 0.85))):
        ax.plot(fr["x"], fr["profile"][k], color=c, marker=markers[j % len(markers)], ms=3, lw=1.2,
                label=f"t = {t[k]:.3g}")
    ax.set_xlabel("r - i (sites to the right of W)")
    ax.set_ylabel(r"right weight $\rho(r, t)$ (ensemble mean)")
    ax.legend(fontsize=7, title="time (1/J)", title_fontsize=7, loc="best")
    wexp = fr["width_exponent"]
    tw, ww = t[keep], fr["width"][keep]
    pos = ww > 0
    used = np.isin(tw, wexp["times"])
    bx.plot(tw[pos & used], ww[pos & used], "o", color="k", ms=3, label="width of the mean profile (fitted)")
    bx.plot(tw[pos & ~used], ww[pos & ~used], "o", mfc="none", mec="k", ms=3,
            label="not fitted (outside the window or untrusted)")
    if np.isfinite(wexp["value"]):
        tt = wexp["times"]
        bx.plot(tt, wexp["prefactor"] * tt ** wexp["value"], color=_colors(1, lo=0.55)[0], lw=2.0,
                label=(rf"$w \sim t^\beta$, $\beta$ = {wexp['value']:.3g} [{wexp['ci_low']:.3g}, "
                       rf"{wexp['ci_high']:.3g}]"))
    bx.set_xscale("log")
    bx.set_yscale("log")
    bx.set_xlabel(_T_LABEL)
    bx.set_ylabel("front width w(t) (sites)")
    bx.legend(fontsize=7, loc="best")
    _finish(fig, own, ax, _title(ens, None) + "; right end of W(t)")
    return fig


def _growth_distances(g, n_max: int) -> list[int]:
    """Up to ``n_max`` distances d >= 1, evenly spread, at which the median alpha is defined somewhere."""
    have = [int(j) for j in np.flatnonzero(np.any(np.isfinite(g.median), axis=0)) if g.d[j] >= 1]
    if len(have) <= n_max:
        return [int(g.d[j]) for j in have]
    pick = np.unique(np.round(np.linspace(0, len(have) - 1, n_max)).astype(int))
    return [int(g.d[have[k]]) for k in pick]


def plot_growth(ens, probe: str = "Z", *, distances: Sequence[int] | None = None, growth=None, n_max: int = 5,
                use_trust: bool = True, max_discarded: float = trust.DEFAULT_MAX_DISCARDED, fig=None, ax=None,
                **opts):
    """Local growth exponent alpha(t) = d ln C / d ln t per distance, and the histogram of stage exponents.

    Left: median of alpha over realizations (line) and its interquartile band, one colour and line style per
    distance, with the lowest-order value 2d dotted in the same colour. Right: histogram of the stage exponents
    of every realization and distance drawn, the early stages and the later (last of two or more) stages
    apart. See :mod:`mpo_fronts.growth` for the method.

    Parameters
    ----------
    ens : loaded ensemble (see :func:`mpo_fronts.load`)
    probe : {'X', 'Y', 'Z'}
    distances : sequence of int, optional
        Distances d = |r - i| to draw (default: up to ``n_max`` evenly spread ones where alpha is defined).
    growth : mpo_fronts.growth.Growth, optional
        A precomputed :func:`mpo_fronts.growth.ensemble_growth` (else computed here, on trusted points).
    use_trust, max_discarded
        Trust mask as in :func:`plot_heatmap`.
    fig : matplotlib.figure.Figure, optional
        Draw into this (empty) figure instead of a new one (two panels are added to it).
    ax : sequence of two matplotlib Axes, optional
        Draw into these (exponents, histogram) instead; not together with ``fig``.
    **opts
        Passed to :func:`mpo_fronts.growth.ensemble_growth` (``window``, ``tol``, ...).

    Returns
    -------
    matplotlib.figure.Figure
        The figure drawn into (``fig``, the figure of ``ax``, or a new one).
    """
    from .growth import ensemble_growth

    if fig is not None and ax is not None:
        raise InputError("give fig or ax, not both (fig: an empty figure to fill; ax: two Axes to draw into)",
                         arg="ax")
    own = ax is None
    if ax is not None:
        fig, axes, _ = _axes(ax, 0, 0, ncols=2, what="2 matplotlib Axes (exponents and histogram)")

    source = getattr(growth, "trusted_source", "")
    if growth is None:
        mask, info = trust.trust_mask(ens, use_trust, max_discarded, probe)
        growth = ensemble_growth(ens, probe, trusted=mask, **opts)
        source = info["source"]
    g = growth
    if distances is None:
        ds = _growth_distances(g, n_max)
    else:
        ds = [int(v) for v in distances]
        bad = [v for v in ds if v not in set(int(x) for x in g.d)]
        if bad or not ds:
            raise InputError(f"distances must be a non-empty list among 0..{int(g.d[-1])} (distances on the "
                             f"{g.side} side of W), got {list(distances)!r}", arg="distances")
    if not own:
        ax, bx = axes[0]
    elif fig is None:
        fig, axes = _figure(9.6, 4.0, ncols=2, gridspec_kw={"width_ratios": [3, 2]})
        ax, bx = axes[0]
    else:
        ax, bx = fig.subplots(1, 2, gridspec_kw={"width_ratios": [3, 2]})
    keep = _positive_times(g.times)
    t = g.times[keep]
    styles = ("-", "--", "-.", ":", (0, (5, 1, 1, 1)))
    markers = "os^Dv"
    for k, (dd, c) in enumerate(zip(ds, _colors(len(ds), "viridis", 0.0, 0.85))):
        j = int(np.flatnonzero(g.d == dd)[0])
        med = g.median[keep, j]
        ax.fill_between(t, g.q25[keep, j], g.q75[keep, j], color=c, alpha=0.2, lw=0)
        ax.plot(t, med, color=c, ls=styles[k % len(styles)], marker=markers[k % len(markers)], ms=3, lw=1.4,
                label=f"d = {dd}")
        if dd >= 1:
            ax.axhline(2 * dd, color=c, ls=(0, (1, 3)), lw=0.9)
    ax.set_xscale("log")
    ax.set_xlabel(_T_LABEL)
    ax.set_ylabel(r"$\alpha = d\,\ln C / d\,\ln t$ (median, interquartile band)")
    if ds:
        ax.legend(fontsize=7, loc="best", title="dotted: 2d", title_fontsize=7)
    else:
        ax.text(0.5, 0.5, "alpha is not defined at any distance d >= 1 (C below the floor or untrusted)",
                ha="center", va="center", transform=ax.transAxes, fontsize=8, color="0.3")
    st = g.stages
    cols = np.isin(st.column, [int(np.flatnonzero(g.d == dd)[0]) for dd in ds])
    last = st.n_stages[st.realization, st.column] - 1
    early = st.exponent[cols & st.is_early & np.isfinite(st.exponent)]
    later = st.exponent[cols & (st.index == last) & (last >= 1) & np.isfinite(st.exponent)]
    both = np.concatenate([early, later])
    if both.size:
        edges = np.histogram_bin_edges(both, bins=min(30, max(5, both.size // 2)))
        ce, cl = _colors(2, lo=0.15, hi=0.7)
        bx.hist(early, bins=edges, histtype="stepfilled", color=ce, alpha=0.5, label=f"early stages ({early.size})")
        if later.size:
            bx.hist(later, bins=edges, histtype="step", color=cl, lw=1.6, hatch="//",
                    label=f"later stages ({later.size})")
        bx.legend(fontsize=7, loc="best", title_fontsize=7,
                  title=None if later.size else "no later stage\n(one stage per curve,\nor none trusted)")
    else:
        bx.text(0.5, 0.5, "no stage found", ha="center", va="center", transform=bx.transAxes, fontsize=8,
                color="0.3")
    bx.set_xlabel("stage exponent (slope of ln C vs ln t)")
    bx.set_ylabel("count (realizations x distances)")
    _finish(fig, own, ax, f"{_title(ens, g.probe)}; growth stages, {g.side} side, trust: {source}")
    return fig


class FigureSkipped(UserWarning):
    """A figure :func:`write_figures` left out because the ensemble lacks its data (the message says why)."""


def _bond_array(ens, name: str) -> tuple[np.ndarray | None, str]:
    """A per-bond dataset (R, n_t, L-1) of the ensemble, or None and the one-line reason why not."""
    try:
        value = getattr(ens, name, None)
    except (KeyError, OSError):
        value = None
    if value is None:
        return None, (f"this ensemble has no '{name}' dataset (result files written before mpo_fronts 0.2 lack "
                      "it); run the description again with the current version to get it")
    a = np.asarray(value, dtype=float)
    want = (len(ens.realizations), len(ens.times), int(ens.L) - 1)
    if a.shape != want:
        return None, f"'{name}' has shape {a.shape}, expected (R, n_t, L-1) = {want}; the file is inconsistent"
    return a, ""


def _need_bond_array(ens, name: str, figure: str) -> np.ndarray:
    a, why = _bond_array(ens, name)
    if a is None:
        raise InputError(f"the {figure!r} figure needs per-bond data: {why}")
    return a


def _w_marker(ax, site: int, color="w"):
    """W's site on a bond axis (between bonds i - 1 and i): a dashed line and a triangle on the top edge."""
    from matplotlib.lines import Line2D

    x = site - 0.5
    ax.axvline(x, color=color, lw=1.0, ls="--", zorder=4)
    ax.plot([x], [1.0], marker="v", color="k", ms=7, clip_on=False, transform=ax.get_xaxis_transform(), zorder=5)
    return Line2D([], [], color="k", marker="v", ls="--", lw=1.0, label=f"W at site i = {site} (between bonds "
                  f"{site - 1} and {site})")


def _bond_grid(ens, a: np.ndarray):
    """The positive output times, the mean over realizations of a per-bond array (R, n_t, L - 1) at them, and the
    cell edges of its heat map (bond, log time)."""
    t = np.asarray(ens.times, dtype=float)
    keep = _positive_times(t)
    t = t[keep]
    mean = a.mean(axis=0)[keep]
    return t, mean, np.arange(mean.shape[1] + 1) - 0.5, _log_edges(t)


def _bond_mesh_axes(ax, t: np.ndarray, n_bonds: int, site: int):
    """Limits, scales and labels shared by the per-bond heat maps (bond index vs log time)."""
    from matplotlib.ticker import MaxNLocator

    ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_yscale("log")
    te = _log_edges(t)
    ax.set_ylim(te[0], te[-1])
    ax.set_xlim(-0.5, n_bonds - 0.5)
    ax.set_xlabel(f"{_B_LABEL}; W at site {site}")
    ax.set_ylabel(_T_LABEL)


def plot_entropy(ens, threshold: float = 0.5, probe: str = "Z", *, use_trust: bool = True,
                 max_discarded: float = trust.DEFAULT_MAX_DISCARDED, color_scale: str = "linear",
                 c_min: float = 1e-4, entropy_fraction: float = trust.DEFAULT_ENTROPY_FRACTION, ax=None):
    """The heat map of C (as :func:`plot_heatmap`) beside the operator entanglement entropy of W(t) at every bond.

    Right panel: S_b(t) = -sum p ln p of the normalised Schmidt weights of W(t) across bond (b, b + 1), in nats,
    averaged over realizations (the dataset ``bond_entropy``), bond index against the same log time axis as
    the left panel; W's site is marked between bonds i - 1 and i. Where the bond dimension chi of the run is
    known, the dash-dotted contour is the mean entropy ``entropy_fraction * ln chi``, the saturation criterion of
    the trust mask (:func:`mpo_fronts.trust.trust_from_bonds`), and the colour bar marks ln chi if reached.

    Parameters
    ----------
    ens : loaded ensemble with ``bond_entropy`` (result files from version 0.2 on; else InputError)
    threshold, probe, use_trust, max_discarded, color_scale, c_min
        The C panel, as in :func:`plot_heatmap`.
    entropy_fraction : float
        Fraction of ln chi for the saturation contour.
    ax : sequence of two matplotlib Axes (C, entropy), optional
        Draw into these instead of a new figure.

    Returns
    -------
    matplotlib.figure.Figure
        The figure drawn into.
    """
    from matplotlib.lines import Line2D

    S_all = _need_bond_array(ens, "bond_entropy", "entropy")
    fig, axes, own = _axes(ax, 11.5, 4.8, ncols=2, sharey=True,
                           what="2 matplotlib Axes (C heat map and bond entropy)")
    cx, sx = axes[0]
    handles, info = _heatmap_panel(fig, cx, ens, threshold, probe, None, use_trust, max_discarded, color_scale,
                                   c_min)
    t, S, be, te = _bond_grid(ens, S_all)
    R, nb, site = S_all.shape[0], S.shape[1], int(ens.site)
    vmax = max(float(np.nanmax(S)) if S.size else 0.0, 1e-12)
    mesh = sx.pcolormesh(be, te, S, cmap="viridis", vmin=0.0, vmax=vmax, shading="flat", rasterized=True)
    cb = fig.colorbar(mesh, ax=sx)
    chi = an.evolution_settings(ens).get("chi")  # ``evolution`` from 0.2 on, ``engine`` before
    chi = int(chi) if isinstance(chi, (int, np.integer, float)) and chi and chi > 1 else None
    label = f"operator entanglement entropy S_b (nats)\nmean over {R} realization(s)"
    if chi:  # S_b <= ln chi for Schmidt rank <= chi (common practice): the ceiling the truncation imposes
        lnchi = float(np.log(chi))
        label += f"; white line: ln chi = {lnchi:.3g}" if lnchi <= vmax else f"; ln chi = {lnchi:.3g} (chi = {chi})"
        if lnchi <= vmax:
            cb.ax.axhline(lnchi, color="w", lw=1.5)
        level = entropy_fraction * lnchi
        if t.size > 1 and nb > 1 and np.nanmax(S) >= level > np.nanmin(S):
            sx.contour(np.arange(nb), t, S, levels=[level], colors="w", linewidths=1.4, linestyles="-.")
            handles.append(Line2D([], [], color="0.3", ls="-.", lw=1.4,
                                  label=f"mean S_b = {entropy_fraction:g} ln chi (trust: bond saturated)"))
        else:
            handles.append(Line2D([], [], ls="none", label=f"mean S_b {'<' if np.nanmax(S) < level else '>='} "
                                  f"{entropy_fraction:g} ln chi everywhere"))
    cb.set_label(label, fontsize=8)
    handles.append(_w_marker(sx, site))
    _bond_mesh_axes(sx, t, nb, site)
    if own:  # the time axis is shared with the C panel
        sx.set_ylabel("")
    sx.set_title(f"entanglement of W(t) across each bond,\nmean over {R} realization(s)", fontsize=9, pad=9)
    _finish(fig, own, cx, f"{_C_LABEL} (left) and operator entanglement entropy of W(t) (right); "
            f"trust: {info['source']}", handles)
    return fig


def plot_discarded(ens, *, ax=None):
    """Where along the chain truncation lost weight: the cumulative discarded weight at every bond, log colour.

    Cell (b, t): the Frobenius weight of W dropped at bond (b, b + 1) up to time t (the dataset
    ``bond_discarded``), averaged over realizations, bond index against log time; cells where no weight was
    dropped are left blank (dotted background), W's site is marked between bonds i - 1 and i. The title gives
    the largest total of one realization.

    Parameters
    ----------
    ens : loaded ensemble with ``bond_discarded`` (result files from version 0.2 on; else InputError)
    ax : one matplotlib Axes, optional
        Draw into it instead of a new figure.

    Returns
    -------
    matplotlib.figure.Figure
        The figure drawn into.
    """
    from matplotlib.colors import LogNorm
    from matplotlib.patches import Patch, Rectangle

    D_all = _need_bond_array(ens, "bond_discarded", "discarded")
    fig, axes, own = _axes(ax, 6.4, 4.8, what="one matplotlib Axes")
    ax = axes[0, 0]
    t, D, be, te = _bond_grid(ens, D_all)
    R, nb, site = D_all.shape[0], D.shape[1], int(ens.site)
    ax.add_patch(Rectangle((be[0], te[0]), be[-1] - be[0], te[-1] - te[0], facecolor="w", edgecolor="0.6",
                           hatch="..", lw=0, zorder=0))
    handles = [Patch(facecolor="w", edgecolor="0.6", hatch="..", label="no weight discarded")]
    pos = D[np.isfinite(D) & (D > 0)]
    if pos.size:
        hi = float(pos.max())
        lo = max(float(pos.min()), hi * 1e-12)
        norm = LogNorm(vmin=min(lo, hi / 10), vmax=hi)
        cmap = _cmap_with_bad("magma_r")
        mesh = ax.pcolormesh(be, te, np.ma.masked_where(~(D > 0), D), cmap=cmap, norm=norm, shading="flat",
                             rasterized=True, zorder=1)
        cb = fig.colorbar(mesh, ax=ax)
        cb.set_label(f"cumulative discarded weight per bond (log scale)\nmean over {R} realization(s)", fontsize=8)
    else:
        ax.text(0.5, 0.5, "no weight discarded at any bond (the bond dimension never reached chi)", ha="center",
                va="center", transform=ax.transAxes, fontsize=8, color="0.3", zorder=6)
    handles.append(_w_marker(ax, site, color="0.55"))
    _bond_mesh_axes(ax, t, nb, site)
    total = D_all.sum(axis=2)
    worst = float(np.nanmax(total)) if total.size else 0.0
    ax.set_title(_title(ens, None), fontsize=9, pad=9)  # pad: room for W's marker
    _finish(fig, own, ax, f"Frobenius weight of W(t) dropped by truncation at bond (b, b + 1) up to time t,\nmean "
            f"over {R} realization(s); largest total over bonds of one realization: {worst:.3g}", handles, ncols=2)
    return fig


def _cmap_with_bad(name: str):
    """A copy of a registered colour map whose masked cells are transparent."""
    import matplotlib

    return matplotlib.colormaps[name].with_extremes(bad=(0, 0, 0, 0))


FIGURES: dict[str, Callable[..., Any]] = {
    "heatmap": plot_heatmap,
    "distribution": plot_distribution,
    "light_cone": plot_light_cone,
    "convergence": plot_convergence,
    "front": plot_front,
    "growth": plot_growth,
    "entropy": plot_entropy,
    "discarded": plot_discarded,
}

#: Figures that need data not every ensemble has; :func:`write_figures` leaves them out of the default set.
_NEEDS = {"entropy": "bond_entropy", "discarded": "bond_discarded"}


def _check_only(only) -> list[str]:
    if only is None:
        return list(FIGURES)
    names = [only] if isinstance(only, str) else list(only)
    bad = [n for n in names if n not in FIGURES]
    if bad or not names:
        import difflib

        hints = [f"did you mean {m[0]!r} for {b!r}?" for b in bad
                 if (m := difflib.get_close_matches(b.lower().replace("-", "_"), list(FIGURES), n=1, cutoff=0.6))]
        if len(hints) == 1:
            hints = [hints[0].split(" for ")[0] + "?"]
        raise InputError(f"only must name figures among {', '.join(FIGURES)}, got {only!r}"
                         + (f"; {' '.join(hints)}" if hints else ""), arg="only")
    return names


def write_figures(ens, outdir, only: str | Iterable[str] | None = None, threshold: float = 0.5, probe: str = "Z",
                  formats: Sequence[str] = ("png", "pdf"), *, r: int | Sequence[int] | None = None, dpi: int = 150,
                  n_boot: int = 500, seed: int = 0, use_trust: bool = True,
                  max_discarded: float = trust.DEFAULT_MAX_DISCARDED, color_scale: str = "linear") -> "FigureFiles":
    """Write the figures of a loaded ensemble to ``outdir``, one file per figure and format.

    Parameters
    ----------
    ens : loaded ensemble (see :func:`mpo_fronts.load`)
    outdir : path
        Created if missing; files are named ``<figure>.<format>``.
    only : str or iterable of str, optional
        Figure names (``heatmap``, ``distribution``, ``light_cone``, ``convergence``, ``front``, ``growth``,
        ``entropy``, ``discarded``); default all. A figure whose data the ensemble lacks (``convergence`` without
        a convergence study; ``entropy`` and ``discarded`` for result files older than 0.2, which have no
        per-bond datasets) is skipped from the default set, with its reason in ``skipped`` of the returned list
        and a one-line :class:`FigureSkipped` warning; asking for it by name is an error (nothing written).
    threshold : float
        theta on the [0, 2] scale of C, for contours and crossing times.
    probe : {'X', 'Y', 'Z'}
    formats : sequence of {'png', 'pdf', 'svg'}
    r : int or sequence of int, optional
        Probe site(s) of the distribution figure (default: halfway along the longer side of W, or the farthest
        distance the front reaches if nearer; see :func:`mpo_fronts.analysis.reached_site`).
    dpi : int
        Resolution of PNG files.
    n_boot, seed
        Bootstrap of the light-cone and width fits (see :func:`mpo_fronts.analysis.light_cone`).
    use_trust, max_discarded
        Trust mask as in :func:`mpo_fronts.report.summarize` (False: every point is used and nothing hatched).
    color_scale : {'linear', 'log'}
        Colour scale of the heat map (see :func:`plot_heatmap`).

    Returns
    -------
    FigureFiles
        The files written (a list of Path); its ``skipped`` maps each figure left out to the reason.
    """
    names = _check_only(only)
    fmts = [formats] if isinstance(formats, str) else list(formats)
    if not fmts or any(f not in _FORMATS for f in fmts):
        raise InputError(f"formats must be a non-empty list among {', '.join(_FORMATS)}, got {formats!r}")
    an.check_threshold(threshold)
    an.probe_otoc(ens, probe)
    if color_scale not in ("linear", "log"):
        raise InputError(f"color_scale must be 'linear' or 'log', got {color_scale!r}", arg="color_scale")
    skipped: dict[str, str] = {}
    if getattr(ens, "convergence", None) is None:
        if only is not None and "convergence" in names:
            raise InputError("only names 'convergence', but this ensemble has no bond-dimension convergence "
                             "data; run 'fronts converge' first or choose other figures")
        names = [n for n in names if n != "convergence"]
        if only is None:
            skipped["convergence"] = "no bond-dimension convergence data (run 'fronts converge' to get it)"
    for name, data in _NEEDS.items():
        if name in names:
            _, why = _bond_array(ens, data)
            if why:
                if only is not None:
                    raise InputError(f"only names {name!r}, but {why}; or choose other figures", arg="only")
                names.remove(name)
                skipped[name] = why
    require("matplotlib", "plot")
    out = Path(outdir)
    out.mkdir(parents=True, exist_ok=True)
    import warnings

    for name, why in skipped.items():
        if name != "convergence":  # convergence is optional by design; the per-bond data missing is worth a word
            # explicit location: printed as one line ("write_figures:0: FigureSkipped: ..."), with no source line
            # under it, also when the CLI is the caller
            warnings.warn_explicit(f"figure {name!r} skipped: {why}", FigureSkipped, "write_figures", 0,
                                   module=__name__)
    lc = None
    written = FigureFiles(skipped=skipped)
    for name in names:
        if name == "heatmap":
            fig = plot_heatmap(ens, threshold, probe, use_trust=use_trust, max_discarded=max_discarded,
                               color_scale=color_scale)
        elif name == "distribution":
            fig = plot_distribution(ens, r=r, probe=probe)
        elif name == "light_cone":
            lc = lc or trust.ensemble_light_cone(ens, threshold, probe, n_boot=n_boot, seed=seed, use_trust=use_trust,
                                              max_discarded=max_discarded)
            fig = plot_light_cone(ens, threshold, probe, lc=lc)
        elif name == "convergence":
            fig = plot_convergence(ens, threshold, probe)
        elif name == "growth":
            fig = plot_growth(ens, probe, use_trust=use_trust, max_discarded=max_discarded)
        elif name == "entropy":
            fig = plot_entropy(ens, threshold, probe, use_trust=use_trust, max_discarded=max_discarded,
                               color_scale=color_scale)
        elif name == "discarded":
            fig = plot_discarded(ens)
        else:
            fig = plot_front(ens, n_boot=n_boot, seed=seed, use_trust=use_trust, max_discarded=max_discarded)
        for fmt in fmts:
            path = out / f"{name}.{fmt}"
            fig.savefig(path, dpi=dpi, metadata=_metadata(fmt))
            written.append(path)
    return written


class FigureFiles(list):
    """The files :func:`write_figures` wrote (a list of Path), with ``skipped``: {figure: why it was left out}."""

    def __init__(self, paths=(), skipped: dict[str, str] | None = None):
        super().__init__(paths)
        self.skipped = dict(skipped or {})


def _metadata(fmt: str) -> dict[str, str]:
    from .conventions import __version__

    return {("Software" if fmt == "png" else "Creator"): f"mpo_fronts {__version__}"}
