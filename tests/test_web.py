"""Report pages (supportgen.report.web) on real pipeline output, loaded in headless Chromium.

The browser tests fail on any JavaScript error (Chromium's console log on stderr,
and the page's own ``data-status``), on a blank or single-colour 3D canvas (pixels
of the screenshot, read with Pillow) and on a missing element (ids in the DOM
Chromium dumps).  They skip, with the reason, where Chromium is absent; CI
installs it (.ci/run).  Set SUPPORTGEN_SCREENSHOTS=DIR to keep the screenshots,
and also render every demo part and the demo batch index there.
"""

from __future__ import annotations

import base64
import json
import os
import re
import shutil
import subprocess
from html import escape as html_escape
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
import trimesh

import supportgen
from supportgen.report import batch_index, part_page, web
from supportgen.report.document import markdown
from supportgen.runs.demo import DEMO_PARTS, DEMO_PROTECT, demo_part, write_demo_inputs

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
needs_chromium = pytest.mark.skipif(
    CHROMIUM is None, reason="chromium not installed (CI installs it in .ci/run: apt-get install chromium)"
)

PART_IDS = (
    "title",
    "verdict",
    "view3d",
    "view3d-canvas",
    "btn-iso",
    "btn-below",
    "btn-side",
    "btn-top",
    "tog-part",
    "tog-supports",
    "tog-contacts",
    "tog-xray",
    "legend",
    "figures",
    "layer-plot",
    "readout",
    "sf-hist",
    "post-hist",
    "warnings",
    "provenance",
    "settings",
    "timing",
    "cautions",
    "scene-data",
    "plot-data",
)
INDEX_IDS = ("title", "batch-table", "batch-summary", "cautions")

# Chromium messages that are about the software GPU, not the page.
_GPU_NOISE = ("GL Driver Message", "GPU stall due to ReadPixels")


# --------------------------------------------------------------------------- harness


def _settings():
    # Coarser pixel and layer than the defaults so the end-to-end run stays quick on 2 cores.
    return supportgen.Settings().override(pixel_mm=0.1, layer_mm=0.1, tip_min_mm=0.2)


def _page_of(result) -> str:
    guard = result.guard
    return part_page(
        result.report,
        result.combined,
        result.supports,
        result.part,
        result.contacts.to_records(),
        protected=None if guard is None else guard.faces,
        offset=None if guard is None else guard.offset,
    )


@pytest.fixture(scope="module")
def hook():
    """A small real run: the demo hook through generate."""
    return supportgen.generate(demo_part("hook"), _settings(), name="hook")


def _coarse():
    # Coarse pixel, layer and tips: the protected-surface run below stays a few seconds on 2 cores.
    return supportgen.Settings().override(pixel_mm=0.2, layer_mm=0.2, tip_min_mm=0.4, tip_max_mm=1.0)


@pytest.fixture(scope="module")
def lid(tmp_path_factory):
    """The demo's canister lid read from its file with its protect side-car (DEMO_PROTECT), saved as
    a run saves it: (result, saved paths, the saved JSON report)."""
    folder = tmp_path_factory.mktemp("demo_inputs")
    (path,) = [p for p in write_demo_inputs(folder) if p.stem == "canister_lid"]
    assert (folder / "canister_lid.protect.toml").is_file()
    res = supportgen.generate(path, _coarse(), name="canister_lid")
    paths = res.save(tmp_path_factory.mktemp("lid_out"))
    return res, paths, json.loads(paths["report"].read_text())


def _scene(html: str) -> dict:
    return json.loads(re.search(r'<script type="application/json" id="scene-data">(.*?)</script>', html, re.S)[1])


