"""Figures for papers: maps with slits, the TW fit, diagnostics, resonances.

Every function returns a :class:`matplotlib.figure.Figure` built without
``pyplot`` (no global figure state, no GUI backend; Agg renders raster
output), so they are safe in a headless run, a notebook or a worker thread.
:func:`save_figure` writes PNG (200 dpi), PDF or SVG through
:func:`~gyrometer.core.safeio.atomic_output`; vector files carry no creation
date, so identical inputs give identical files.

Style: sans-serif text at 8-9 pt, sized for a journal column (3.4 in) or
page (7.1 in) width, thin axes, inward ticks on all sides (common practice
of astronomy journals); colour-blind-safe line colours (Okabe & Ito 2008,
"Color Universal Design").
"""

from __future__ import annotations

import contextlib
import math
import os
from pathlib import Path
from typing import Any, Callable

import numpy as np

from .errors import OutputError
from .safeio import atomic_output

__all__ = [
    "FIGURE_DPI",
    "map_figure",
    "fit_figure",
    "convergence_figure",
    "pa_figure",
    "rotation_figure",
    "radial_figure",
    "save_figure",
    "FIGURES",
]

#: Resolution of PNG files, dots per inch.
FIGURE_DPI = 200

#: Okabe & Ito (2008) colour-blind-safe palette.
_COLOURS = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00",
            "#56B4E9", "#F0E442", "#000000")

_STYLE = {
    "font.family": "sans-serif",
    "font.size": 8.5,
    "axes.labelsize": 9,
    "axes.titlesize": 9,
    "legend.fontsize": 7.5,
    "xtick.labelsize": 8,
    "ytick.labelsize": 8,
    "axes.linewidth": 0.8,
    "lines.linewidth": 1.2,
    "xtick.direction": "in",
    "ytick.direction": "in",
    "xtick.top": True,
    "ytick.right": True,
    "legend.frameon": False,
    "svg.hashsalt": "gyrometer",
    "image.origin": "lower",
}
_COLUMN_IN = 3.4
_PAGE_IN = 7.1


@contextlib.contextmanager
def _style():
    import matplotlib

    with matplotlib.rc_context(_STYLE):
        yield


def _new_figure(width_in: float, height_in: float):
    from matplotlib.figure import Figure

    return Figure(figsize=(width_in, height_in), layout="constrained")


def _finish(fig):
    """Run the layout once and freeze it, so every file of a figure (and
    every later save) has the same geometry."""
    with _style():
        fig.draw_without_rendering()
    fig.set_layout_engine("none")
    return fig


def _omega_unit(distance_mpc: float | None) -> tuple[float, str]:
    """Factor from km/s/arcsec and the axis label of a pattern speed."""
    from .geometry import kpc_per_arcsec

    if distance_mpc is None:
        return 1.0, r"km s$^{-1}$ arcsec$^{-1}$"
    return 1.0 / kpc_per_arcsec(distance_mpc), r"km s$^{-1}$ kpc$^{-1}$"


# -- map with geometry and slits ---------------------------------------------
def _robust_limits(image: np.ndarray, lo: float = 1.0, hi: float = 99.5):
    finite = image[np.isfinite(image)]
    if finite.size == 0:
        return 0.0, 1.0
    a, b = np.percentile(finite, [lo, hi])
    return float(a), float(b if b > a else a + 1.0)


def _draw_geometry(ax, maps, geometry, slits, used=None) -> None:
    from .coords import offsets_to_pixel, lon_to_sky
    from .slits import slit_corners_pixel

    for k, slit in enumerate(slits):
        px, py = slit_corners_pixel(slit, geometry, maps.wcs)
        ok = used is None or bool(used[k])
        ax.fill(np.append(px, px[0]), np.append(py, py[0]), fill=False,
                edgecolor="k" if ok else "0.5", linewidth=0.6,
                linestyle="-" if ok else ":")
    # line of nodes, receding half solid
    ny, nx = maps.shape
    from .coords import pixel_scale_arcsec
    reach = 0.75 * max(ny, nx) * pixel_scale_arcsec(maps.wcs)
    for sign, style in ((1.0, "-"), (-1.0, "--")):
        east, north = lon_to_sky(np.array([0.0, sign * reach]),
                                 np.array([0.0, 0.0]), geometry.pa_deg)
        px, py = offsets_to_pixel(maps.wcs, geometry.ra_deg, geometry.dec_deg,
                                  east, north)
        ax.plot(px, py, color=_COLOURS[1], linestyle=style, linewidth=0.9)
    cx, cy = offsets_to_pixel(maps.wcs, geometry.ra_deg, geometry.dec_deg,
                              np.array([0.0]), np.array([0.0]))
    ax.plot(cx, cy, marker="+", color=_COLOURS[1], markersize=8,
            markeredgewidth=1.2)
    ax.set_xlim(-0.5, nx - 0.5)
    ax.set_ylim(-0.5, ny - 0.5)


