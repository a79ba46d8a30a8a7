"""Report pages: one self-contained HTML file per part, and an index for a batch.

``part_page`` writes everything into one file that opens from disk with no
network: the vendored three.js (``vendor/``, refreshed by
``scripts/refresh_vendor.sh``) is inlined through an import map of ``data:``
URLs, and the meshes travel as base64 typed arrays.  The page shows

- the part, its supports and the contacts in an interactive 3D view (orbit,
  zoom, preset views including one from below), contacts coloured by their
  safety factor on our own colour scale, failed-check locations marked;
- cured area and separation force per layer against height, with the printer's
  rated force and a hover read-out;
- protected faces shaded in their own colour, contacts moved off them ringed, and
  places that could only be held from protected surface marked; a "Protected
  surfaces" section with the scar budget of the report's ``protection`` section
  (omitted, as in the Markdown, when nothing is protected and no contacts file
  was read);
- the distribution of tip safety factors (and post / side-load factors when the
  report carries them), warnings, check failures, settings, provenance, timings
  and the resin handling cautions.

Every report key is read defensively: a missing key shows "n/a".  The page sets
``document.body.dataset.status`` to ``"ready"`` after its first WebGL frame, or
to ``"error: ..."`` on any uncaught script error, so a headless browser can
tell a working page from a broken one (``tests/test_web.py``).

``batch_index`` writes a batch's ``index.html``: a sortable table of parts.
"""

from __future__ import annotations

import base64
import html
import json
import math
from collections.abc import Iterable
from importlib import metadata, resources
from typing import Any

import numpy as np

from .document import CAUTIONS

__all__ = [
    "part_page",
    "batch_index",
    "sf_colours",
    "encode_mesh",
    "vendor_version",
    "contact_safety",
    "failure_marks",
    "srgb_to_lab",
    "FAIL_COLOUR",
    "PROTECTED_COLOUR",
    "protected_bits",
    "SF_SCALE_MAX",
    "SF_ROUNDING_REL",
    "QUANTISE_ABOVE_BYTES",
]

#: Mesh buffers larger than this (bytes, positions plus indices, before base64)
#: have their positions quantised to uint16 within the bounding box, which keeps
#: a page of a 300k-face part near 5 MB instead of 8 MB.  The step is the box
#: size over 65535: 1.5 um for a 100 mm part, far below any printer's pixel.
QUANTISE_ABOVE_BYTES = 2_000_000

#: Relative slack when classing a contact's safety factor against 1 and the target.
#: Contact records round diameters to 0.1 um and loads to 1 uN, so a factor
#: recomputed from them can sit up to about 6e-4 below the target it was sized to
#: meet exactly (jar lid demo: 1.99888 for a target of 2).  (Belongs with the
#: other tolerances in supportgen/constants.py once that module is on main.)
SF_ROUNDING_REL = 1e-3

#: Safety factors at or above this are drawn in the colour scale's last colour.
SF_SCALE_MAX = 50.0

# Colour scale for safety factors (ours): warm near the limit, cool and dark when
# far above it.  Anchors are interpolated in CIE L*a*b* so lightness falls
# steadily from the target to SF_SCALE_MAX (L* about 89, 66, 45, 18).
_SF_ANCHORS = ("#ffe066", "#3bb273", "#2b6cb0", "#2d1e5f")
FAIL_COLOUR = "#e4002b"  # below 1: the tip tears off
_UNDER_COLOUR = "#ff7f11"  # between 1 and the target
_NA_COLOUR = "#9a9a9a"  # no factor known
_PART_COLOUR = "#e6e1d6"
# Protected faces: reddish purple of the Okabe & Ito colour-blind-safe palette (Okabe and Ito,
# "Color Universal Design", 2008), apart in hue and lightness from the part, the supports, the
# safety ramp and the failure red; contacts moved off them get a ring of a darker shade of it.
PROTECTED_COLOUR = "#cc79a7"
_MOVED_COLOUR = "#6e2a58"
_SUPPORT_COLOUR = "#8d9bab"

_VENDOR_FILES = ("three.core.min.js", "three.module.min.js", "OrbitControls.js")


# --------------------------------------------------------------------------- helpers


def _get(d: Any, *path, default=None):
    """``d[path[0]][path[1]]...`` or ``default`` where any step is missing or not a dict."""
    for key in path:
        if not isinstance(d, dict) or key not in d or d[key] is None:
            return default
        d = d[key]
    return d


def _num(v) -> float | None:
    """A finite float, or None for anything else (missing, text, NaN, inf, bool)."""
    if isinstance(v, bool) or v is None:
        return None
    try:
        f = float(v)
    except (TypeError, ValueError):
        return None
    return f if math.isfinite(f) else None


def _fmt(v, digits: int = 2, unit: str = "") -> str:
    f = _num(v)
    if f is None:
        return "n/a"
    text = f"{f:,.{digits}f}" if abs(f) < 1e6 else f"{f:.3g}"
    return f"{text} {unit}".rstrip()


def _e(v) -> str:
    return html.escape("n/a" if v is None else str(v), quote=True)


def _floats(values) -> np.ndarray:
    """A list of report numbers as a float array (None and text become NaN)."""
    if not isinstance(values, (list, tuple, np.ndarray)):
        return np.zeros(0)
    return np.array([_num(v) if _num(v) is not None else np.nan for v in values], float)


def _json_script(obj) -> str:
    """JSON safe to place inside a <script> element."""
    return json.dumps(obj, separators=(",", ":"), allow_nan=False).replace("</", "<\\/")


def _asset(name: str) -> str:
    return (resources.files(__package__) / "assets" / name).read_text(encoding="utf-8")


def _vendor(name: str) -> str:
    return (resources.files(__package__) / "vendor" / name).read_text(encoding="utf-8")


def vendor_version() -> str:
    """The vendored three.js version, from ``vendor/VERSION`` (first line, "three X.Y.Z")."""
    first = _vendor("VERSION").splitlines()[0].split()
    return first[-1] if first else "unknown"


def _tool_version() -> str:
    try:
        return metadata.version("supportgen")
    except metadata.PackageNotFoundError:
        return "unknown"


# --------------------------------------------------------------------------- colours


def _hex_to_rgb(h: str) -> np.ndarray:
    return np.array([int(h[i : i + 2], 16) for i in (1, 3, 5)], float) / 255.0


def srgb_to_lab(rgb: np.ndarray) -> np.ndarray:
    """sRGB in [0, 1] to CIE L*a*b* (D65), by the IEC 61966-2-1 and CIE 15 formulas."""
    c = np.where(rgb <= 0.04045, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4)
    m = np.array([[0.4124, 0.3576, 0.1805], [0.2126, 0.7152, 0.0722], [0.0193, 0.1192, 0.9505]])
    xyz = c @ m.T / np.array([0.95047, 1.0, 1.08883])
    f = np.where(xyz > (6 / 29) ** 3, np.cbrt(xyz), xyz / (3 * (6 / 29) ** 2) + 4 / 29)
    return np.stack([116 * f[..., 1] - 16, 500 * (f[..., 0] - f[..., 1]), 200 * (f[..., 1] - f[..., 2])], -1)