def _protection_figures(sec: dict) -> dict[str, tuple[float, float]]:
    """The figures the page must show for a ``protection`` section: key -> (value, display tolerance)."""
    want = {
        "protected_faces": (sec["protected_faces"], 0),
        "protected_surface_mm2": (sec["protected_surface_mm2"], 5e-4),
        "keep_off_mm": (sec["keep_off_mm"], 5e-4),
        "rest.contacts": (sec["rest"]["contacts"], 0),
        "rest.tip_area_mm2": (sec["rest"]["tip_area_mm2"], 5e-5),
        "rest.landings": (sec["rest"]["landings"], 0),
        "unholdable": (len(sec["unholdable"]), 0),
    }
    for key in (
        "contacts_on_protected",
        "landings_on_protected",
        "contacts_moved",
        "contacts_merged_after_moving",
        "landings_avoided",
    ):
        want[key] = (sec[key], 0)
    for k, r in enumerate(sec["regions"]):
        want[f"regions.{k}.faces"] = (r["faces"], 0)
        want[f"regions.{k}.area_mm2"] = (r["area_mm2"], 5e-4)
        want[f"regions.{k}.contacts"] = (r["contacts"], 0)
        want[f"regions.{k}.tip_area_mm2"] = (r["tip_area_mm2"], 5e-5)
        want[f"regions.{k}.landings"] = (r["landings"], 0)
    return want


def _out_dir(tmp_path: Path) -> Path:
    env = os.environ.get("SUPPORTGEN_SCREENSHOTS")
    if env:
        Path(env).mkdir(parents=True, exist_ok=True)
        return Path(env)
    return tmp_path


def _chromium(url: str, tmp: Path, *extra: str) -> subprocess.CompletedProcess:
    profile = tmp / "chromium-profile"
    return subprocess.run(
        [
            CHROMIUM,
            "--headless",
            "--no-sandbox",
            "--use-angle=swiftshader",
            "--enable-unsafe-swiftshader",
            "--enable-logging=stderr",
            "--v=0",
            "--window-size=1280,900",
            "--virtual-time-budget=5000",
            "--hide-scrollbars",
            f"--user-data-dir={profile}",
            *extra,
            url,
        ],
        capture_output=True,
        text=True,
        timeout=180,
    )


def console_lines(stderr: str) -> list[str]:
    """The page's console messages in Chromium's stderr log (``...:CONSOLE...] "text", source: ...``)."""
    return [line for line in stderr.splitlines() if ":CONSOLE" in line and not any(n in line for n in _GPU_NOISE)]


class _Ids(HTMLParser):
    def __init__(self):
        super().__init__()
        self.ids: set[str] = set()
        self.body: dict[str, str] = {}
        self.links: list[str] = []
        self.rows = 0
        self._in_tbody = False
        self.keyed: dict[str, str] = {}  # text of each element with a data-key (the protection figures)
        self._key: str | None = None
        self.scene: str = ""
        self._in_scene = False

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if "id" in a:
            self.ids.add(a["id"])
        if "data-key" in a:
            self._key = a["data-key"]
            self.keyed[self._key] = ""
        if tag == "body":
            self.body = {k: v or "" for k, v in attrs}
        if tag == "a" and a.get("href"):
            self.links.append(a["href"])
        if tag == "tbody":
            self._in_tbody = True
        if tag == "tr" and self._in_tbody:
            self.rows += 1
        if tag == "script" and a.get("id") == "scene-data":
            self._in_scene = True

    def handle_data(self, data):
        if self._key is not None:
            self.keyed[self._key] += data
        if self._in_scene:
            self.scene += data

    def handle_endtag(self, tag):
        if tag == "tbody":
            self._in_tbody = False
        if tag == "span":
            self._key = None
        if tag == "script":
            self._in_scene = False


def dom_of(path: Path, tmp: Path, fragment: str = "") -> tuple[_Ids, list[str]]:
    """Load the page, return its parsed DOM after scripts ran and its console messages."""
    run = _chromium(path.resolve().as_uri() + fragment, tmp, "--dump-dom")
    assert run.returncode == 0, f"chromium failed on {path.name}: {run.stderr[-2000:]}"
    ids = _Ids()
    ids.feed(run.stdout)
    return ids, console_lines(run.stderr)