def map_figure(maps, geometry, slits, *, used=None, title: str = ""):
    """Intensity and velocity maps with the line of nodes and the slits.

    Parameters
    ----------
    maps : MapSet
    geometry : DiskGeometry
        The line of nodes is drawn through the centre (solid on the
        receding side, dashed on the approaching side).
    slits : SlitSet
        Drawn as their exact sky polygons; slits left out of the fit
        (``used`` False) are dotted.
    used : array of bool, optional
    title : str
    """
    with _style():
        fig = _new_figure(_PAGE_IN, 3.4)
        intensity = np.asarray(maps.intensity, dtype=float)
        velocity = np.asarray(maps.velocity_kms, dtype=float) - geometry.vsys_kms
        lo, hi = _robust_limits(intensity)
        unit = maps.intensity_unit
        if unit:
            with contextlib.suppress(ValueError, TypeError):
                import astropy.units as u
                unit = u.Unit(unit).to_string("latex_inline")
        span = _robust_limits(np.abs(velocity), 0.0, 98.0)[1]
        panels = ((intensity, "magma", dict(vmin=lo, vmax=hi),
                   f"intensity ({unit})" if unit else "intensity"),
                  (velocity, "RdBu_r", dict(vmin=-span, vmax=span),
                   r"$V - V_{\rm sys}$ (km s$^{-1}$)"))
        for j, (image, cmap, limits, label) in enumerate(panels):
            ax = fig.add_subplot(1, 2, j + 1, projection=maps.wcs.celestial)
            im = ax.imshow(image, cmap=cmap, origin="lower",
                           interpolation="nearest", **limits)
            _draw_geometry(ax, maps, geometry, slits, used)
            ax.coords[0].set_axislabel("RA (ICRS)")
            ax.coords[1].set_axislabel("Dec (ICRS)" if j == 0 else " ")
            if j == 1:
                ax.coords[1].set_ticklabel_visible(False)
            # Colour bars above the panels: a long intensity unit beside the
            # left panel would run into the right one.
            bar = fig.colorbar(im, ax=ax, location="top", shrink=0.85,
                               pad=0.02, aspect=30)
            bar.set_label(label)
        if title:
            fig.suptitle(title)
    return _finish(fig)