def _lab_to_srgb(lab: np.ndarray) -> np.ndarray:
    fy = (lab[..., 0] + 16) / 116
    f = np.stack([fy + lab[..., 1] / 500, fy, fy - lab[..., 2] / 200], -1)
    xyz = np.where(f > 6 / 29, f**3, 3 * (6 / 29) ** 2 * (f - 4 / 29)) * np.array([0.95047, 1.0, 1.08883])
    m = np.array([[3.2406, -1.5372, -0.4986], [-0.9689, 1.8758, 0.0415], [0.0557, -0.2040, 1.0570]])
    c = np.clip(xyz @ m.T, 0, 1)
    return np.clip(np.where(c <= 0.0031308, 12.92 * c, 1.055 * c ** (1 / 2.4) - 0.055), 0, 1)


def _ramp(t: np.ndarray) -> np.ndarray:
    """Colours (n, 3) in [0, 1] along the safety ramp at positions t in [0, 1]."""
    lab = srgb_to_lab(np.array([_hex_to_rgb(h) for h in _SF_ANCHORS]))
    x = np.clip(np.asarray(t, float), 0, 1) * (len(lab) - 1)
    k = np.minimum(np.floor(x).astype(int), len(lab) - 2)
    w = (x - k)[:, None]
    return _lab_to_srgb(lab[k] * (1 - w) + lab[k + 1] * w)


def _ramp_position(sf: np.ndarray, target: float) -> np.ndarray:
    lo = max(target, 1.0)
    hi = max(SF_SCALE_MAX, 2 * lo)
    return np.log(np.clip(sf, lo, hi) / lo) / np.log(hi / lo)


def sf_colours(sf, target: float) -> np.ndarray:
    """RGB colours (n, 3) uint8 for safety factors on the report's scale.

    Below 1 is red (the tip tears off), from 1 to the target orange, from the
    target up the ramp on a log scale to ``SF_SCALE_MAX``; NaN is grey.

    Examples
    --------
    >>> sf_colours([0.5, 1.5, float("nan")], 2.0).tolist()
    [[228, 0, 43], [255, 127, 17], [154, 154, 154]]
    """
    sf = np.asarray(sf, float).reshape(-1)
    target = _num(target) or 1.0
    out = _ramp(_ramp_position(np.nan_to_num(sf, nan=target), target))
    slack = 1.0 - SF_ROUNDING_REL
    out[sf < target * slack] = _hex_to_rgb(_UNDER_COLOUR)
    out[sf < slack] = _hex_to_rgb(FAIL_COLOUR)
    out[np.isnan(sf)] = _hex_to_rgb(_NA_COLOUR)
    return np.round(out * 255).astype(np.uint8)


def _css(rgb) -> str:
    r, g, b = (int(v) for v in rgb)
    return f"#{r:02x}{g:02x}{b:02x}"


# --------------------------------------------------------------------------- meshes


def _b64(a: np.ndarray) -> str:
    return base64.b64encode(np.ascontiguousarray(a).tobytes()).decode("ascii")


def encode_mesh(vertices, faces, *, quantise_above: int | None = None) -> dict:
    """A mesh as base64 little-endian buffers for the page: every vertex and face kept.

    Positions are float32, or uint16 steps within the bounding box (``lo + q * step``)
    when the buffers would exceed ``quantise_above`` bytes (default
    :data:`QUANTISE_ABOVE_BYTES`, read at call time); indices are uint16 when
    the vertex count allows, else uint32.

    Examples
    --------
    >>> m = encode_mesh([[0, 0, 0], [2, 0, 0], [0, 4, 1]], [[0, 1, 2]], quantise_above=0)
    >>> m["positions_type"], m["index_type"], m["step"]
    ('uint16', 'uint16', [3.0518043793392844e-05, 6.103608758678569e-05, 1.5259021896696422e-05])
    """
    v = np.asarray(vertices, float).reshape(-1, 3)
    f = np.asarray(faces, np.int64).reshape(-1, 3)
    itype = np.uint16 if len(v) <= 65535 else np.uint32
    out = {
        "vertices": int(len(v)),
        "faces": int(len(f)),
        "index_type": np.dtype(itype).name,
        "index": _b64(f.astype(itype).astype(np.dtype(itype).newbyteorder("<"))),
    }
    raw = v.size * 4 + f.size * np.dtype(itype).itemsize
    if quantise_above is None:
        quantise_above = QUANTISE_ABOVE_BYTES
    if raw > quantise_above and len(v):
        lo, hi = v.min(axis=0), v.max(axis=0)
        step = np.where(hi > lo, (hi - lo) / 65535.0, 1.0)
        q = np.clip(np.round((v - lo) / step), 0, 65535).astype("<u2")
        out.update(positions_type="uint16", positions=_b64(q), lo=lo.tolist(), step=step.tolist())
    else:
        out.update(positions_type="float32", positions=_b64(v.astype("<f4")), lo=[0.0, 0.0, 0.0], step=[1.0, 1.0, 1.0])
    return out


def _mesh_parts(mesh) -> tuple[np.ndarray, np.ndarray]:
    if mesh is None:
        return np.zeros((0, 3)), np.zeros((0, 3), np.int64)
    return np.asarray(mesh.vertices, float), np.asarray(mesh.faces, np.int64)


# --------------------------------------------------------------------------- contacts and failures


def contact_safety(records: Iterable[dict], report: dict) -> dict:
    """Points, diameters and safety factors of the contacts.

    A record's own ``safety_factor`` is used where present; otherwise the factor is
    the tip's tensile capacity over its peak load, capacity = green tensile strength
    x tip cross-section (the sizing rule in ``supports/sizing.py``).
    """
    pts, dia, sf, load = [], [], [], []
    sigma = _num(_get(report, "settings", "resin", "green_tensile_mpa"))
    for r in records or []:
        if not isinstance(r, dict):
            continue
        p = r.get("point")
        if not isinstance(p, (list, tuple)) or len(p) != 3 or any(_num(x) is None for x in p):
            continue
        d = _num(r.get("diameter_mm"))
        f = _num(r.get("load_n"))
        s = _num(r.get("safety_factor"))
        if s is None and sigma is not None and d is not None and f is not None:
            s = math.inf if f <= 0 else sigma * math.pi * d * d / 4.0 / f
        pts.append([float(x) for x in p])
        dia.append(d if d is not None else np.nan)
        sf.append(s if s is not None else np.nan)
        load.append(f if f is not None else np.nan)
    return {
        "points": np.array(pts, float).reshape(-1, 3),
        "diameters": np.array(dia, float),
        "sf": np.array(sf, float),
        "loads": np.array(load, float),
    }