def screenshot(path: Path, png: Path, tmp: Path, fragment: str = "") -> list[str]:
    run = _chromium(path.resolve().as_uri() + fragment, tmp, f"--screenshot={png}")
    assert run.returncode == 0 and png.is_file(), f"chromium made no screenshot of {path.name}: {run.stderr[-2000:]}"
    return console_lines(run.stderr)


def canvas_colours(png: Path, rect: str) -> tuple[int, np.ndarray]:
    """Distinct colours inside the canvas rectangle "left,top,width,height" (CSS px) of a screenshot."""
    from PIL import Image

    left, top, width, height = (int(v) for v in rect.split(","))
    img = np.asarray(Image.open(png).convert("RGB"))
    crop = img[top + 2 : top + height - 2, left + 2 : left + width - 2]
    assert crop.size, f"canvas rectangle {rect} lies outside the {img.shape[1]}x{img.shape[0]} screenshot"
    flat = crop.reshape(-1, 3)
    return len(np.unique(flat, axis=0)), flat


def check_page(
    path: Path, tmp: Path, ids: tuple[str, ...], png: Path | None = None, fragment: str = "", min_colours: int = 0
) -> tuple[_Ids, np.ndarray | None]:
    """Every check of a page in one place: no console message, status ready, every id, canvas not blank."""
    dom, console = dom_of(path, tmp, fragment)
    assert not console, f"{path.name}: JavaScript console messages: {console}"
    assert dom.body.get("data-status") == "ready", f"{path.name}: data-status is {dom.body.get('data-status')!r}"
    missing = [i for i in ids if i not in dom.ids]
    assert not missing, f"{path.name}: elements missing: {missing}"
    pixels = None
    if png is not None:
        console = screenshot(path, png, tmp, fragment)
        assert not console, f"{path.name}: JavaScript console messages: {console}"
        if min_colours:
            n, pixels = canvas_colours(png, dom.body["data-canvas-rect"])
            # A lit, shaded model with a coloured legend of contacts gives thousands of colours;
            # a canvas that drew nothing (or only the clear colour) gives one.
            assert n >= min_colours, f"{path.name}: the 3D view shows only {n} colour(s)"
    return dom, pixels


# --------------------------------------------------------------------------- page content without a browser


def test_contact_safety_factors_match_the_sized_tips(hook):
    """The page's contact factor is the sizing rule, capacity = green tensile x pi d^2 / 4 over the peak
    load (tension on a circular section, exact formula); its lowest equals the report's lowest tip factor
    to the rounding of the records (diameters 0.1 um, loads 1 uN)."""
    c = web.contact_safety(hook.contacts.to_records(), hook.report)
    sigma = hook.report["settings"]["resin"]["green_tensile_mpa"]
    d, f = hook.contacts.diameters, hook.contacts.loads
    expected = np.where(f > 0, sigma * np.pi * d**2 / 4 / np.where(f > 0, f, 1), np.inf)
    held = c["loads"] > 0  # a load under 0.5 uN rounds to 0 in the records: that contact is shown as infinite
    assert np.all(np.isinf(c["sf"][~held])) and np.all(f[~held] < 1e-6)
    np.testing.assert_allclose(c["sf"][held], expected[held], rtol=web.SF_ROUNDING_REL)
    tips = np.array(hook.report["supports"]["tips"]["safety_factor"], float)
    assert np.min(c["sf"]) >= np.min(tips) * (1 - web.SF_ROUNDING_REL)


