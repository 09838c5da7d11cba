"""One self-contained HTML report of a results file, for a design review.

Everything is inside the file: styles inline, pictures as base64 data URIs,
no scripts and no links, so it opens the same in any browser with no network.
"""
from __future__ import annotations

import base64
import html
import os
import tempfile
from pathlib import Path

import numpy as np

from . import views
from .cautions import IMPLANT_LIMIT_T, stray_field_cautions

_CSS = """
body { font-family: sans-serif; max-width: 1100px; margin: 2em auto; color: #111; line-height: 1.4; }
h1 { font-size: 1.5em; } h2 { font-size: 1.2em; border-bottom: 1px solid #999; margin-top: 2em; }
table { border-collapse: collapse; margin: 0.5em 0; } td, th { border: 1px solid #bbb; padding: 0.2em 0.6em; }
th { background: #eee; text-align: left; } td.num { text-align: right; font-family: monospace; }
.pass { color: #0a5; font-weight: bold; } .fail { color: #b00; font-weight: bold; }
.caution { border: 3px solid #000; background: #fff4cc; padding: 0.5em 1em; }
pre { background: #f4f4f4; padding: 0.8em; overflow-x: auto; font-size: 0.9em; }
figure { margin: 1em 0; } img { max-width: 100%; border: 1px solid #ccc; }
figcaption { font-size: 0.9em; color: #333; }
.meta { font-size: 0.9em; color: #333; }
"""


def write_report(res: dict, out, size=(1000, 750), quantity: str = "ppm",
                 tolerance_ppm: float | None = views.DEFAULT_TOLERANCE_PPM, samples: int | None = None) -> Path:
    """Write the HTML report of a results dict to `out` (see :func:`report_html`);
    written to a temporary name and renamed when complete."""
    out = Path(out)
    text = report_html(res, size, quantity, tolerance_ppm, samples)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(f".{out.name}.part")
    tmp.write_text(text, encoding="utf-8")
    os.replace(tmp, out)
    return out


def report_html(res: dict, size=(1000, 750), quantity: str = "ppm",
                tolerance_ppm: float | None = views.DEFAULT_TOLERANCE_PPM, samples: int | None = None) -> str:
    """The report as HTML text: case title and text, pictures (model surface,
    field map of `quantity` with the tolerance line at `tolerance_ppm` and the
    0.5 mT line, sampled `samples` times along the plane's longer side
    (default: by mesh size), probe plots, residual history; `size` in pixels), the
    demagnetising tensors, probe metrics, expectation outcomes, solver and
    mesh statistics, cautions where |B| reaches 0.5 mT, version and case hash."""
    attrs, summary = res["attrs"], res.get("summary") or {}
    pictures, plane = _pictures(res, size, quantity, tolerance_ppm, samples)
    peak = _peak_field(res, plane)
    parts = [f"<h1>{_e(attrs.get('title', ''))}</h1>", _meta(res, summary), _cautions(peak)]
    parts += ["<h2>Pictures</h2>"] + pictures
    parts += [_demag(res), _bodies(summary), _probes(res), _expectations(res, summary), _solver(res),
              _mesh(res, summary), "<h2>Case file</h2>", f"<pre>{_e(res.get('case', ''))}</pre>",
              _provenance(attrs)]
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>{_e(attrs.get('title', 'volmag report'))}</title><style>{_CSS}</style></head>"
            f"<body>\n{chr(10).join(p for p in parts if p)}\n</body></html>\n")


def _e(x) -> str:
    return html.escape(str(x))


def _num(v: float, fmt: str = ".6g") -> str:
    return f'<td class="num">{v:{fmt}}</td>'


def _table(header, rows) -> str:
    head = "".join(f"<th>{_e(h)}</th>" for h in header)
    return f"<table><tr>{head}</tr>" + "".join(f"<tr>{''.join(r)}</tr>" for r in rows) + "</table>"


def _meta(res, summary) -> str:
    a = res["attrs"]
    conv = summary.get("converged", a.get("converged"))
    state = "" if conv is None else (' &middot; solve <span class="pass">converged</span>' if conv
                                     else ' &middot; solve <span class="fail">NOT converged</span>')
    return (f'<p class="meta">volmag {_e(a.get("volmag_version", "?"))} &middot; created '
            f'{_e(a.get("created", "?"))} &middot; case sha256 <code>{_e(a.get("case_sha256", "?"))}</code>'
            f' &middot; lengths in the case and pictures: {_e(a.get("length_unit", "m"))}{state}</p>')