def failure_marks(report: dict) -> list[dict]:
    """Locations of failed checks: islands and specks left in mid-air, reach past the limit, weak tips."""
    out = []
    layer_mm = _num(_get(report, "settings", "printer", "layer_mm")) or 0.0
    ver = _get(report, "verification", default={})
    for kind, key in (("island", "first_islands"), ("speck", "first_specks")):
        for i in _get(ver, key, default=[]) or []:
            xy = _get(i, "xy_mm")
            if not isinstance(xy, (list, tuple)) or len(xy) < 2 or _num(xy[0]) is None or _num(xy[1]) is None:
                continue
            z = _num(_get(i, "z_mm"))
            if z is None and _num(_get(i, "layer")) is not None:
                z = (_num(i["layer"]) + 1) * layer_mm
            out.append(
                {
                    "kind": kind,
                    "xyz": [_num(xy[0]), _num(xy[1]), z or 0.0],
                    "text": f"{kind} starting in mid-air at layer {_get(i, 'layer', default='n/a')}",
                }
            )
    reach, limit = _num(_get(ver, "max_unsupported_reach_mm")), _num(_get(ver, "reach_limit_mm"))
    # Key names of the current report first, then those of reports written before the rename.
    xy = _get(ver, "max_unsupported_reach_xy_mm") or _get(ver, "worst_reach_xy_mm")
    layer_key = "max_unsupported_reach_layer" if "max_unsupported_reach_layer" in ver else "worst_reach_layer"
    if reach is not None and limit is not None and reach > limit and isinstance(xy, (list, tuple)) and len(xy) >= 2:
        layer = _num(_get(ver, layer_key))
        z = (layer + 1) * layer_mm if layer is not None else 0.0
        out.append(
            {
                "kind": "reach",
                "xyz": [_num(xy[0]) or 0.0, _num(xy[1]) or 0.0, z],
                "text": f"layer {_get(ver, layer_key, default='n/a')} reaches {reach:.2f} mm "
                f"past the layer below (limit {limit:g} mm)",
            }
        )
    return out


# --------------------------------------------------------------------------- protected surfaces


def protected_bits(mask, n_faces: int) -> dict | None:
    """A bool mask over the part's faces as the page carries it: ``count`` protected faces,
    ``faces`` in all, ``bits`` (base64 of numpy.packbits, face ``i`` is bit ``7 - i % 8`` of byte
    ``i // 8``).  None when there is no mask or it does not fit the part's faces.

    Examples
    --------
    >>> protected_bits([True, False, True], 3)
    {'count': 2, 'faces': 3, 'bits': 'oA=='}
    >>> protected_bits([True], 3) is None
    True
    """
    if mask is None:
        return None
    m = np.asarray(mask).reshape(-1)
    if m.dtype != bool or len(m) != n_faces:
        return None
    return {"count": int(m.sum()), "faces": int(n_faces), "bits": _b64(np.packbits(m))}


def _num_span(key: str, v, digits: int | None = None) -> str:
    """A figure of the protection section, tagged with its key so a test can read it back."""
    if isinstance(v, bool) or v is None:
        text = "n/a"
    elif digits is None:
        text = str(v)
    else:
        f = _num(v)
        text = "n/a" if f is None else f"{f:.{digits}f}"
    return f'<span class="num" data-key="{_e(key)}">{_e(text)}</span>'


def _xyz_text(v) -> str:
    if not isinstance(v, (list, tuple)) or len(v) != 3 or any(_num(c) is None for c in v):
        return "n/a"
    return ", ".join(f"{float(c):.2f}" for c in v)


def _protection_html(section) -> str:
    """The "Protected surfaces" card: the numbers of the report's ``protection`` section, laid out as
    the Markdown's (``document.protection_markdown``); "" when nothing is protected and no contacts
    file was read (the Markdown omits the section then too)."""
    if not isinstance(section, dict) or (not section.get("protected_faces") and not section.get("contacts_file")):
        return ""
    parts = []
    if section.get("protected_faces"):
        sel = ", ".join(f"<code>{_e(x)}</code>" for x in section.get("selectors") or []) or "given faces"
        surf = section.get("protected_surface_mm2", section.get("protected_area_mm2"))
        parts.append(
            f'<p><i class="swatch" style="background:{PROTECTED_COLOUR}"></i>Protected: '
            f"{_num_span('protected_faces', section.get('protected_faces'))} faces, "
            f"{_num_span('protected_surface_mm2', surf, 3)} mm² ({sel}); no tip or landing within "
            f"{_num_span('keep_off_mm', section.get('keep_off_mm'), 3)} mm of them.</p>"
            '<p class="note">Scar budget: a tip counts for a region when its disc reaches it; every protected '
            "region must show 0.</p>"
        )
        rows = []
        for k, r in enumerate(section.get("regions") or []):
            if not isinstance(r, dict):
                continue
            p = f"regions.{k}."
            bad = (_num(r.get("contacts")) or 0) + (_num(r.get("landings")) or 0) > 0
            rows.append(
                f'<tr data-row="region-{k}"{" class=bad" if bad else ""}><td>region {_e(r.get("region"))}</td>'
                f'<td class="num">{_num_span(p + "faces", r.get("faces"))}</td>'
                f'<td class="num">{_num_span(p + "area_mm2", r.get("area_mm2"), 3)}</td>'
                f"<td>{_e(_xyz_text(r.get('centre_mm')))}</td>"
                f'<td class="num">{_num_span(p + "contacts", r.get("contacts"))}</td>'
                f'<td class="num">{_num_span(p + "tip_area_mm2", r.get("tip_area_mm2"), 4)}</td>'
                f'<td class="num">{_num_span(p + "landings", r.get("landings"))}</td></tr>'
            )
        rest = section.get("rest") if isinstance(section.get("rest"), dict) else {}
        rows.append(
            '<tr data-row="rest"><td>rest of the part</td><td></td><td></td><td></td>'
            f'<td class="num">{_num_span("rest.contacts", rest.get("contacts"))}</td>'
            f'<td class="num">{_num_span("rest.tip_area_mm2", rest.get("tip_area_mm2"), 4)}</td>'
            f'<td class="num">{_num_span("rest.landings", rest.get("landings"))}</td></tr>'
        )
        parts.append(
            '<table id="scar-budget" class="grid-table compact"><thead><tr><th>where</th><th class="num">faces</th>'
            '<th class="num">area (mm²)</th><th>centre x, y, z (mm, input)</th><th class="num">contacts</th>'
            f'<th class="num">tip area (mm²)</th><th class="num">landings</th></tr></thead><tbody>{"".join(rows)}'
            "</tbody></table>"
        )
        moved_to = section.get("moved_to_mm") or []
        where = (
            f' <span class="na">(now at {"; ".join(_e(_xyz_text(p)) for p in moved_to)} mm, input; ringed in '
            f'<i class="swatch ring" style="border-color:{_MOVED_COLOUR}"></i>in the 3D view)</span>'
            if moved_to
            else ""
        )
        unholdable = [u for u in section.get("unholdable") or [] if isinstance(u, dict)]
        items = [
            f"<li>contacts on protected faces: {_num_span('contacts_on_protected', section.get('contacts_on_protected'))}"
            f"; landings on protected faces: {_num_span('landings_on_protected', section.get('landings_on_protected'))}"
            "</li>",
            f"<li>contacts moved off protected faces: {_num_span('contacts_moved', section.get('contacts_moved'))} "
            f"(merged after moving: {_num_span('contacts_merged_after_moving', section.get('contacts_merged_after_moving'))})"
            f"{where}</li>",
            "<li>landings avoided (posts the same contacts would stand on protected faces without the keep-off): "
            f"{_num_span('landings_avoided', section.get('landings_avoided'))}</li>",
            f'<li>could only be held from protected surface: <span class="num" data-key="unholdable">'
            f"{len(unholdable)}</span></li>",
        ]
        parts.append(f'<ul id="protection-figures" class="plain">{"".join(items)}</ul>')
        if unholdable:
            lis = []
            for k, u in enumerate(unholdable):
                rot = u.get("suggested_rotation") if isinstance(u.get("suggested_rotation"), dict) else {}
                lis.append(
                    f'<li class="failure"><span class="tag prot">protected only</span> at '
                    f"{_e(_xyz_text(u.get('point_mm')))} mm (input), region {_e(u.get('region'))}: turn "
                    f"{_e(rot.get('angle_deg'))} degrees about ({_e(_xyz_text(rot.get('axis')))}) "
                    f'<button class="link" data-focus-prot="{k}">show in 3D</button></li>'
                )
            parts.append(f'<ul id="unholdable" class="warnings">{"".join(lis)}</ul>')
    info = section.get("contacts_file")
    if isinstance(info, dict):
        parts.append(
            f'<p id="contacts-file">Contacts file <code>{_e(info.get("path"))}</code>: '
            f"{_num_span('contacts_file.rows', info.get('rows'))} rows "
            f"({_num_span('contacts_file.locked', info.get('locked'))} locked) used instead of generated contacts; "
            f"the check added {_num_span('contacts_file.added_by_check', info.get('added_by_check', 0))}.</p>"
        )
    for note in section.get("notes") or []:
        parts.append(f'<p class="note">{_e(note)}</p>')
    return f'<section class="card" id="protection"><h2>Protected surfaces</h2>{"".join(parts)}</section>'