def test_mesh_buffers_round_trip_exactly_or_within_one_quantum(hook):
    """Decoding the page's buffers (as part.js does) gives trimesh's vertices and faces back:
    float32 exactly (IEEE single precision), uint16 within half a step of the box."""
    mesh = hook.supports
    for limit in (10**12, 0):
        m = web.encode_mesh(mesh.vertices, mesh.faces, quantise_above=limit)
        faces = np.frombuffer(base64.b64decode(m["index"]), "<" + ("u2" if m["index_type"] == "uint16" else "u4"))
        np.testing.assert_array_equal(faces.reshape(-1, 3), mesh.faces)
        raw = base64.b64decode(m["positions"])
        if m["positions_type"] == "float32":
            v = np.frombuffer(raw, "<f4").reshape(-1, 3)
            np.testing.assert_array_equal(v, mesh.vertices.astype(np.float32))
        else:
            q = np.frombuffer(raw, "<u2").reshape(-1, 3)
            v = np.asarray(m["lo"]) + q * np.asarray(m["step"])
            assert np.all(np.abs(v - mesh.vertices) <= np.asarray(m["step"]) / 2 + 1e-12)
        assert m["faces"] == len(mesh.faces) and m["vertices"] == len(mesh.vertices)  # nothing decimated


def test_colour_scale_is_lightness_ordered_and_classes_are_distinct():
    """The ramp falls in CIE L* from the target up (perceptual order); our sRGB->Lab conversion gives
    the published CIE values for white (100, 0, 0) and sRGB red (53.24, 80.09, 67.20; from memory)."""
    np.testing.assert_allclose(web.srgb_to_lab(np.array([1.0, 1.0, 1.0])), [100, 0, 0], atol=0.05)
    np.testing.assert_allclose(web.srgb_to_lab(np.array([1.0, 0.0, 0.0])), [53.24, 80.09, 67.20], atol=0.1)
    sf = np.geomspace(2.0, web.SF_SCALE_MAX, 40)
    lab = web.srgb_to_lab(web.sf_colours(sf, 2.0) / 255.0)
    assert np.all(np.diff(lab[:, 0]) <= 0.5), "lightness must fall (within 8-bit rounding) as the factor rises"
    assert lab[0, 0] - lab[-1, 0] > 50
    fail, under, ok, na = web.sf_colours([0.5, 1.5, 2.0, np.nan], 2.0)
    assert len({tuple(fail), tuple(under), tuple(ok), tuple(na)}) == 4


def test_page_is_self_contained_and_lists_what_the_report_holds(hook):
    html = _page_of(hook)
    # No network: every script is inline and the import map holds data: URLs only.
    assert not re.search(r"<script[^>]+src=|<link[^>]+href=", html)
    imap = json.loads(re.search(r'<script type="importmap">(.*?)</script>', html, re.S).group(1))
    assert imap["imports"] and all(u.startswith("data:text/javascript;base64,") for u in imap["imports"].values())
    # The vendored library is the pinned one, whole (sha256 recorded by scripts/refresh_vendor.sh).
    import hashlib
    from importlib import resources

    vendor = resources.files("supportgen.report") / "vendor"
    for line in (vendor / "VERSION").read_text().splitlines()[1:]:
        digest, name = line.split()
        assert hashlib.sha256((vendor / name).read_bytes()).hexdigest() == digest, name
    assert (vendor / "LICENSE").read_text().startswith("The MIT License")
    for w in hook.report["warnings"]:
        assert html_escape(w["message"]) in html
    # Resin cautions (the report's own text, render.CAUTIONS): sensitiser, eyes, ventilation, UV, solvent, stubs, SDS.
    for phrase in ("skin sensitiser", "eye", "ventilation", "UV", "flammable", "sharp", "safety data sheet"):
        assert phrase in html, phrase
    peak = hook.report["forces"]["peak_layer_force_n"]
    assert f"{peak:,.2f} N" in html


def test_missing_keys_show_na_and_never_crash():
    empty = trimesh.Trimesh()
    box = trimesh.creation.box((10, 10, 10))
    for report in (
        {},
        {"forces": None, "supports": {"tips": {"safety_factor": [None, "x", 3.0]}}},
        {"verification": {"passed": False, "failures": ["f"], "first_islands": [{"xy_mm": None}]}},
    ):
        html = part_page(report, empty, empty, box, [{"point": [0, 0, 1]}, {"junk": 1}, "not a dict"])
        assert "n/a" in html and "<html" in html
    html = batch_index([{"name": "a"}, {}, "junk", {"status": "ok", "peak_force_n": "fast"}])
    assert html.count("n/a") >= 8