def _pictures(res, size, quantity, tolerance_ppm, samples):
    """Figures as <figure> blocks with embedded PNGs, and the plane fields used
    for the map (None when the case has no field to map)."""
    from .slices import default_plane, plane_fields, results_case
    blocks, fields = [], None
    try:
        case = results_case(res)
        if case.sources:
            fields = plane_fields(res, default_plane(res, case, samples), case)
    except ValueError as e:
        blocks.append(f"<p>No field map: {_e(e)}</p>")
    shots = [("surface", {}, "The model: body surfaces coloured by the magnitude of the magnetisation M."),
             ("map", dict(quantity=quantity, tolerance_ppm=tolerance_ppm, fields=fields),
              "Field map on a plane through the model, with the tolerance and 0.5 mT lines where the "
              "plane crosses them; body sections in grey."),
             ("probes", {}, "B along the probe lines: total field (solid) beside the field of the sources "
                            "alone (dashed)."),
             ("residual", {}, "Solver residual history.")]
    with tempfile.TemporaryDirectory() as tmp:
        for what, options, caption in shots:
            if what == "map" and fields is None:
                continue
            png = Path(tmp) / f"{what}.png"
            try:
                views.render(res, what, png, size, **options)
            except ValueError as e:  # nothing of this kind in the file
                blocks.append(f"<p>No {what} picture: {_e(e)}</p>")
                continue
            data = base64.b64encode(png.read_bytes()).decode("ascii")
            blocks.append(f'<figure><img alt="{what}" src="data:image/png;base64,{data}">'
                          f"<figcaption>{_e(caption)}</figcaption></figure>")
    return blocks, fields


def _peak_field(res, fields) -> dict:
    """Largest |B| (T) outside the material on each probe and on the mapped plane."""
    peak = {f"probe {n!r}": float(np.linalg.norm(np.asarray(p["B"]), axis=1).max())
            for n, p in res.get("probes", {}).items() if n != "attrs"}
    if fields is not None and fields.values("B").count():
        peak[fields.plane.label] = float(fields.values("B").max())
    return peak


def _cautions(peak: dict) -> str:
    top = max(peak.values(), default=0.0)
    items = stray_field_cautions(top)
    if not items:
        return ""
    where = ", ".join(f"{k} ({v * 1e3:.3g} mT)" for k, v in peak.items() if v >= IMPLANT_LIMIT_T)
    lis = "".join(f"<li>{_e(c)}</li>" for c in items)
    return (f'<div class="caution"><strong>Cautions: the flux density reaches 0.5 mT or more</strong> '
            f"on {_e(where)}.<ul>{lis}</ul></div>")


def _demag(res) -> str:
    d = {k: v for k, v in res.get("demag", {}).items() if k != "attrs"}
    if not d:
        return ""
    out = ["<h2>Demagnetising tensors</h2>",
           "<p>Magnetometric tensors N (dimensionless, model axes) of each body alone, at its own "
           "susceptibility chi.</p>"]
    for name, g in d.items():
        N, chi = np.asarray(g["N"]), np.asarray(g["chi"])
        chi_text = f"{chi[0, 0]:.6g}" if np.allclose(chi, chi[0, 0] * np.eye(3)) else np.array2string(chi)
        out.append(f"<h3>{_e(name)} (chi = {_e(chi_text)})</h3>")
        rows = [[f"<th>{a}</th>"] + [_num(v, ".6f") for v in row] for a, row in zip("xyz", N)]
        out.append(_table(["N", "x", "y", "z"], rows))
        out.append(f"<p>trace N = {np.trace(N):.6f}</p>")
        if "fluxmetric" in g["attrs"]:
            out.append(f"<p>fluxmetric factor along {_e(g['attrs'].get('fluxmetric_axis', '?'))}: "
                       f"{float(g['attrs']['fluxmetric']):.6f}</p>")
    return "\n".join(out)


def _bodies(summary) -> str:
    bodies = summary.get("bodies") or {}
    if not bodies:
        return ""
    rows = [[f"<td>{_e(n)}</td>", _num(b["volume"]), f'<td class="num">{_vec(b["mean_M"])}</td>',
             f'<td class="num">{_vec(b["moment"])}</td>'] for n, b in bodies.items()]
    return "<h2>Bodies</h2>" + _table(["body", "volume (m^3)", "mean M (A/m)", "moment (A m^2)"], rows)