# -- <V> against <X> ------------------------------------------------------------
def fit_figure(measurement, *, title: str = ""):
    """Slit ``<V>`` against ``<X>`` with the fitted line and its 1-sigma band.

    The band is ``sqrt(x^2 var(m) + var(b) + 2 x cov(m, b))`` from the
    fit's covariance (propagation of the line-fit errors). Slits left out
    of the fit are open symbols.
    """
    ig = measurement.integrals
    fit = measurement.fit
    used = np.asarray(measurement.used, dtype=bool)
    with _style():
        fig = _new_figure(_COLUMN_IN, 2.9)
        ax = fig.add_subplot(1, 1, 1)
        x = np.asarray(ig.x_mean_arcsec)
        y = np.asarray(ig.v_mean_kms)
        finite = np.isfinite(x) & np.isfinite(y)
        xs = x[finite]
        span = (np.max(np.abs(xs)) if xs.size else 1.0) * 1.15 or 1.0
        grid = np.linspace(-span, span, 200)
        line = fit.slope * grid + fit.intercept
        var = (grid ** 2 * fit.slope_err ** 2 + fit.intercept_err ** 2
               + 2.0 * grid * fit.covariance)
        band = np.sqrt(np.clip(var, 0.0, None))
        ax.fill_between(grid, line - band, line + band, color=_COLOURS[0],
                        alpha=0.25, linewidth=0, label=r"fit $\pm1\sigma$")
        ax.plot(grid, line, color=_COLOURS[0], label="fit")
        for sel, face, label in ((used, _COLOURS[1], "slits"),
                                 (~used, "white", "not fitted")):
            sel = sel & finite
            if sel.any():
                ax.errorbar(x[sel], y[sel], xerr=np.asarray(ig.x_err_arcsec)[sel],
                            yerr=np.asarray(ig.v_err_kms)[sel], fmt="o",
                            markersize=3.5, markerfacecolor=face,
                            markeredgecolor=_COLOURS[1], ecolor=_COLOURS[1],
                            elinewidth=0.8, capsize=0, label=label)
        ax.axhline(0.0, color="0.6", linewidth=0.5)
        ax.axvline(0.0, color="0.6", linewidth=0.5)
        ax.set_xlabel(r"$\langle X\rangle$ (arcsec)")
        ax.set_ylabel(r"$\langle V\rangle$ (km s$^{-1}$)")
        factor, unit = _omega_unit(measurement.geometry.distance_mpc)
        om = measurement.omega_p_kms_arcsec * factor
        om_err = measurement.omega_p_err_kms_arcsec * factor
        ax.text(0.04, 0.96, rf"fit: $\Omega_p = {om:.3g} \pm {om_err:.2g}$ {unit}",
                transform=ax.transAxes, va="top", ha="left")
        ax.legend(loc="lower right")
        if title:
            ax.set_title(title)
    return _finish(fig)


# -- convergence ------------------------------------------------------------------
def convergence_figure(curves, *, geometry=None, title: str = ""):
    """``<X>``, ``<V>`` and ``Omega_p`` against slit half-length.

    One line per slit in the first two panels; the curves must reach a
    plateau (Zou et al. 2019, ApJ 884, 23). Slits flagged as not converged
    are dashed.
    """
    L = np.asarray(curves.half_length_arcsec, dtype=float)
    with _style():
        fig = _new_figure(_PAGE_IN, 2.5)
        axes = [fig.add_subplot(1, 3, j + 1) for j in range(3)]
        conv = np.asarray(curves.converged, dtype=bool)
        for k in range(np.shape(curves.x_mean_arcsec)[0]):
            style = "-" if conv[k] else "--"
            colour = _COLOURS[k % len(_COLOURS)]
            axes[0].plot(L, curves.x_mean_arcsec[k], style, color=colour,
                         linewidth=0.9)
            axes[1].plot(L, curves.v_mean_kms[k], style, color=colour,
                         linewidth=0.9)
        factor, unit = _omega_unit(None if geometry is None
                                   else geometry.distance_mpc)
        axes[2].plot(L, np.asarray(curves.omega_p_kms_arcsec) * factor, "o-",
                     color="k", markersize=3)
        axes[0].set_ylabel(r"$\langle X\rangle$ (arcsec)")
        axes[1].set_ylabel(r"$\langle V\rangle$ (km s$^{-1}$)")
        axes[2].set_ylabel(rf"$\Omega_p$ ({unit})")
        for ax in axes:
            ax.set_xlabel("slit half-length (arcsec)")
        if title:
            fig.suptitle(title)
    return _finish(fig)


# -- PA sensitivity -------------------------------------------------------------
def pa_figure(sensitivity, *, geometry=None, title: str = ""):
    """``Omega_p`` against an assumed error of the position angle.

    The position angle is the dominant systematic of the method (Debattista
    2003, MNRAS 342, 1194; Zou et al. 2019): the panel shows how far the
    result moves over the plotted offsets. The shaded band is the quoted
    PA uncertainty when the geometry has one.
    """
    dpa = np.asarray(sensitivity.pa_offset_deg, dtype=float)
    factor, unit = _omega_unit(None if geometry is None else geometry.distance_mpc)
    om = np.asarray(sensitivity.omega_p_kms_arcsec, dtype=float) * factor
    err = np.asarray(sensitivity.omega_p_err_kms_arcsec, dtype=float) * factor
    with _style():
        fig = _new_figure(_COLUMN_IN, 2.6)
        ax = fig.add_subplot(1, 1, 1)
        if geometry is not None and geometry.pa_err_deg > 0:
            ax.axvspan(-geometry.pa_err_deg, geometry.pa_err_deg, color="0.85",
                       linewidth=0, label=r"PA $\pm1\sigma$")
        ax.fill_between(dpa, om - err, om + err, color=_COLOURS[0], alpha=0.25,
                        linewidth=0)
        ax.plot(dpa, om, "o-", color=_COLOURS[0], markersize=3,
                label=r"$\Omega_p$ (fit error band)")
        ax.axvline(0.0, color="0.5", linewidth=0.6)
        ax.set_xlabel(r"$\Delta$PA (deg)")
        ax.set_ylabel(rf"$\Omega_p$ ({unit})")
        ax.legend(loc="best")
        if title:
            ax.set_title(title)
    return _finish(fig)