def test_failed_checks_are_located():
    """Islands, specks and over-long reach each get a marker at the recorded position, under the keys
    Verification.to_dict writes today (and the reach keys' earlier names)."""
    from supportgen.analysis.verify import Verification

    ver = Verification(
        passed=False,
        watertight=True,
        n_islands=1,
        first_islands=({"layer": 9, "z_mm": 0.5, "xy_mm": [1, 2]},),
        specks=({"layer": 19, "xy_mm": [3, 4]},),
        max_unsupported_reach_mm=3.0,
        max_unsupported_reach_layer=39,
        max_unsupported_reach_xy=(5.0, 6.0),
        reach_limit_mm=2.0,
        tips_over_capacity=0,
        failures=("x",),
    )
    report = {"settings": {"printer": {"layer_mm": 0.05}}, "verification": ver.to_dict()}
    # A layer k's top is (k + 1) x layer height (exact: the layers stack from the plate).
    expected = [("island", [1, 2, 0.5]), ("speck", [3, 4, 1.0]), ("reach", [5, 6, 2.0])]
    assert [(m["kind"], m["xyz"]) for m in web.failure_marks(report)] == expected
    old = dict(report["verification"], worst_reach_layer=39, worst_reach_xy_mm=[5, 6])
    del old["max_unsupported_reach_layer"], old["max_unsupported_reach_xy_mm"]
    assert [(m["kind"], m["xyz"]) for m in web.failure_marks({**report, "verification": old})] == expected


def test_protected_mask_travels_unchanged_and_moved_contacts_are_placed(lid):
    """The page's scene carries the run's own Guard.faces bit for bit (decoded with numpy.unpackbits, the
    inverse of the packbits the page is written with); the contacts the report says were moved sit on
    the part, clear of every protected face by the keep-off (trimesh closest point), and are contacts of
    the final plan."""
    res, paths, sec = lid[0], lid[1], lid[2]["protection"]
    html = paths["page"].read_text(encoding="utf-8")
    prot = _scene(html)["protected"]
    bits = np.unpackbits(np.frombuffer(base64.b64decode(prot["bits"]), np.uint8))[: prot["faces"]].astype(bool)
    np.testing.assert_array_equal(bits, res.guard.faces)
    assert prot["count"] == int(bits.sum()) == sec["protected_faces"] > 0
    assert prot["faces"] == len(res.part.faces)
    # Every moved contact not merged into a neighbour afterwards is listed where it now sits.
    moved = np.asarray(sec["moved_to_mm"], float).reshape(-1, 3) + res.guard.offset
    assert len(moved) == sec["contacts_moved"] - sec["contacts_merged_after_moving"] > 0
    surf = res.guard.surface
    _, d_prot, _ = trimesh.proximity.closest_point(surf, moved)
    assert np.all(d_prot >= res.guard.keep_off_mm)
    _, d_part, _ = trimesh.proximity.closest_point(res.part, moved)
    assert np.all(d_part < 1e-6)
    final = res.contacts.points - res.guard.offset
    assert np.all(np.min(np.linalg.norm(final[None] - np.asarray(sec["moved_to_mm"])[:, None], axis=2), axis=1) < 2e-3)
    np.testing.assert_allclose(np.asarray(_scene(html)["moved"], float).reshape(-1, 3), moved, atol=2e-3)


def test_protection_section_is_omitted_like_the_markdown_when_nothing_is_protected(hook):
    """No protected face and no contacts file: neither the Markdown (document.protection_markdown) nor the
    page has the section, and the page has no protected-faces legend entry or scene mask."""
    assert hook.report["protection"]["protected_faces"] == 0 and not hook.report["protection"]["contacts_file"]
    assert "## Protected surfaces" not in markdown(hook.report, "hook", {})
    html = _page_of(hook)
    assert 'id="protection"' not in html and 'id="legend-protected"' not in html
    assert _scene(html)["protected"]["count"] == 0
    # A mask that does not fit the part's faces is not drawn (and does not crash the page).
    assert web.protected_bits(np.ones(3, bool), len(hook.part.faces)) is None


