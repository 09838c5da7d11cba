"""Pictures of a results file: 3D scenes with pyvista, plots with matplotlib.

Every view takes the dict of :func:`volmag.results.read_results`, draws in the
case's length unit, and either writes a PNG of `size` = (width, height)
pixels to `out` (off-screen) or, with `out=None`, opens a window.  Colour maps
are viridis (perceptually uniform, readable in grey and by colour-blind
readers, van der Walt & Smith, matplotlib 2015); line plots tell their curves
apart by line style and marker as well as colour (Okabe & Ito palette).

Views: surface (body surfaces coloured by |M| or a component), arrows
(magnetisation glyphs), slice (3D: a plane coloured by |B|, dB or distortion
with contours), map (the same plane as a 2D contour map), probes (B along
probe lines beside the sources-only field), residual (solver history).
"""
from __future__ import annotations

import os
import sys
from pathlib import Path

import numpy as np

from .cautions import IMPLANT_LIMIT_T, SHORT_CAUTION
from .slices import Plane, PlaneFields, default_plane, display_unit, plane_fields, results_case
from .units import length_scale

VIEWS = ("surface", "arrows", "slice", "map", "probes", "residual")
DEFAULT_SIZE = (1200, 900)
DEFAULT_TOLERANCE_PPM = 100.0
CMAP = "viridis"
# Okabe & Ito (2008) colour-blind-safe pair: total field, sources-only field
TOTAL_STYLE = dict(color="#0072B2", linestyle="-", marker="o")
APPLIED_STYLE = dict(color="#D55E00", linestyle="--", marker=None)
_PREFIXES = ((1e6, "M"), (1e3, "k"), (1.0, ""), (1e-3, "m"), (1e-6, "\u00b5"), (1e-9, "n"))


# ---------------------------------------------------------------- helpers --

def has_display() -> bool:
    """True where an interactive window can open."""
    return sys.platform in ("win32", "darwin") or bool(os.environ.get("DISPLAY") or os.environ.get("WAYLAND_DISPLAY"))


def unit_prefix(values, unit: str) -> tuple[float, str]:
    """(factor, label): the SI prefix that puts max |values| in [1, 1000),
    e.g. (1e-3, "mT"); divide values by factor to display them."""
    m = float(np.nanmax(np.abs(values))) if np.size(values) else 0.0
    for f, p in _PREFIXES:
        if m >= f:
            return f, p + unit
    return _PREFIXES[-1][0], _PREFIXES[-1][1] + unit


def _length(res: dict) -> tuple[float, str]:
    """(display units per metre, unit label) of the case."""
    unit = str(res["attrs"].get("length_unit", "m"))
    return 1.0 / length_scale(unit), display_unit(unit)


def _title(res: dict) -> str:
    return str(res["attrs"].get("title", ""))


def _fmt(v: float) -> str:
    return np.format_float_positional(v, precision=3, unique=True, fractional=False, trim="-")


def _need_solution(res: dict, what: str) -> None:
    if "solution" not in res:
        raise ValueError(f"the results file holds no solution (no applied field): no {what} to show")


# ------------------------------------------------------------- 3D scenes --

def _plotter(size, out):
    import pyvista as pv
    if not has_display():  # VTK warns when it falls back from X to an off-screen context: expected here
        from vtkmodules.vtkCommonCore import vtkLogger
        vtkLogger.SetStderrVerbosity(vtkLogger.VERBOSITY_ERROR)
    p = pv.Plotter(off_screen=out is not None, window_size=tuple(int(s) for s in size))
    p.set_background("white")
    return p


def _finish_scene(p, res, grid, out, caption: str, view=None) -> Path | None:
    """Title, axes in the case unit (around `grid`, or everything when None),
    camera (isometric, or looking along -view[0] with view[1] up), then a PNG
    or a window."""
    unit = _vtk_text(_length(res)[1])
    p.add_text(_vtk_text(f"{_title(res)}\n{caption}"), position="upper_left", font_size=_fs(p, 10), color="black")
    p.show_bounds(mesh=grid, xtitle=f"x ({unit})", ytitle=f"y ({unit})", ztitle=f"z ({unit})",
                  color="black", font_size=_fs(p, 9), location="outer", fmt="%.3g", grid=False,
                  n_xlabels=2, n_ylabels=2, n_zlabels=2)
    if view is None:
        p.view_isometric()
    else:
        p.view_vector(view[0], viewup=view[1])
    p.camera.zoom(0.85)
    if out is None:
        p.show()
        return None
    p.screenshot(str(out))
    p.close()
    return Path(out)