# --------------------------------------------------------------------------- SVG charts


def _nice_ticks(lo: float, hi: float, n: int = 5) -> list[float]:
    """Round tick values covering [lo, hi] (steps of 1, 2 or 5 times a power of ten)."""
    if not (math.isfinite(lo) and math.isfinite(hi)) or hi <= lo:
        return [lo]
    raw = (hi - lo) / n
    mag = 10 ** math.floor(math.log10(raw))
    step = next(m * mag for m in (1, 2, 5, 10) if m * mag >= raw)
    start = math.ceil(lo / step - 1e-9) * step
    return [round(start + k * step, 10) for k in range(int((hi - start) / step + 1e-9) + 1)]


def _tick_label(v: float) -> str:
    return f"{v:g}" if abs(v) < 1e5 else f"{v:.0e}"


def _layer_series(report: dict) -> dict | None:
    area = _floats(_get(report, "forces", "layer_area_mm2") or _get(report, "layers", "area_mm2"))
    force = _floats(_get(report, "forces", "layer_force_n"))
    unheld = _floats(_get(report, "forces", "unheld_force_n"))
    n = max(len(area), len(force))
    if n == 0:
        return None
    z = _floats(_get(report, "layers", "z_mm"))
    if len(z) != n:
        layer_mm = _num(_get(report, "settings", "printer", "layer_mm")) or 1.0
        z = (np.arange(n) + 1) * layer_mm

    def pad(a):
        return np.concatenate([a, np.full(n - len(a), np.nan)]) if len(a) < n else a[:n]

    return {"z": z, "area": pad(area), "force": pad(force), "unheld": pad(unheld)}


def _layer_plot(report: dict) -> tuple[str, dict]:
    """SVG of cured area and separation force against height, and the data its hover read-out uses."""
    s = _layer_series(report)
    if s is None:
        return '<p class="na" id="layer-plot">No per-layer record in this report (n/a).</p>', {}
    rated = _num(_get(report, "settings", "printer", "rated_force_n"))
    W, H, L, R, T, B, GAP = 720, 400, 64, 16, 12, 36, 26
    ph = (H - T - B - GAP) / 2
    z = s["z"]
    zlo, zhi = 0.0, float(np.nanmax(z)) if np.isfinite(z).any() else 1.0
    zhi = zhi if zhi > zlo else zlo + 1

    def x_of(v):
        return L + (v - zlo) / (zhi - zlo) * (W - L - R)

    panels, note = [], ""
    fmax = float(np.nanmax(s["force"])) if np.isfinite(s["force"]).any() else 0.0
    ftop = fmax * 1.12 or 1.0
    show_rated = rated is not None and rated > 0 and fmax >= 0.25 * rated
    if show_rated:
        ftop = max(ftop, rated * 1.08)
    elif rated:
        note = (
            f"The printer's rated force, {rated:g} N, is off this scale: the peak is {100 * fmax / rated:.0f} % of it."
        )
    amax = float(np.nanmax(s["area"])) if np.isfinite(s["area"]).any() else 0.0
    for k, (key, label, colour, top) in enumerate(
        (
            ("area", "cured area (mm²)", "#2f6690", amax * 1.12 or 1.0),
            ("force", "separation force (N)", "#c0392b", ftop),
        )
    ):
        y0 = T + k * (ph + GAP)
        y = s[key]
        ok = np.isfinite(y)
        grid = []
        for t in _nice_ticks(0.0, top):
            yy = y0 + ph - t / top * ph
            grid.append(
                f'<line class="grid" x1="{L}" x2="{W - R}" y1="{yy:.1f}" y2="{yy:.1f}"/>'
                f'<text class="tick" x="{L - 6}" y="{yy + 4:.1f}" text-anchor="end">{_tick_label(t)}</text>'
            )
        pts = " ".join(f"{x_of(zz):.1f},{y0 + ph - yy / top * ph:.1f}" for zz, yy in zip(z[ok], y[ok]))
        line = f'<polyline class="series" fill="none" stroke="{colour}" stroke-width="1.5" points="{pts}"/>'
        extra = ""
        if key == "force" and show_rated:
            yy = y0 + ph - rated / top * ph
            extra = (
                f'<line class="rated" x1="{L}" x2="{W - R}" y1="{yy:.1f}" y2="{yy:.1f}"/>'
                f'<text class="rated-label" x="{W - R - 4}" y="{yy - 5:.1f}" text-anchor="end">'
                f"printer's rated force {rated:g} N</text>"
            )
        panels.append(
            f'<g class="panel" data-key="{key}" data-top="{top:.6g}" data-y0="{y0:.1f}" data-h="{ph:.1f}">'
            f'<rect class="frame" x="{L}" y="{y0:.1f}" width="{W - L - R}" height="{ph:.1f}"/>'
            + "".join(grid)
            + line
            + extra
            + f'<text class="axis-label" transform="translate(14 {y0 + ph / 2:.1f}) rotate(-90)" '
            f'text-anchor="middle">{label}</text></g>'
        )
    xt = "".join(
        f'<text class="tick" x="{x_of(t):.1f}" y="{H - B + 16}" text-anchor="middle">{_tick_label(t)}</text>'
        for t in _nice_ticks(zlo, zhi, 8)
    )
    svg = (
        f'<svg id="layer-plot" viewBox="0 0 {W} {H}" role="img" aria-label="cured area and separation force '
        f'per layer against height" data-left="{L}" data-right="{W - R}" data-zlo="{zlo}" data-zhi="{zhi:.6g}">'
        + "".join(panels)
        + xt
        + f'<text class="axis-label" x="{(L + W - R) / 2}" y="{H - 4}" text-anchor="middle">'
        "height above the plate (mm)</text>"
        f'<line id="hover-line" class="hover" x1="0" x2="0" y1="{T}" y2="{H - B}" visibility="hidden"/></svg>'
    )
    data = {
        k: [None if not np.isfinite(v) else round(float(v), 5) for v in s[k]] for k in ("z", "area", "force", "unheld")
    }
    return svg + (f'<p class="note">{_e(note)}</p>' if note else ""), data