def test_contacts_file_figures_equal_the_json(lid, tmp_path):
    """A run reading the lid's own NAME.contacts.csv back: the page's contacts-file line shows the JSON's
    rows, locked rows and contacts the check added (the saved JSON read back with Python's json module)."""
    res, paths, _ = lid
    again = supportgen.generate(
        demo_part("canister_lid"),
        _coarse(),
        protect=DEMO_PROTECT["canister_lid"],
        contacts=paths["contacts"],
        name="canister_lid",
    )
    saved = again.save(tmp_path)
    info = json.loads(saved["report"].read_text())["protection"]["contacts_file"]
    assert info["rows"] == len(res.contacts)
    ids = _Ids()
    ids.feed(saved["page"].read_text(encoding="utf-8"))
    assert "contacts-file" in ids.ids
    shown = {k: int(ids.keyed[f"contacts_file.{k}"]) for k in ("rows", "locked", "added_by_check")}
    assert shown == {k: info[k] for k in ("rows", "locked", "added_by_check")}


# --------------------------------------------------------------------------- in the browser


@needs_chromium
def test_part_page_loads_draws_and_has_every_element(hook, tmp_path):
    out = _out_dir(tmp_path)
    page = out / "hook.report.html"
    page.write_text(_page_of(hook), encoding="utf-8")
    dom, pixels = check_page(page, tmp_path, PART_IDS, out / "hook.report.png", min_colours=200)
    # The model fills a fair share of the view: pixels away from the clear colour (#f4f6f8) and the grid.
    off = np.abs(pixels.astype(int) - [244, 246, 248]).max(axis=1) > 40
    assert off.mean() > 0.03, f"only {off.mean():.1%} of the view differs from the background"
    # The view from below (same canvas, contacts seen through the supports): drawn, and still no console message.
    below = out / "hook.report.below.png"
    assert not screenshot(page, below, tmp_path, "#below")
    assert canvas_colours(below, dom.body["data-canvas-rect"])[0] >= 200
    # The plot's hover read-out, driven once by the page itself (#probe) at the plot's middle: it names a
    # layer and the force the report records for that layer.
    run = _chromium(page.resolve().as_uri() + "#probe", tmp_path, "--dump-dom")
    m = re.search(r'id="readout"[^>]*>layer (\d+) at [^:]*: cured area [^,]*, separation force ([\d.]+) N', run.stdout)
    assert m, "the plot read-out did not respond"
    k, shown = int(m.group(1)), float(m.group(2))
    assert 0 < k < len(hook.report["forces"]["layer_force_n"])
    assert shown == pytest.approx(hook.report["forces"]["layer_force_n"][k], abs=5e-4)


@needs_chromium
def test_failed_check_is_marked_in_the_view(hook, tmp_path, monkeypatch):
    """A real failing check: the hook's bare part, lifted off the plate without supports, verified by
    supportgen.check: it starts in mid-air, and the page draws the red failure ring there."""
    ver = supportgen.check(hook.part, _settings())
    assert not ver.passed and ver.first_islands
    report = {**hook.report, "verification": ver.to_dict()}
    out = _out_dir(tmp_path)
    page = out / "hook_unsupported.report.html"
    # This page also takes the uint16 path for its mesh (as a part over 2 MB of buffers would).
    monkeypatch.setattr(web, "QUANTISE_ABOVE_BYTES", 0)
    page.write_text(part_page(report, hook.part, trimesh.Trimesh(), hook.part, []), encoding="utf-8")
    assert '"positions_type":"uint16"' in page.read_text()
    html = page.read_text()
    assert "does not pass the print check" in html and "starting in mid-air" in html
    _, pixels = check_page(page, tmp_path, PART_IDS, out / "hook_unsupported.report.png", min_colours=50)
    red = np.array([int(web.FAIL_COLOUR[i : i + 2], 16) for i in (1, 3, 5)])
    assert np.count_nonzero(np.abs(pixels.astype(int) - red).max(axis=1) <= 12) > 20, "no failure ring drawn"