# -- rotation curve and resonances ------------------------------------------------
def rotation_figure(curve_fit, *, omega_p=None, resonances=None,
                    bar_length_arcsec: float | None = None,
                    distance_mpc: float | None = None, title: str = "",
                    curve=None):
    """Rotation curve and the resonance diagram.

    Top: the rotation-curve points and the smooth model. Bottom:
    ``Omega``, ``Omega -+ kappa/2`` and ``Omega -+ kappa/4`` (Binney &
    Tremaine 2008, section 3.3.3) with the pattern speed and its band,
    the resonance radii (vertical lines) and the bar length (shaded).

    Parameters
    ----------
    curve_fit : CurveFit
        Smooth model with ``v``/``dvdr`` and its data points ``.data``.
    omega_p : tuple of float, optional
        ``(p16, median, p84)`` of Omega_p in km/s/arcsec.
    resonances : ResonanceTable, optional
    bar_length_arcsec : float, optional
        Deprojected bar semi-length.
    distance_mpc : float, optional
        Radii in kpc and frequencies in km/s/kpc when given.
    curve : RotationCurve, optional
        The points to draw (default: those the model was fitted to); its
        flagged points (beam smearing, inside the bar) are open symbols.
    """
    from .frequencies import frequency_curves
    from .geometry import kpc_per_arcsec

    data = curve if curve is not None else getattr(curve_fit, "data", None)
    r_lo, r_hi = getattr(curve_fit, "r_range_arcsec", (0.0, 1.0))
    r_max = max(r_hi, bar_length_arcsec or 0.0) * 1.05
    r = np.linspace(max(r_max * 1e-3, 1e-3), r_max, 400)
    freq = frequency_curves(curve_fit, r, distance_mpc=distance_mpc)
    scale = 1.0 if distance_mpc is None else kpc_per_arcsec(distance_mpc)
    r_unit = "arcsec" if distance_mpc is None else "kpc"
    factor, om_unit = _omega_unit(distance_mpc)
    with _style():
        fig = _new_figure(_COLUMN_IN, 4.6)
        top = fig.add_subplot(2, 1, 1)
        bottom = fig.add_subplot(2, 1, 2, sharex=top)
        if data is not None:
            flagged = np.asarray(getattr(data, "flagged", np.zeros(len(data),
                                                                    bool)))
            for sel, face in ((~flagged, "k"), (flagged, "white")):
                if sel.any():
                    top.errorbar(data.r_arcsec[sel] * scale, data.v_kms[sel],
                                 yerr=data.v_err_kms[sel], fmt="o",
                                 markersize=3, markerfacecolor=face,
                                 markeredgecolor="k", ecolor="k",
                                 elinewidth=0.7, capsize=0)
        top.plot(r * scale, curve_fit.v(r), color=_COLOURS[0],
                 label=getattr(curve_fit, "name", "model"))
        top.set_ylabel(r"$V_c$ (km s$^{-1}$)")
        top.legend(loc="lower right")
        top.tick_params(labelbottom=False)
        x = r * scale
        bottom.plot(x, freq.omega, color="k", label=r"$\Omega$")
        if 2 in freq.lindblad:
            lo, hi = freq.lindblad[2]
            bottom.plot(x, lo, color=_COLOURS[1], label=r"$\Omega\pm\kappa/2$")
            bottom.plot(x, hi, color=_COLOURS[1])
        if 4 in freq.lindblad:
            lo, hi = freq.lindblad[4]
            bottom.plot(x, lo, color=_COLOURS[2], linestyle="--",
                        label=r"$\Omega\pm\kappa/4$")
            bottom.plot(x, hi, color=_COLOURS[2], linestyle="--")
        if omega_p is not None:
            p16, med, p84 = (v * factor for v in omega_p)
            bottom.axhspan(p16, p84, color=_COLOURS[4], alpha=0.35, linewidth=0)
            bottom.axhline(med, color=_COLOURS[4], label=r"$\Omega_p$")
            top_y = 3.0 * max(abs(med), 1e-9)
            bottom.set_ylim(0.0, max(top_y, p84 * 1.5))
        if bar_length_arcsec:
            for ax in (top, bottom):
                ax.axvspan(0.0, bar_length_arcsec * scale, color="0.9",
                           linewidth=0, zorder=0)
        if resonances is not None:
            for row in resonances.rows:
                if math.isfinite(row.radius_arcsec):
                    for ax in (top, bottom):
                        ax.axvline(row.radius_arcsec * scale, color="0.4",
                                   linewidth=0.6, linestyle=":")
                    bottom.annotate(row.name.replace(" (4:1)", "")
                                    .replace(" (inner)", " in")
                                    .replace(" (outer)", " out"),
                                    (row.radius_arcsec * scale, 0.0),
                                    xycoords=("data", "axes fraction"),
                                    xytext=(1.5, 2), textcoords="offset points",
                                    rotation=90, va="bottom", fontsize=6.5)
        bottom.set_xlim(0.0, r_max * scale)
        bottom.set_xlabel(f"$R$ ({r_unit})")
        bottom.set_ylabel(rf"frequency ({om_unit})")
        bottom.legend(loc="upper right", ncol=2, frameon=True,
                      framealpha=0.85, edgecolor="none")
        if title:
            top.set_title(title)
    return _finish(fig)