def _vtk_text(text: str) -> str:
    """VTK's bundled fonts lack the micro sign: write u (um, uT) instead."""
    return text.replace("\u00b5", "u")


def _font_scale(size) -> float:
    """Text size relative to a 1000 x 750 pixel picture."""
    return float(np.clip(min(size[0] / 1000, size[1] / 750), 0.5, 1.5))


def _fs(p, points: float) -> int:
    """VTK font size for `points` at the plotter's window size."""
    return max(6, int(round(points * _font_scale(p.window_size))))


def _bar(p, title: str) -> dict:
    return dict(title=_vtk_text(title), color="black", vertical=True, position_x=0.87, position_y=0.2,
                height=0.6, width=0.05, title_font_size=_fs(p, 14), label_font_size=_fs(p, 12), fmt="%.3g")


def _scene_grid(res: dict):
    from .export import unstructured_grid
    return unstructured_grid(res, _length(res)[0])


def _component(M: np.ndarray, component: str) -> tuple[np.ndarray, str]:
    # no '|' in names shown by VTK: its text renderer drops the sign
    if component == "magnitude":
        return np.linalg.norm(M, axis=1), "M magnitude"
    if component in ("x", "y", "z"):
        return M[:, "xyz".index(component)], f"M{component}"
    raise ValueError(f"component must be magnitude, x, y or z, not {component!r}")


def surface_view(res: dict, out=None, size=DEFAULT_SIZE, component: str = "magnitude") -> Path | None:
    """Body surfaces coloured by |M| or one component of M (A/m, shown with
    an SI prefix); without a solution, coloured by body."""
    grid = _scene_grid(res)
    p = _plotter(size, out)
    surf = grid.extract_surface(algorithm="dataset_surface")
    style = dict(show_edges=surf.n_cells < 4000, edge_color="#404040", line_width=0.5, ambient=0.35,
                 diffuse=0.65, specular=0.0)
    names = [str(n) for n in res["mesh"]["attrs"].get("body_names", [])]
    if "M" in surf.cell_data:
        vals, name = _component(surf.cell_data["M"], component)
        f, unit = unit_prefix(vals, "A/m")
        surf.cell_data["shown"] = vals / f
        caption = f"surface coloured by {name}"
        p.add_mesh(surf, scalars="shown", cmap=CMAP, scalar_bar_args=_bar(p, f"{name} ({unit})"), **style)
    elif len(names) > 1:
        caption = "bodies (no solution in this file)"
        p.add_mesh(surf, scalars="body_id", cmap=CMAP, categories=True, n_colors=len(names),
                   scalar_bar_args=dict(_bar(p, "body"), n_labels=0), annotations=dict(enumerate(names)), **style)
    else:
        caption = "body (no solution in this file)"
        p.add_mesh(surf, color="#bdbdbd", **style)
    return _finish_scene(p, res, grid, out, caption)


def arrows_view(res: dict, out=None, size=DEFAULT_SIZE, max_arrows: int = 400) -> Path | None:
    """Magnetisation arrows at evenly spread element centres (at most about
    `max_arrows`), all of one length, coloured by |M| (A/m), inside a faint
    body outline."""
    import pyvista as pv
    _need_solution(res, "magnetisation")
    grid = _scene_grid(res)
    centres = np.asarray(grid.cell_centers().points)
    keep, spacing = _spread(centres, max_arrows)
    M = np.asarray(grid.cell_data["M"])[keep]
    mag = np.linalg.norm(M, axis=1)
    f, unit = unit_prefix(mag, "A/m")
    cloud = pv.PolyData(centres[keep])
    cloud["direction"] = M / np.maximum(mag, 1e-300)[:, None]
    cloud["shown"] = mag / f
    arrows = cloud.glyph(orient="direction", scale=False, factor=0.9 * spacing,
                         geom=pv.Arrow(start=(-0.5, 0, 0), tip_length=0.3, tip_radius=0.12, shaft_radius=0.04))
    p = _plotter(size, out)
    surf = grid.extract_surface(algorithm="dataset_surface")
    p.add_mesh(surf, color="#bdbdbd", opacity=0.15)
    p.add_mesh(surf.extract_feature_edges(feature_angle=30), color="#404040", line_width=1)
    p.add_mesh(arrows, scalars="shown", cmap=CMAP, scalar_bar_args=_bar(p, f"M magnitude ({unit})"))
    return _finish_scene(p, res, grid, out, f"magnetisation direction, coloured by magnitude "
                                            f"({len(M)} of {grid.n_cells} elements)")