@needs_chromium
def test_batch_index_loads_with_two_rows_and_links(hook, tmp_path):
    out = _out_dir(tmp_path)
    r = hook.report
    rows = [
        {
            "name": "hook",
            "page": "hook.report.html",
            "status": "ok",
            "peak_force_n": r["forces"]["peak_layer_force_n"],
            "contacts": r["supports"]["contacts"],
            "volume_mm3": r["supports"]["volume_mm3"],
            "time_s": r["timing_s"]["total"],
        },
        {
            "name": "hook_unsupported",
            "page": "hook_unsupported.report.html",
            "status": "failed-check",
            "reason": "islands start in mid-air",
        },
    ]
    page = out / "index.html"
    page.write_text(batch_index(rows, "web test batch"), encoding="utf-8")
    dom, _ = check_page(page, tmp_path, INDEX_IDS, out / "index.png")
    assert dom.rows == 2 and dom.body.get("data-rows") == "2"
    assert dom.links == ["hook.report.html", "hook_unsupported.report.html"]
    # Sorted by peak force (column 2), the part with no figure ("n/a") goes last both ways; the page sorts
    # itself when opened with #sort=K (the same code a click on a heading runs).
    for fragment in ("#sort=2", "#sort=-2"):
        dom, console = dom_of(page, tmp_path, fragment)
        assert not console and dom.links == ["hook.report.html", "hook_unsupported.report.html"], fragment
    # By name, descending: hook_unsupported before hook (string order, Python's agrees).
    dom, _ = dom_of(page, tmp_path, "#sort=-0")
    assert dom.links == sorted(dom.links, reverse=True) == ["hook_unsupported.report.html", "hook.report.html"]


def _protected_hue_pixels(pixels: np.ndarray) -> int:
    """Pixels whose hue lies within 15 degrees of PROTECTED_COLOUR's, saturated and not dark (HSV by
    Python's colorsys formulas, vectorised); lighting scales a face's colour, keeping its hue."""
    rgb = pixels.astype(float) / 255
    mx, mn = rgb.max(axis=1), rgb.min(axis=1)
    c = np.where(mx > mn, mx - mn, 1.0)
    r, g, b = rgb.T
    h = np.where(mx == r, ((g - b) / c) % 6, np.where(mx == g, (b - r) / c + 2, (r - g) / c + 4)) * 60
    ref = web.srgb_to_lab(np.array([int(web.PROTECTED_COLOUR[i : i + 2], 16) / 255 for i in (1, 3, 5)]))
    import colorsys

    hue_ref = 360 * colorsys.rgb_to_hsv(*(int(web.PROTECTED_COLOUR[i : i + 2], 16) / 255 for i in (1, 3, 5)))[0]
    assert ref[1] > 20 and ref[2] < 0  # reddish purple in CIE L*a*b*: a* > 0, b* < 0
    near = np.abs((h - hue_ref + 180) % 360 - 180) <= 15
    return int(np.count_nonzero(near & (mx - mn > 0.15) & (mx > 0.35) & (mx > mn)))