def _histogram(values: np.ndarray, target: float | None, title: str, element_id: str) -> str:
    """SVG histogram of safety factors on log-spaced bins; bars coloured on the page's scale."""
    v = values[~np.isnan(values)]
    if len(v) == 0:
        return (
            f'<div class="hist" id="{element_id}"><h3>{_e(title)}</h3><p class="na">n/a: none in this report</p></div>'
        )
    edges = np.concatenate([[0.0], np.geomspace(1.0, 100.0, 21), [np.inf]])
    counts = np.histogram(np.minimum(v, 1e300), bins=edges)[0]
    W, H, L, R, T, B = 340, 190, 40, 10, 10, 40
    n = len(counts)
    bw = (W - L - R) / n
    top = max(int(counts.max()), 1)
    mid = np.concatenate([[0.5], np.sqrt(edges[1:-2] * edges[2:-1]), [200.0]])
    colours = sf_colours(mid, target or 1.0)
    bars = []
    for k, c in enumerate(counts):
        h = c / top * (H - T - B)
        lo_txt = (
            "below 1"
            if k == 0
            else f"{edges[k]:.3g} and above"
            if k == n - 1
            else f"{edges[k]:.3g} to {edges[k + 1]:.3g}"
        )
        bars.append(
            f'<rect x="{L + k * bw + 0.5:.1f}" y="{H - B - h:.1f}" width="{bw - 1:.1f}" height="{h:.1f}" '
            f'fill="{_css(colours[k])}"><title>{c} with safety factor {lo_txt}</title></rect>'
        )

    def x_of(sf):
        return L + bw + (math.log10(sf) / 2.0) * (bw * (n - 2))

    ticks = "".join(
        f'<text class="tick" x="{x_of(t):.1f}" y="{H - B + 14}" text-anchor="middle">{t:g}</text>'
        for t in (2, 5, 10, 20, 50, 100)
    )
    ticks += f'<text class="tick" x="{L + bw / 2:.1f}" y="{H - B + 14}" text-anchor="middle">&lt;1</text>'
    tline = ""
    if target and 1.0 <= target <= 100.0:
        tx = x_of(target)
        tline = (
            f'<line class="rated" x1="{tx:.1f}" x2="{tx:.1f}" y1="{T}" y2="{H - B}"/>'
            f'<text class="rated-label" x="{tx + 4:.1f}" y="{T + 10}">target {target:g}</text>'
        )
    yt = "".join(
        f'<text class="tick" x="{L - 5}" y="{H - B - t / top * (H - T - B) + 4:.1f}" text-anchor="end">{t:g}</text>'
        for t in _nice_ticks(0, top, 4)
        if t == int(t)
    )
    stats = (
        f"{len(v)} values; lowest {np.min(v):.3g}, median {np.median(v):.3g}; "
        f"{int(np.sum(v < (target or 1.0) * (1 - SF_ROUNDING_REL)))} below the target"
    )
    return (
        f'<div class="hist" id="{element_id}"><h3>{_e(title)}</h3>'
        f'<svg viewBox="0 0 {W} {H}" role="img" aria-label="{_e(title)}">'
        f'<line class="axis" x1="{L}" x2="{W - R}" y1="{H - B}" y2="{H - B}"/>'
        + "".join(bars)
        + ticks
        + yt
        + tline
        + f'<text class="axis-label" x="{(L + W - R) / 2}" y="{H - 6}" text-anchor="middle">'
        f'safety factor (capacity / peak load, log scale)</text></svg><p class="stats">{_e(stats)}</p></div>'
    )


def _legend(target: float, protected: int = 0, moved: int = 0, unholdable: int = 0) -> str:
    stops = np.linspace(0, 1, 9)
    grad = ", ".join(f"{_css(c)} {100 * t:.0f}%" for c, t in zip(np.round(_ramp(stops) * 255).astype(int), stops))
    lo = max(target, 1.0)
    hi = max(SF_SCALE_MAX, 2 * lo)
    ticks = [t for t in (lo, 5, 10, 20, hi) if lo <= t <= hi]
    ticks = sorted(set(ticks))
    marks = "".join(f'<span style="left:{100 * math.log(t / lo) / math.log(hi / lo):.1f}%">{t:g}</span>' for t in ticks)
    return (
        f'<div id="legend" class="legend"><div class="legend-title">Contact safety factor</div>'
        f'<div class="ramp" style="background: linear-gradient(to right, {grad})"></div>'
        f'<div class="ramp-ticks">{marks}</div>'
        f'<div class="swatches"><span><i style="background:{FAIL_COLOUR}"></i>below 1: fails</span>'
        f'<span><i style="background:{_UNDER_COLOUR}"></i>1 to target {target:g}</span>'
        f'<span><i style="background:{_NA_COLOUR}"></i>n/a</span></div>'
        f'<div class="swatches"><span><i style="background:{_PART_COLOUR}"></i>part</span>'
        f'<span><i style="background:{_SUPPORT_COLOUR}"></i>supports and base</span>'
        f'<span><i class="ring"></i>failed check</span></div>{_protected_legend(protected, moved, unholdable)}</div>'
    )