def _vec(v) -> str:
    return "[" + ", ".join(f"{x:.6g}" for x in v) + "]"


def _probes(res) -> str:
    probes = {k: v for k, v in res.get("probes", {}).items() if k != "attrs"}
    if not probes:
        return ""
    rows = []
    for name, p in probes.items():
        B, Ba = np.asarray(p["B"]), np.asarray(p["B_applied"])
        dB = np.linalg.norm(B - Ba, axis=1)
        ref = np.linalg.norm(Ba, axis=1)
        ppm = np.where(ref > 0, 1e6 * dB / np.where(ref > 0, ref, 1.0), np.nan)
        rows.append([f"<td>{_e(name)}</td>", f"<td>{_e(p['attrs'].get('kind', ''))}</td>",
                     f'<td class="num">{len(B)}</td>',
                     f'<td class="num">{_vec(B.mean(axis=0))}</td>',
                     _num(np.linalg.norm(B, axis=1).max()), _num(dB.max()),
                     _num(np.nanmax(ppm)) if np.isfinite(ppm).any() else "<td>-</td>"])
    return ("<h2>Probes</h2>" + _table(["probe", "kind", "points", "mean B (T)", "max |B| (T)",
                                         "max |B - B_applied| (T)", "max distortion (ppm)"], rows)
            + "<p>B_applied is the field of the sources alone; the distortion is |B - B_applied| / "
              "|B_applied|.</p>")


def _expectations(res, summary) -> str:
    if "expect" not in summary:
        return ("<h2>Expectations</h2><p>This results file does not record expectation outcomes "
                f"(written by volmag {_e(res['attrs'].get('volmag_version', '?'))}).</p>")
    exp = summary["expect"]
    if not exp:
        return "<h2>Expectations</h2><p>The case states no expectations.</p>"
    rows = []
    for e in exp:
        tol = " ".join(x for x in (f"rel {e['rel_tol']:g}" if e.get("rel_tol") else "",
                                   f"abs {e['abs_tol']:g}" if e.get("abs_tol") else "") if x)
        got = f"error: {e['error']}" if e.get("error") else f"{e['got']:.6g}"
        verdict = '<span class="pass">pass</span>' if e["ok"] else '<span class="fail">FAIL</span>'
        rows.append([f"<td>{verdict}</td>", f"<td><code>{_e(e['quantity'])}</code></td>",
                     _num(e["value"]), f"<td>{_e(tol)}</td>", f'<td class="num">{_e(got)}</td>'])
    n_ok = sum(bool(e["ok"]) for e in exp)
    return (f"<h2>Expectations</h2><p>{n_ok} of {len(exp)} hold.</p>"
            + _table(["outcome", "quantity", "expected", "tolerance", "got"], rows))


def _solver(res) -> str:
    s = res.get("solver", {})
    a = s.get("attrs", {})
    rows = [[f"<th>{_e(k)}</th>", f"<td>{_e(f'{a[k]:.3g}' if isinstance(a[k], float) else a[k])}</td>"] for k in
            ("method", "unknowns", "iterations", "residual", "seconds", "converged") if k in a]
    return "<h2>Solver</h2>" + _table(["", "value"], rows) if rows else ""


def _mesh(res, summary) -> str:
    lines = [m.get("summary", "") for m in summary.get("mesh", [])] or \
            [str(v) for k, v in res["mesh"]["attrs"].items() if k.startswith("stats_")]
    cells = len(res["mesh"]["cells"])
    return (f"<h2>Mesh</h2><p>{cells} {_e(res['mesh']['attrs'].get('cell_type', ''))} elements, "
            f"{len(res['mesh']['nodes'])} nodes.</p><ul>" + "".join(f"<li>{_e(x)}</li>" for x in lines) + "</ul>")


def _provenance(attrs) -> str:
    rows = [[f"<th>{_e(k[len('provenance_'):])}</th>", f"<td>{_e(v)}</td>"]
            for k, v in attrs.items() if k.startswith("provenance_")]
    return "<h2>Provenance</h2>" + _table(["", ""], rows) if rows else ""