def _spread(points: np.ndarray, n: int) -> tuple[np.ndarray, float]:
    """Indices of about n points, one per cube of a grid over their bounding
    box (so arrows do not crowd where the mesh is fine), and the cube edge."""
    lo, hi = points.min(axis=0), points.max(axis=0)
    ext = np.maximum(hi - lo, 1e-12 * max(hi - lo))
    h = (np.prod(ext) / max(n, 1)) ** (1 / 3)
    for _ in range(20):
        bins = np.floor((points - lo) / h).astype(np.int64)
        _, first = np.unique(bins, axis=0, return_index=True)
        if len(first) <= n:
            break
        h *= 1.2
    return np.sort(first), float(min(h, ext.max()))


# ------------------------------------------------------------- slice data --

def _levels(values: np.ma.MaskedArray, quantity: str) -> list[float]:
    """Contour levels (T or ppm) inside the range of `values`: round numbers
    on a linear scale for |B|, 1-2-5 steps per decade for dB and ppm."""
    from matplotlib.ticker import LogLocator, MaxNLocator
    lo, hi = float(values.min()), float(values.max())
    if not hi > lo:
        return []
    if quantity == "B":
        ticks = MaxNLocator(nbins=6).tick_values(lo, hi)
    else:
        ticks = LogLocator(subs=(1.0, 2.0, 5.0)).tick_values(max(lo, hi * 1e-12), hi)
    ticks = [t for t in ticks if lo < t < hi]
    return ticks[:: max(1, len(ticks) // 7)]


def _special_lines(pf: PlaneFields, tolerance_ppm: float | None) -> list[dict]:
    """The tolerance line (distortion = tolerance) and the 0.5 mT line (|B|),
    each with its field, level, label and whether the plane reaches it."""
    out = []
    if tolerance_ppm is not None and np.any(pf.B_applied):
        ppm = pf.values("ppm")
        label = f"tolerance {_fmt(tolerance_ppm)} ppm"
        out.append(dict(kind="tolerance", values=ppm, level=tolerance_ppm, label=label, plain=label,
                        linestyle="--", state=_state(ppm, tolerance_ppm)))
    b = pf.values("B")
    out.append(dict(kind="limit", values=b, level=IMPLANT_LIMIT_T, label="|B| = 0.5 mT",
                    plain="B magnitude 0.5 mT", linestyle="-.", state=_state(b, IMPLANT_LIMIT_T)))
    return out


def _state(values: np.ma.MaskedArray, level: float) -> str:
    """"crossed" when the plane has values on both sides of `level`, else
    "above" or "below" (everywhere shown)."""
    if values.count() == 0:
        return "below"
    lo, hi = float(values.min()), float(values.max())
    return "crossed" if lo < level < hi else ("above" if lo >= level else "below")


def _special_legend(line: dict, plain: bool = False) -> str:
    return line["plain" if plain else "label"] + {"crossed": "", "above": " (exceeded everywhere on this plane)",
                            "below": " (not reached on this plane)"}[line["state"]]


def _quantity_label(quantity: str, plain: bool = False) -> str:
    """Axis label of a slice quantity; `plain` avoids the '|' sign, which
    VTK's text renderer does not draw."""
    if plain:
        return {"B": "B magnitude", "dB": "field change dB", "ppm": "distortion"}[quantity]
    return {"B": "|B|", "dB": "|B - B_applied|", "ppm": "distortion |B - B_applied| / |B_applied|"}[quantity]


def _display(values: np.ma.MaskedArray, quantity: str) -> tuple[float, str]:
    return (1.0, "ppm") if quantity == "ppm" else unit_prefix(values.compressed(), "T")


def _slice_data(res, plane, quantity, tolerance_ppm, pf=None):
    if pf is None:
        case = results_case(res)
        if not case.sources:
            raise ValueError("the case has no source: the field is zero everywhere, no slice to show")
        pf = plane_fields(res, plane or default_plane(res, case), case)
    values = pf.values(quantity)
    if values.count() == 0:
        raise ValueError(f"{quantity} is undefined everywhere on {pf.plane.label} (no applied field there?)")
    return pf, values, _special_lines(pf, tolerance_ppm)


def _extended(values: np.ma.MaskedArray) -> np.ndarray:
    """`values` with masked samples (inside bodies) set to the nearest valid
    sample, so that colours reach the body outline drawn over them."""
    from scipy.ndimage import distance_transform_edt
    mask = np.ma.getmaskarray(values)
    if not mask.any():
        return values.filled()
    idx = distance_transform_edt(mask, return_distances=False, return_indices=True)
    return values.filled(np.nan)[tuple(idx)]


def _section(res: dict, pf: PlaneFields):
    """The bodies' cross-section by the plane (pyvista PolyData, display units)."""
    grid = _scene_grid(res)
    return grid.slice(normal=pf.plane.normal(), origin=np.asarray(pf.plane.origin) * _length(res)[0])


def _plane_lines(pf: PlaneFields, values, level: float, scale: float) -> list[np.ndarray]:
    """Contour lines of `values` at `level` as 3D polylines (k, 3) in display
    units; masked samples break the lines."""
    import contourpy
    s, t = pf.plane.st()
    gen = contourpy.contour_generator(s, t, values, line_type=contourpy.LineType.Separate)
    o, u, v = (np.asarray(a, float) for a in (pf.plane.origin, pf.plane.u, pf.plane.v))
    return [(o + st[:, :1] * u + st[:, 1:] * v) * scale for st in gen.lines(level) if len(st) > 1]


def slice_view(res: dict, out=None, size=DEFAULT_SIZE, quantity: str = "ppm", plane: Plane | None = None,
               tolerance_ppm: float | None = DEFAULT_TOLERANCE_PPM, fields: PlaneFields | None = None
               ) -> Path | None:
    """3D scene: a plane through the model coloured by |B| ("B", T),
    |B - B_applied| ("dB", T) or the distortion ("ppm"), with labelled
    contours, the tolerance line (distortion = `tolerance_ppm`, thick black)
    and the 0.5 mT line (thick white, black rim) where the plane crosses them;
    the body sections in grey and the bodies in front of the plane faint.
    `plane` defaults to the first plane probe, else a mid-plane (see
    :func:`volmag.slices.default_plane`); precomputed `fields` may be given."""
    import pyvista as pv
    pf, values, specials = _slice_data(res, plane, quantity, tolerance_ppm, fields)
    scale, _ = _length(res)
    f, unit = _display(values, quantity)
    P = pf.plane.points() * scale
    normal = pf.plane.normal()
    size3 = float(np.ptp(P.reshape(-1, 3), axis=0).max())
    lift = lambda k: normal * (k * 2e-3 * size3)  # draw over the plane, towards the camera
    sheet = pv.StructuredGrid(*(P[..., k][..., None] for k in range(3)))
    sheet.point_data["shown"] = (_extended(values) / f).ravel(order="F")
    grid = _scene_grid(res)
    p = _plotter(size, out)
    p.add_mesh(sheet, scalars="shown", cmap=CMAP, log_scale=quantity != "B", lighting=False,
               scalar_bar_args=_bar(p, f"{_quantity_label(quantity, plain=True)} ({unit})"))
    section = _section(res, pf)
    if section.n_points:
        p.add_mesh(section.translate(lift(1)), color="#bdbdbd", lighting=False)
    front = grid.clip(normal=-normal, origin=np.asarray(pf.plane.origin) * scale)
    if front.n_cells:
        surf = front.extract_surface(algorithm="dataset_surface")
        p.add_mesh(surf, color="#d9d9d9", opacity=0.35)
        p.add_mesh(surf.extract_feature_edges(feature_angle=30), color="#404040", line_width=1)
    labels, where = [], []
    for i, level in enumerate(_levels(values, quantity)):
        lines = _plane_lines(pf, values, level, scale)
        for line in lines:
            p.add_mesh(pv.lines_from_points(line + lift(2)), color="black", line_width=1.5)
        if lines:  # labels of nested loops staggered along them, not stacked
            longest = max(lines, key=len)
            labels.append(f"{_fmt(level / f)} {unit}")
            where.append(longest[int((0.1 + 0.23 * i) % 1.0 * (len(longest) - 1))] + lift(3))
    for s in specials:
        lines = _plane_lines(pf, s["values"], s["level"], scale) if s["state"] == "crossed" else []
        for line in lines:
            poly = pv.lines_from_points(line + lift(3))
            p.add_mesh(poly, color="black", line_width=7)
            if s["kind"] == "limit":
                p.add_mesh(pv.lines_from_points(line + lift(4)), color="white", line_width=3)
        if lines:
            longest = max(lines, key=len)
            labels.append(s["plain"])
            where.append(longest[len(longest) // 3] + lift(5))
    if where:
        p.add_point_labels(np.array(where), [_vtk_text(t) for t in labels], font_size=_fs(p, 11), text_color="black", shape_color="white",
                           shape_opacity=0.75, show_points=False, always_visible=True)
    notes = [f"{s['plain']}: {'thick white line, black rim' if s['kind'] == 'limit' else 'thick black line'}"
             if s["state"] == "crossed" else _special_legend(s, plain=True) for s in specials]
    p.add_text(_vtk_text("\n".join(notes)), position="lower_left", font_size=_fs(p, 9), color="black")
    caption = f"{_quantity_label(quantity, plain=True)} on {pf.plane.label}"
    u = np.asarray(pf.plane.u) / np.linalg.norm(pf.plane.u)
    v = np.cross(normal, u)
    look = normal + 0.45 * v + 0.3 * u
    return _finish_scene(p, res, None, out, caption, view=(look, v))


# -------------------------------------------------------------- 2D plots --

def _scaled_fonts(view):
    """Run a matplotlib view with text and lines sized to its picture."""
    import functools

    @functools.wraps(view)
    def wrapper(res, out=None, size=DEFAULT_SIZE, **options):
        import matplotlib
        k = _font_scale(size)
        with matplotlib.rc_context({"font.size": 10 * k, "lines.linewidth": 1.5 * max(k, 0.7),
                                    "lines.markersize": 5 * k}):
            return view(res, out, size, **options)
    return wrapper


def _figure(size, out):
    """A matplotlib figure of exactly `size` pixels (at 100 dpi); off-screen
    (Agg, no global state) when writing to a file."""
    w, h = (int(s) / 100 for s in size)
    if out is None:
        import matplotlib.pyplot as plt
        return plt.figure(figsize=(w, h), dpi=100, layout="constrained")
    from matplotlib.figure import Figure
    return Figure(figsize=(w, h), dpi=100, layout="constrained")


def _finish_figure(fig, out) -> Path | None:
    if out is None:
        import matplotlib.pyplot as plt
        plt.show()
        return None
    fig.savefig(str(out), dpi=100)
    return Path(out)


def _plot_frame(pf: PlaneFields, unit: str):
    """Orthonormal in-plane axes (e1, e2) and their labels: model axes with
    model coordinates where the plane's u and v lie along them, else the
    direction of u and the one across it, measured from the plane's origin."""
    u = np.asarray(pf.plane.u, float) / np.linalg.norm(pf.plane.u)
    v = np.cross(pf.plane.normal(), u)
    axes = []
    for e in (u, v):
        a = int(np.argmax(np.abs(e)))
        if np.isclose(abs(e[a]), 1.0, atol=1e-9):
            axes.append((np.eye(3)[a], 0.0, f"{'xyz'[a]} ({unit})"))
        else:
            axes.append((e, float(np.asarray(pf.plane.origin) @ e), None))
    labels = [lab or f"{name} u ({unit})" for (_, _, lab), name in zip(axes, ("along", "across"))]
    return axes, labels


def _to_plot(points: np.ndarray, axes, scale: float) -> tuple[np.ndarray, np.ndarray]:
    """Plot coordinates of points (..., 3) given in display units."""
    return tuple(points @ e - c * scale for e, c, _ in axes)


@_scaled_fonts
def map_view(res: dict, out=None, size=DEFAULT_SIZE, quantity: str = "ppm", plane: Plane | None = None,
             tolerance_ppm: float | None = DEFAULT_TOLERANCE_PPM, fields: PlaneFields | None = None
             ) -> Path | None:
    """2D contour map of the plane of :func:`slice_view`: filled colours,
    labelled contours, the tolerance and 0.5 mT lines, body sections in grey;
    a caution footnote where |B| on the plane reaches 0.5 mT."""
    from matplotlib import colors, patheffects
    from matplotlib.collections import LineCollection, PolyCollection
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch
    from matplotlib.ticker import MaxNLocator
    pf, values, specials = _slice_data(res, plane, quantity, tolerance_ppm, fields)
    scale, lunit = _length(res)
    f, unit = _display(values, quantity)
    axes, (xlabel, ylabel) = _plot_frame(pf, lunit)
    X, Y = _to_plot(pf.plane.points() * scale, axes, scale)
    fig = _figure(size, out)
    ax = fig.add_subplot()
    lo, hi = float(values.min()) / f, float(values.max()) / f
    hi = hi if hi > lo else lo * 1.01 + 1e-30
    log = quantity != "B" and lo > 0
    fill = np.geomspace(lo, hi, 33) if log else np.linspace(lo, hi, 33)
    norm = colors.LogNorm(lo, hi) if log else colors.Normalize(lo, hi)
    cs = ax.contourf(X, Y, _extended(values) / f, levels=fill, cmap=CMAP, norm=norm, extend="both")
    bar = fig.colorbar(cs, ax=ax, shrink=0.9, ticks=None if log else MaxNLocator(8))
    bar.set_label(f"{_quantity_label(quantity).split(' |')[0]} ({unit})")
    if log:
        bar.ax.set_yscale("log")
    levels = [lv / f for lv in _levels(values, quantity)]
    if levels:
        c = ax.contour(X, Y, values / f, levels=levels, colors="black", linewidths=0.6)
        ax.clabel(c, fmt=lambda v: f"{_fmt(v)} {unit}", fontsize="small")
    halo = [patheffects.withStroke(linewidth=5, foreground="white")]
    handles = []
    for s in specials:
        style = dict(color="black", linestyle=s["linestyle"], linewidth=2.5)
        if s["state"] == "crossed":
            c = ax.contour(X, Y, s["values"], levels=[s["level"]], colors="black",
                           linestyles=s["linestyle"], linewidths=2.5)
            c.set(path_effects=halo)
            ax.clabel(c, fmt={s["level"]: s["label"]}, fontsize="small")
        handles.append(Line2D([], [], path_effects=halo, label=_special_legend(s), **style))
    section = _section(res, pf)
    if section.n_points:
        tri = section.triangulate()
        xy = np.column_stack(_to_plot(np.asarray(tri.points), axes, scale))
        faces = np.asarray(tri.faces).reshape(-1, 4)[:, 1:]
        ax.add_collection(PolyCollection(xy[faces], facecolors="#bdbdbd", edgecolors="#bdbdbd", linewidths=0.3,
                                         zorder=3))
        edges = section.extract_feature_edges(boundary_edges=True, feature_edges=False, manifold_edges=False,
                                              non_manifold_edges=False)
        exy = np.column_stack(_to_plot(np.asarray(edges.points), axes, scale))
        seg = np.asarray(edges.lines).reshape(-1, 3)[:, 1:]
        ax.add_collection(LineCollection(exy[seg], colors="black", linewidths=1.0, zorder=4))
        handles.append(Patch(facecolor="#bdbdbd", edgecolor="black", label="material (field not shown)"))
    ax.set_aspect("equal")
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    ax.set_title(f"{_title(res)}\n{_quantity_label(quantity)} on {pf.plane.label}", fontsize="medium")
    ax.legend(handles=handles, loc="upper right", fontsize="small", framealpha=0.85, handlelength=4)
    if pf.values("B").max() >= IMPLANT_LIMIT_T:
        fig.get_layout_engine().set(rect=(0, 0.06, 1, 0.94))
        fig.text(0.01, 0.01, SHORT_CAUTION, fontsize="small", wrap=True, va="bottom")
    return _finish_figure(fig, out)


def line_probes(res: dict) -> list[str]:
    """Names of the probes that are lines or point lists (not planes or boxes),
    by the kind stored with each probe (files without it: from the case)."""
    probes = {n: p for n, p in res.get("probes", {}).items() if n != "attrs"}
    kinds = {n: str(p.get("attrs", {}).get("kind", "")) for n, p in probes.items()}
    if not all(kinds.values()):
        try:
            kinds = {p.name: p.kind for p in results_case(res).probes}
        except ValueError:
            kinds = {}
    return [n for n in probes if kinds.get(n, "line") in ("line", "points")]


@_scaled_fonts
def probes_view(res: dict, out=None, size=DEFAULT_SIZE, names=None) -> Path | None:
    """B components and |B| (T, SI prefix) along each line probe against the
    distance along it (case unit): the total field (solid, circles) beside the
    sources-only field (dashed); the 0.5 mT line on |B| where it is in range."""
    names = list(names or line_probes(res))
    if not names:
        raise ValueError("the results file has no line or point probe to plot")
    scale, lunit = _length(res)
    allB = np.concatenate([np.asarray(res["probes"][n][k]) for n in names for k in ("B", "B_applied")])
    f, unit = unit_prefix(allB, "T")
    peak = float(np.abs(allB).max()) / f
    fig = _figure(size, out)
    axes = fig.subplots(4, len(names), sharex="col", squeeze=False)
    for j, name in enumerate(names):
        pr = res["probes"][name]
        pts = np.asarray(pr["points"]) * scale
        dist = np.concatenate([[0.0], np.cumsum(np.linalg.norm(np.diff(pts, axis=0), axis=1))])
        B, Ba = np.asarray(pr["B"]), np.asarray(pr["B_applied"])
        for i, lab in enumerate(("Bx", "By", "Bz", "|B|")):
            ax = axes[i, j]
            y, ya = (B[:, i], Ba[:, i]) if i < 3 else (np.linalg.norm(B, axis=1), np.linalg.norm(Ba, axis=1))
            ax.plot(dist, y / f, label="total", **TOTAL_STYLE)
            ax.plot(dist, ya / f, label="sources only", **APPLIED_STYLE)
            if i == 3 and y.min() <= IMPLANT_LIMIT_T <= y.max():
                ax.axhline(IMPLANT_LIMIT_T / f, color="black", linestyle="-.", linewidth=1.5, label="0.5 mT")
                ax.legend(fontsize="small", loc="best")
            ax.set_ylabel(f"{lab} ({unit})")
            ax.grid(True, color="0.85")
            # a component that is zero up to rounding keeps an axis of 2 % of the largest
            # field, instead of blowing its round-off up to full height
            lo, hi = min(y.min(), ya.min()) / f, max(y.max(), ya.max()) / f
            if hi - lo < 0.02 * peak:
                mid = 0.5 * (lo + hi)
                ax.set_ylim(mid - 0.01 * peak, mid + 0.01 * peak)
        axes[0, j].set_title(f"probe {name!r}", fontsize="medium")
        axes[0, j].legend(fontsize="small", loc="best")
        axes[-1, j].set_xlabel(f"distance along the probe ({lunit})")
    fig.suptitle(_title(res), fontsize="medium")
    return _finish_figure(fig, out)


@_scaled_fonts
def residual_view(res: dict, out=None, size=DEFAULT_SIZE) -> Path | None:
    """Relative residual of the Krylov solve against the iteration, log scale,
    with the case's stopping tolerance."""
    solver = res.get("solver", {})
    hist = np.asarray(solver.get("residual_history", []), float)
    if hist.size == 0:
        raise ValueError("the results file has no solver residual history (nothing was solved)")
    from matplotlib.ticker import MaxNLocator
    a = solver.get("attrs", {})
    fig = _figure(size, out)
    ax = fig.add_subplot()
    ax.semilogy(np.arange(hist.size), np.maximum(hist, 1e-300), color="#0072B2", marker="o", label="residual")
    try:
        tol = results_case(res).solver.tolerance
        ax.axhline(tol, color="black", linestyle="--", label=f"tolerance {tol:.0e}")
    except ValueError:
        pass
    ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_xlabel("iteration")
    ax.set_ylabel("relative residual |b - Ax| / |b|")
    ax.grid(True, which="both", color="0.85")
    ax.legend()
    state = "converged" if a.get("converged", True) else "NOT converged"
    ax.set_title(f"{_title(res)}\nsolver {a.get('method', '?')}, {a.get('unknowns', '?')} unknowns, "
                 f"{a.get('iterations', '?')} iterations, {state}", fontsize="medium")
    return _finish_figure(fig, out)


def render(res: dict, what: str, out=None, size=DEFAULT_SIZE, **options) -> Path | None:
    """Draw view `what` (one of VIEWS) of a results dict; see the view functions."""
    views = {"surface": surface_view, "arrows": arrows_view, "slice": slice_view, "map": map_view,
             "probes": probes_view, "residual": residual_view}
    if what not in views:
        raise ValueError(f"unknown view {what!r}; use one of {', '.join(VIEWS)}")
    return views[what](res, out, size, **options)