def _protected_legend(protected: int, moved: int, unholdable: int) -> str:
    if not (protected or moved or unholdable):
        return ""
    items = []
    if protected:
        items.append(
            f'<span id="legend-protected"><i style="background:{PROTECTED_COLOUR}"></i>protected faces ({protected})</span>'
        )
    if moved:
        items.append(
            f'<span id="legend-moved"><i class="ring" style="border-color:{_MOVED_COLOUR}"></i>'
            f"contact moved off a protected face ({moved})</span>"
        )
    if unholdable:
        items.append(
            f'<span id="legend-unholdable"><i class="ring" style="border-color:{PROTECTED_COLOUR}"></i>'
            f"held only from protected surface ({unholdable})</span>"
        )
    return f'<div class="swatches">{"".join(items)}</div>'


# --------------------------------------------------------------------------- tables


def _table(rows: list[tuple[str, str]], element_id: str | None = None, cls: str = "kv") -> str:
    attr = f' id="{element_id}"' if element_id else ""
    body = "".join(f"<tr><th>{_e(k)}</th><td>{v}</td></tr>" for k, v in rows)
    return f'<table{attr} class="{cls}">{body}</table>'


def _flat(d: Any, prefix: str = "") -> list[tuple[str, str]]:
    if not isinstance(d, dict):
        return [(prefix or "value", _e(d))]
    out = []
    for k in sorted(d):
        v = d[k]
        key = f"{prefix}.{k}" if prefix else str(k)
        if isinstance(v, dict):
            out += _flat(v, key)
        elif isinstance(v, (list, tuple)):
            out.append((key, _e(", ".join(str(x) for x in v) if len(v) <= 12 else f"{len(v)} values")))
        elif isinstance(v, float):
            out.append((key, _e(f"{v:g}")))
        else:
            out.append((key, _e(v)))
    return out


def _cautions_html() -> str:
    lines = CAUTIONS.strip().splitlines()
    intro = lines[0] if lines and not lines[0].startswith("-") else ""
    items, cur = [], None
    for line in lines[1 if intro else 0 :]:
        if line.startswith("- "):
            cur = [line[2:].strip()]
            items.append(cur)
        elif cur is not None and line.strip():
            cur.append(line.strip())
    lis = "".join(f"<li>{_e(' '.join(i))}</li>" for i in items)
    return (
        f'<section id="cautions" class="card cautions"><h2>Handling cautions</h2><p>{_e(intro)}</p>'
        f"<ul>{lis}</ul></section>"
    )


def _verdict(report: dict) -> tuple[str, str]:
    passed = _get(report, "verification", "passed")
    if passed is True:
        return "passes the print check", "pass"
    if passed is False:
        return "does not pass the print check", "fail"
    return "print check: n/a", "unknown"


def _page(title: str, body: str, script: str, head_extra: str = "") -> str:
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f'<meta name="generator" content="supportgen {_e(_tool_version())}">'
        f"<title>{_e(title)}</title><style>{_asset('page.css')}</style>"
        # Status for headless checks: any uncaught error or console.error marks the page.
        "<script>(function(){var b=function(){return document.body};"
        "function fail(m){var d=b();if(d&&!(d.dataset.status||'').startsWith('error'))d.dataset.status='error: '+m;"
        "window.__pageErrors=(window.__pageErrors||[]).concat([String(m)]);}"
        "window.addEventListener('error',function(e){fail(e.message||"
        "('failed to load '+((e.target&&e.target.src)||'a resource')))},true);"
        "window.addEventListener('unhandledrejection',function(e){fail(e.reason&&e.reason.message||String(e.reason))});"
        "var ce=console.error;console.error=function(){fail(Array.prototype.join.call(arguments,' '));"
        "return ce.apply(console,arguments)};})();</script>"
        f'{head_extra}</head><body data-status="loading">{body}{script}</body></html>\n'
    )


# --------------------------------------------------------------------------- the part page


def _importmap() -> str:
    """An import map of data: URLs for three.js and its orbit controls (works from file://)."""
    core = _vendor("three.core.min.js")
    module = _vendor("three.module.min.js")
    if 'from"./three.core.min.js"' not in module:
        raise RuntimeError(
            "supportgen/report/vendor/three.module.min.js does not import ./three.core.min.js as "
            "expected; run scripts/refresh_vendor.sh to restore the pinned version"
        )
    module = module.replace('from"./three.core.min.js"', 'from"three/core"')
    controls = _vendor("OrbitControls.js")

    def url(js):
        return "data:text/javascript;base64," + base64.b64encode(js.encode("utf-8")).decode("ascii")

    imports = {"three/core": url(core), "three": url(module), "three/addons/controls/OrbitControls.js": url(controls)}
    return f'<script type="importmap">{_json_script({"imports": imports})}</script>'