# -- pattern speed against radius ---------------------------------------------------
def radial_figure(radial, *, curve_fit=None, omega_p=None, title: str = ""):
    """Pattern speed against radius over the frequency curves.

    The annulus values of the radial Tremaine-Weinberg method (Merrifield,
    Rand & Meidt 2006, MNRAS 366, L17) as a step curve with its 1-sigma
    band (:func:`gyrometer.core.radial.omega_curve`); annuli fixed mainly
    by the regulariser (resolution < 0.5) are drawn hatched. With a smooth
    rotation-curve model, ``Omega`` and ``Omega -+ kappa/2`` are drawn
    (Binney & Tremaine 2008, section 3.3.3): where a pattern speed crosses
    ``Omega`` is its corotation. Radii in kpc and frequencies in km/s/kpc
    when the distance is known.

    Parameters
    ----------
    radial : RadialResult
    curve_fit : CurveFit, optional
        Smooth rotation-curve model (``v``, ``dvdr`` in km/s, km/s/arcsec).
    omega_p : tuple of float, optional
        ``(p16, median, p84)`` of the single pattern speed, km/s/arcsec,
        drawn as a horizontal band for comparison.
    """
    from .frequencies import frequency_curves
    from .geometry import kpc_per_arcsec
    from .radial import omega_curve

    distance = radial.geometry.distance_mpc
    r, om, lo, hi = omega_curve(radial)
    r = np.asarray(r.value)
    om, lo, hi = (np.asarray(q.value) for q in (om, lo, hi))
    scale = 1.0 if distance is None else kpc_per_arcsec(distance)
    factor, om_unit = _omega_unit(distance)
    r_unit = "arcsec" if distance is None else "kpc"
    with _style():
        fig = _new_figure(_COLUMN_IN, 2.9)
        ax = fig.add_subplot(1, 1, 1)
        edges = np.asarray(radial.edges_arcsec) * scale
        r_max = float(edges[-1])
        if curve_fit is not None:
            grid = np.linspace(max(edges[-1] * 1e-3, 1e-3), edges[-1],
                               400) / scale
            freq = frequency_curves(curve_fit, grid, distance_mpc=distance,
                                    ms=(2,))
            ax.plot(grid * scale, freq.omega, color="k", label=r"$\Omega$")
            low, high = freq.lindblad[2]
            ax.plot(grid * scale, low, color=_COLOURS[1],
                    label=r"$\Omega\pm\kappa/2$")
            ax.plot(grid * scale, high, color=_COLOURS[1])
        if omega_p is not None:
            p16, med, p84 = (v * factor for v in omega_p)
            ax.axhspan(p16, p84, color="0.85", linewidth=0)
            ax.axhline(med, color="0.5", linewidth=0.8, linestyle="--",
                       label=r"single $\Omega_p$")
        ax.fill_between(r, lo, hi, color=_COLOURS[0], alpha=0.3, linewidth=0)
        ax.plot(r, om, color=_COLOURS[0], drawstyle="default",
                label=r"$\Omega_p(R)$")
        weak = ~np.asarray(radial.constrained, dtype=bool)
        for j in np.flatnonzero(weak):
            ax.axvspan(edges[j], edges[j + 1], facecolor="none",
                       edgecolor="0.7", hatch="///", linewidth=0)
        finite = np.isfinite(hi)
        top = max(float(np.max(hi[finite])) if finite.any() else 1.0, 1e-9)
        ax.set_ylim(min(0.0, float(np.min(lo[finite])) if finite.any()
                        else 0.0), 2.0 * top)
        ax.set_xlim(0.0, r_max)
        ax.set_xlabel(f"$R$ ({r_unit})")
        ax.set_ylabel(rf"frequency ({om_unit})")
        ax.legend(loc="upper right")
        if title:
            ax.set_title(title)
    return _finish(fig)