@needs_chromium
def test_protected_surfaces_shown_on_the_demo_lid(lid, tmp_path):
    """The demo lid's page as Result.save writes it: loads without a console message, draws, shades its
    protected faces (the page's own decoded count equals the JSON's protected_faces; pixels of that hue
    in the view, none without the mask), has the legend entry and the section, and the section's figures
    equal the saved JSON report's (read back with Python's json module)."""
    res, paths, report = lid
    sec = report["protection"]
    out = _out_dir(tmp_path)
    page = out / "canister_lid.report.html"
    if page.resolve() != paths["page"].resolve():
        shutil.copyfile(paths["page"], page)
    ids = PART_IDS + ("protection", "scar-budget", "protection-figures", "legend-protected", "tog-protected")
    dom, pixels = check_page(page, tmp_path, ids, out / "canister_lid.report.png", min_colours=200)
    assert dom.body.get("data-protected-faces") == str(sec["protected_faces"]) != "0"
    # The legend entry names the count; the scene data's mask has as many protected faces.
    assert _scene(paths["page"].read_text(encoding="utf-8"))["protected"]["count"] == sec["protected_faces"]
    want = _protection_figures(sec)
    assert set(want) <= set(dom.keyed), f"figures missing: {sorted(set(want) - set(dom.keyed))}"
    for key, (value, tol) in want.items():
        assert float(dom.keyed[key]) == pytest.approx(value, abs=tol), key
    assert sec["contacts_on_protected"] == sec["landings_on_protected"] == 0  # the budget the run promises
    shaded = _protected_hue_pixels(pixels)
    assert shaded > 500, f"only {shaded} pixels of the protected colour in the view"
    # The same page without the mask: no pixel of that hue (nothing else on the page is drawn in it
    # except the moved-contact rings, which are a darker shade and thin).
    bare = tmp_path / "lid_bare.report.html"
    bare.write_text(
        part_page(report, res.combined, res.supports, res.part, res.contacts.to_records()), encoding="utf-8"
    )
    _, bare_pixels = check_page(bare, tmp_path, PART_IDS, tmp_path / "lid_bare.png", min_colours=200)
    assert _protected_hue_pixels(bare_pixels) < shaded / 20


@needs_chromium
def test_harness_catches_a_broken_page(hook, tmp_path):
    """The checks above can fail: a script error, a page that never draws, and a missing element."""
    html = _page_of(hook)
    broken = tmp_path / "broken.html"
    broken.write_text(html.replace("function setupView() {", "function setupView() { undefinedCall();", 1))
    dom, console = dom_of(broken, tmp_path)
    assert dom.body.get("data-status", "").startswith("error") and any("undefinedCall" in c for c in console)
    with pytest.raises(AssertionError, match="elements missing"):
        ok = tmp_path / "ok.html"
        ok.write_text(html)
        check_page(ok, tmp_path, PART_IDS + ("no-such-element",))
    blank = tmp_path / "blank.png"
    from PIL import Image

    Image.new("RGB", (200, 100), (244, 246, 248)).save(blank)
    assert canvas_colours(blank, "0,0,200,100")[0] == 1


@needs_chromium
@pytest.mark.skipif(
    not os.environ.get("SUPPORTGEN_SCREENSHOTS"),
    reason="set SUPPORTGEN_SCREENSHOTS=DIR to render every demo part's page and the demo index (a few minutes)",
)
def test_demo_pages_for_the_closing_note(tmp_path):
    out = _out_dir(tmp_path)
    rows = []
    for name in DEMO_PARTS:
        res = supportgen.generate(demo_part(name), name=name, protect=DEMO_PROTECT.get(name))
        page = out / f"{name}.report.html"
        page.write_text(_page_of(res), encoding="utf-8")
        check_page(page, tmp_path, PART_IDS, out / f"{name}.report.png", min_colours=200)
        check_page(page, tmp_path, PART_IDS, out / f"{name}.report.below.png", fragment="#below", min_colours=200)
        r = res.report
        rows.append(
            {
                "name": name,
                "page": page.name,
                "status": "ok" if r["verification"]["passed"] else "failed-check",
                "peak_force_n": r["forces"]["peak_layer_force_n"],
                "contacts": r["supports"]["contacts"],
                "volume_mm3": r["supports"]["volume_mm3"],
                "time_s": r["timing_s"]["total"],
            }
        )
    index = out / "demo_index.html"
    index.write_text(batch_index(rows, "demo batch"), encoding="utf-8")
    check_page(index, tmp_path, INDEX_IDS, out / "demo_index.png")