def part_page(
    report: dict, combined, supports, part, contacts_records: list[dict], *, protected=None, offset=None
) -> str:
    """One self-contained HTML page for a part's report (see the module notes).

    Parameters
    ----------
    report : dict
        The run's report (the same dict as ``NAME.report.json``); missing keys show "n/a".
    combined, supports, part : trimesh.Trimesh
        The supported part, the supports with their base, and the placed part alone.
    contacts_records : list of dict
        ``Contacts.to_records()``: point, diameter_mm, load_n (and safety_factor if known).
    protected : (len(part.faces),) bool array, optional
        The run's protected faces of ``part`` (``Guard.faces``), shaded in the 3D view; a mask
        that does not fit ``part`` is not drawn.
    offset : (3,) array, optional
        Input to build coordinates (``Guard.offset``): places the moved contacts and the places
        held only from protected surface, which the report records in input coordinates.
    """
    report = report if isinstance(report, dict) else {}
    name = _get(report, "input", "name", default="part")
    target = (
        _num(_get(report, "forces", "target_safety_factor"))
        or _num(_get(report, "settings", "rules", "safety_factor"))
        or _num(_get(report, "settings", "supports", "safety_factor"))
        or 1.0
    )
    verdict, vclass = _verdict(report)

    # 3D scene data
    pv, pf = _mesh_parts(part)
    sv, sf_ = _mesh_parts(supports)
    both = [a for a in (pv, sv) if len(a)]
    cv, _ = _mesh_parts(combined)
    if len(cv):
        both.append(cv)
    allv = np.concatenate(both) if both else np.zeros((1, 3))
    lo, hi = allv.min(axis=0), allv.max(axis=0)
    c = contact_safety(contacts_records, report)
    colours = sf_colours(c["sf"], target)
    fails = failure_marks(report)
    prot = _get(report, "protection", default={})
    prot = prot if isinstance(prot, dict) else {}
    shift = np.zeros(3)
    if offset is not None and np.asarray(offset).shape == (3,) and np.isfinite(np.asarray(offset, float)).all():
        shift = np.asarray(offset, float)

    def build_xyz(p):
        ok = isinstance(p, (list, tuple)) and len(p) == 3 and all(_num(v) is not None for v in p)
        return (np.asarray(p, float) + shift).tolist() if ok and offset is not None else None

    moved_xyz = [q for q in (build_xyz(p) for p in prot.get("moved_to_mm") or []) if q is not None]
    unholdable = [u for u in prot.get("unholdable") or [] if isinstance(u, dict)]
    unheld_xyz = [build_xyz(u.get("point_mm")) for u in unholdable]
    scene = {
        "part": encode_mesh(pv, pf),
        "supports": encode_mesh(sv, sf_),
        "bounds": [lo.tolist(), hi.tolist()],
        "contacts": {
            "count": int(len(c["points"])),
            "points": _b64(c["points"].astype("<f4")),
            "diameters": _b64(np.nan_to_num(c["diameters"], nan=0.0).astype("<f4")),
            "colours": _b64(colours),
        },
        "failures": fails,
        "protected": protected_bits(protected, len(pf)),
        "moved": moved_xyz,
        "unholdable": unheld_xyz,
        "colours": {
            "part": _PART_COLOUR,
            "supports": _SUPPORT_COLOUR,
            "fail": FAIL_COLOUR,
            "protected": PROTECTED_COLOUR,
            "moved": _MOVED_COLOUR,
        },
        "plate": [_num(_get(report, "settings", "printer", k)) for k in ("build_x_mm", "build_y_mm")],
    }
    plot_svg, plot_data = _layer_plot(report)
    n_protected = scene["protected"]["count"] if scene["protected"] else 0

    sup = _get(report, "supports", default={})
    frc = _get(report, "forces", default={})
    est = _get(report, "estimates", default={})
    ver = _get(report, "verification", default={})
    rated = _num(_get(report, "settings", "printer", "rated_force_n"))
    peak = _num(_get(frc, "peak_layer_force_n"))
    tip_sf = _floats(_get(sup, "tips", "safety_factor"))
    min_tip = _num(_get(frc, "min_tip_safety_factor"))
    if min_tip is None and np.isfinite(tip_sf).any():
        min_tip = float(np.nanmin(tip_sf))
    c_sf = c["sf"][np.isfinite(c["sf"])]
    cards = [
        (
            "contacts",
            _e(_get(sup, "contacts", default=len(c["points"]) or None)),
            f"{_e(_get(sup, 'landings', default='n/a'))} posts land on the part",
        ),
        (
            "peak separation force",
            _e(_fmt(peak, 2, "N")),
            f"{_fmt(100 * peak / rated, 0)} % of the rated {rated:g} N"
            if peak is not None and rated
            else "rated force n/a",
        ),
        ("lowest tip safety factor", _e(_fmt(min_tip, 2)), f"target {target:g}"),
        ("lowest post safety factor", _e(_fmt(_get(frc, "min_post_safety_factor"), 2)), f"target {target:g}"),
        (
            "support volume",
            _e(_fmt(_get(sup, "volume_mm3"), 0, "mm³")),
            f"base {_fmt(_get(sup, 'base_volume_mm3'), 0, 'mm³')}",
        ),
        (
            "print time, resin",
            _e(_fmt((_num(_get(est, "print_time_s")) or math.nan) / 3600, 2, "h")),
            f"{_fmt(_get(est, 'resin_ml'), 1, 'ml')}, {_fmt(_get(est, 'layers'), 0)} layers",
        ),
    ]
    cards_html = "".join(
        f'<div class="fig"><div class="fig-label">{_e(k)}</div><div class="fig-value">{v}</div>'
        f'<div class="fig-sub">{_e(sub)}</div></div>'
        for k, v, sub in cards
    )

    # check failures and warnings
    items = []
    for f in _get(ver, "failures", default=[]) or []:
        items.append(f'<li class="failure"><span class="tag fail">check failed</span> {_e(f)}</li>')
    for k, f in enumerate(fails):
        x, y, z = f["xyz"]
        items.append(
            f'<li class="failure"><span class="tag fail">{_e(f["kind"])}</span> {_e(f["text"])} at x {x:.2f}, '
            f'y {y:.2f}, z {z:.2f} mm <button class="link" data-focus="{k}">show in 3D</button></li>'
        )
    for w in _get(report, "warnings", default=[]) or []:
        code = _get(w, "code", default="note") if isinstance(w, dict) else "note"
        msg = _get(w, "message", default="n/a") if isinstance(w, dict) else w
        items.append(f'<li><span class="tag warn">{_e(code)}</span> {_e(msg)}</li>')
    n_contacts_fail = int(np.sum(c_sf < 1.0 - SF_ROUNDING_REL))
    if n_contacts_fail:
        items.append(
            f'<li class="failure"><span class="tag fail">weak tips</span> {n_contacts_fail} contact(s) '
            "have a safety factor below 1 (red in the 3D view)</li>"
        )
    warnings_html = (
        f'<ul class="warnings">{"".join(items)}</ul>'
        if items
        else '<p class="ok-note">No warnings and no failed checks.</p>'
    )

    # distributions: tips always; posts and side loads where the report carries them
    hists = [_histogram(tip_sf, target, "Tip safety factors", "sf-hist")]
    for label, path, hid in (
        ("Post safety factors", ("supports", "posts", "safety_factor"), "post-hist"),
        ("Side-load safety factors", ("supports", "side_loads", "safety_factor"), "side-hist"),
    ):
        vals = _floats(_get(report, *path))
        if len(vals):
            hists.append(_histogram(vals, target, label, hid))
    if len(hists) == 1:
        hists.append(
            f'<div class="hist" id="post-hist"><h3>Post safety factors</h3><p class="na">Only the lowest is '
            f"recorded: {_e(_fmt(_get(frc, 'min_post_safety_factor'), 2))} (target {target:g}).</p></div>"
        )

    # provenance
    prov = _get(report, "provenance", default={}) or {}
    inp = _get(report, "input", default={})
    prov_rows = [
        ("part", _e(name)),
        ("input file", _e(_get(inp, "path"))),
        ("input hash", _e(_get(prov, "input_sha256") or _get(inp, "sha256"))),
        ("input faces, volume", f"{_e(_get(inp, 'faces'))}, {_e(_fmt(_get(inp, 'volume_mm3'), 1, 'mm³'))}"),
        ("repairs", _e("; ".join(map(str, _get(inp, "repairs", default=[]) or [])) or "none")),
        ("strategy", _e(_get(sup, "strategy"))),
        ("tool version (run)", _e(_get(prov, "tool_version") or _get(prov, "version"))),
        ("run time", _e(_get(prov, "time") or _get(prov, "created"))),
        ("settings digest", _e(_get(prov, "settings_digest"))),
        ("page written by", _e(f"supportgen {_tool_version()}, three.js {vendor_version()} (MIT licence)")),
    ]
    for k, v in sorted(prov.items()):
        if k not in ("input_sha256", "tool_version", "version", "time", "created", "settings_digest"):
            prov_rows.append((str(k), _e(v)))
    timing = _get(report, "timing_s", default={}) or {}
    timing_rows = [(k, _e(_fmt(v, 2, "s"))) for k, v in sorted(timing.items(), key=lambda kv: str(kv[0]))]

    timing_html = _table(timing_rows, "timing") if timing_rows else '<p class="na" id="timing">n/a</p>'
    settings = _get(report, "settings", default={})
    settings_html = (
        _table(_flat(settings), "settings")
        if isinstance(settings, dict) and settings
        else '<p class="na" id="settings">n/a</p>'
    )
    contact_note = (
        f"{len(c_sf)} contacts with a known factor; lowest {np.min(c_sf):.3g}"
        if len(c_sf)
        else "contact safety factors: n/a"
    )
    tog_protected = (
        '\n      <label><input id="tog-protected" type="checkbox" checked> protected faces</label>'
        if n_protected
        else ""
    )
    body = f"""
<header class="top"><div><div class="kicker">supportgen report</div><h1 id="title">{_e(name)}</h1></div>
<div id="verdict" class="verdict {vclass}">{_e(verdict)}</div></header>
<main>
<section class="viewer-row">
  <div class="card viewer">
    <div id="view3d" class="view3d" tabindex="0" aria-label="3D view of the part on its supports"></div>
    <div class="view-tools">
      <button id="btn-iso" type="button">Three-quarter view</button>
      <button id="btn-below" type="button">View from below</button>
      <button id="btn-side" type="button">Side view</button>
      <button id="btn-top" type="button">Top view</button>
      <label><input id="tog-part" type="checkbox" checked> part</label>
      <label><input id="tog-supports" type="checkbox" checked> supports</label>
      <label><input id="tog-contacts" type="checkbox" checked> contacts</label>
      <label><input id="tog-xray" type="checkbox"> see-through supports</label>{tog_protected}
    </div>
    <div class="hint">Drag to orbit, scroll to zoom, right-drag to pan. Grid: 10 mm squares on the build plate.</div>
  </div>
  <aside class="side"><div id="figures" class="figures">{cards_html}</div>{_legend(target, n_protected, len(moved_xyz), len(unholdable))}
    <div class="contact-stats">{_e(contact_note)}</div>
  </aside>
</section>
<section class="card" id="layers-card"><h2>Area and separation force per layer</h2>
  <div class="plot-wrap">{plot_svg}
    <div id="readout" class="readout">Hover over the plot to read a layer.</div></div></section>
<section class="card"><h2>Safety factor distributions</h2><div class="hists">{"".join(hists)}</div></section>
<section class="card" id="warnings"><h2>Warnings and checks</h2>{warnings_html}</section>
{_protection_html(prot)}
<section class="two">
  <div class="card"><h2>Provenance</h2>{_table(prov_rows, "provenance")}<h3>Time per stage</h3>{timing_html}</div>
  <div class="card"><h2>Settings</h2>{settings_html}</div>
</section>
{_cautions_html()}
</main>
<footer>Generated by supportgen {_e(_tool_version())}. Figures come from the model in the report;
they are estimates, not measurements.</footer>
<script type="application/json" id="scene-data">{_json_script(scene)}</script>
<script type="application/json" id="plot-data">{_json_script(plot_data)}</script>
"""
    script = f'<script type="module">{_asset("part.js")}</script>'
    return _page(f"{name}: supportgen report", body, script, _importmap())