# -- saving -----------------------------------------------------------------------
_FORMATS = {".png": "png", ".pdf": "pdf", ".svg": "svg"}


def save_figure(fig, path: str | os.PathLike, overwrite: bool = False) -> Path:
    """Write a figure as PNG (200 dpi), PDF or SVG, atomically.

    The format follows the suffix. PDF and SVG are vector files without a
    creation date.
    """
    suffix = Path(path).suffix.lower()
    if suffix not in _FORMATS:
        raise OutputError("unknown figure format (use .png, .pdf or .svg)",
                          path=str(path))
    fmt = _FORMATS[suffix]
    metadata: dict[str, Any] = {"png": {"Software": "Gyrometer"},
                                "pdf": {"CreationDate": None,
                                        "Creator": "Gyrometer"},
                                "svg": {"Date": None,
                                        "Creator": "Gyrometer"}}[fmt]
    with _style(), atomic_output(path, overwrite, suffix=suffix) as tmp:
        fig.savefig(tmp, format=fmt, dpi=FIGURE_DPI, metadata=metadata)
    return Path(path)


# -- figures of a pipeline result ---------------------------------------------------
def _map_of(result):
    return map_figure(result.maps, result.session.geometry, result.session.slits,
                      used=result.measurement.used, title=result.name)


def _fit_of(result):
    return fit_figure(result.measurement, title=result.name)


def _convergence_of(result):
    return convergence_figure(result.convergence,
                              geometry=result.session.geometry,
                              title=result.name)


def _pa_of(result):
    return pa_figure(result.pa_sensitivity, geometry=result.session.geometry,
                     title=result.name)


def _rotation_of(result):
    om = None
    if result.budget is not None:
        c = result.budget.combined
        om = (c.p16, c.median, c.p84)
    else:
        m = result.measurement
        om = (m.omega_p_kms_arcsec - m.omega_p_err_kms_arcsec,
              m.omega_p_kms_arcsec,
              m.omega_p_kms_arcsec + m.omega_p_err_kms_arcsec)
    bar = result.bar.length.length_arcsec if result.bar.length else None
    return rotation_figure(result.curve_fit, omega_p=om,
                           resonances=result.resonances,
                           bar_length_arcsec=bar,
                           distance_mpc=result.session.geometry.distance_mpc,
                           title=result.name, curve=result.rotation_curve)


def _radial_of(result):
    om = None
    if result.budget is not None:
        c = result.budget.combined
        om = (c.p16, c.median, c.p84)
    return radial_figure(result.radial, curve_fit=result.curve_fit,
                         omega_p=om, title=result.name)


#: Figure kind -> function of a :class:`~gyrometer.core.pipeline.PipelineResult`.
FIGURES: dict[str, Callable] = {"map": _map_of, "fit": _fit_of,
                                "convergence": _convergence_of,
                                "pa": _pa_of, "rotation": _rotation_of,
                                "radial": _radial_of}