# --------------------------------------------------------------------------- the batch index

_STATUS_CLASS = {
    "ok": "pass",
    "failed-check": "fail",
    "error": "fail",
    "refused": "warn",
    "timeout": "warn",
}


def batch_index(rows: list[dict], title: str = "Batch", totals_line: str | None = None) -> str:
    """A batch's ``index.html``: one sortable row per part, linking its page.

    Each row may carry ``name``, ``page`` (a link, relative to the index), ``status``,
    ``reason``, ``peak_force_n``, ``contacts``, ``volume_mm3`` (support volume) and
    ``time_s``; anything missing shows "n/a".  Click a column heading to sort.
    ``totals_line`` (the batch's counts, resin and print time) replaces the counts
    the header shows otherwise.
    """
    cols = (
        ("name", "part", None),
        ("status", "status", None),
        ("peak_force_n", "peak force (N)", 2),
        ("contacts", "contacts", 0),
        ("volume_mm3", "support volume (mm³)", 0),
        ("time_s", "time (s)", 1),
    )
    body_rows = []
    counts: dict[str, int] = {}
    for r in rows or []:
        r = r if isinstance(r, dict) else {}
        status = str(r.get("status") or "n/a")
        counts[status] = counts.get(status, 0) + 1
        cells = []
        for key, _, digits in cols:
            v = r.get(key)
            if key == "name":
                label = _e(v if v is not None else "n/a")
                page = r.get("page")
                inner = f'<a href="{_e(page)}">{label}</a>' if page else label
                cells.append(f'<td data-sort="{label.lower()}">{inner}</td>')
            elif key == "status":
                reason = r.get("reason")
                cls = _STATUS_CLASS.get(status, "na")
                rtxt = f'<div class="reason">{_e(reason)}</div>' if reason else ""
                cells.append(f'<td data-sort="{_e(status)}"><span class="chip {cls}">{_e(status)}</span>{rtxt}</td>')
            else:
                f = _num(v)
                cells.append(f'<td class="num" data-sort="{"" if f is None else repr(f)}">{_e(_fmt(f, digits))}</td>')
        body_rows.append("<tr>" + "".join(cells) + "</tr>")
    head = "".join(
        f'<th data-col="{k}" data-type="{"text" if d is None else "num"}" tabindex="0">{_e(lab)}'
        f'<span class="arrow"></span></th>'
        for k, (_, lab, d) in enumerate(cols)
    )
    summary = ", ".join(f"{n} {_e(s)}" for s, n in sorted(counts.items())) or "no parts"
    summary = f"{len(rows or [])} part(s): {summary}" if totals_line is None else _e(totals_line)
    body = f"""
<header class="top"><div><div class="kicker">supportgen batch</div><h1 id="title">{_e(title)}</h1></div>
<div id="batch-summary" class="verdict unknown">{summary}</div></header>
<main><section class="card"><table id="batch-table" class="grid-table"><thead><tr>{head}</tr></thead>
<tbody>{"".join(body_rows) or '<tr><td colspan="6" class="na">No parts in this batch.</td></tr>'}</tbody></table>
<p class="hint">Click a column heading to sort; click again to reverse. "n/a" sorts last.</p></section>
{_cautions_html()}</main>
<footer>Generated by supportgen {_e(_tool_version())}.</footer>
"""
    return _page(f"{title}: supportgen batch", body, f"<script>{_asset('index.js')}</script>")
