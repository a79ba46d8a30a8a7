"""Pipeline: wire the stages for one part, time each, return a :class:`Result`.

No maths lives here: each step calls the stage module that owns it.

load -> place -> overhangs -> contacts (samples, minima) -> layers (islands,
reach: more contacts) -> forces (loads per contact; densify while a tip would
need more than the largest diameter) -> strategy (plan) -> sizing -> geometry
(union) -> verify (re-slice the result; where an island is left or a layer reaches
too far, contacts are added there and the plan rebuilt, at most twice) -> report.
"""

from __future__ import annotations

import contextlib
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import trimesh

from .analysis.layers import Grid, LayerStack, analyse_layers
from .analysis.overhangs import find_overhangs
from .analysis.placement import place
from .analysis.verify import Verification, speck_area_mm2, verify
from .constants import OFFSET_MM
from .io.meshio import LoadedMesh, atomic_write, atomic_write_text, load_mesh, part_name, prepare_mesh, write_mesh
from .physics.loadpath import ForceProfile, ForceTracker
from .report.assemble import RunRecords, build_report
from .report.document import markdown, to_json
from .report.plots import plot_layers, plot_preview, plot_tips
from .settings import Settings, load_settings
from .supports.contacts import contacts_at, densify_points, merge_contacts, sample_overhangs
from .supports.geometry import Solids, combine
from .supports.plan import Contacts, SupportPlan
from .supports.sizing import SizedPlan, over_capacity, size_plan, support_layer_forces, tip_diameter
from .supports.strategies import get_strategy

__all__ = ["Result", "generate", "check", "OUTPUTS", "DEFAULT_STRATEGY", "MAX_DENSIFY_ROUNDS"]

#: What :meth:`Result.save` writes for a part NAME: role -> file name suffix.
OUTPUTS = {"combined": ".supported.stl", "supports": ".supports.stl", "report": ".report.json",
           "summary": ".report.md", "layers_plot": ".layers.png", "tips_plot": ".tips.png",
           "preview": ".preview.png"}

#: ``tree`` verifies on the demo and the shared corpus with less support volume
#: than ``straight`` (benchmarks/compare_strategies.py).
DEFAULT_STRATEGY = "tree"
MAX_DENSIFY_ROUNDS = 4
MAX_REPAIR_ROUNDS = 2


@dataclass(frozen=True)
class Result:
    """Everything one run made: solids (``part`` is the placed part alone), contacts,
    plan, analyses and the report dict."""

    name: str
    combined: trimesh.Trimesh
    supports: trimesh.Trimesh
    part: trimesh.Trimesh
    contacts: Contacts
    plan: SupportPlan
    report: dict
    layers: LayerStack = field(repr=False)
    forces: ForceProfile = field(repr=False)
    verification: Verification = field(repr=False)

    def save(self, outdir: str | Path) -> dict[str, Path]:
        """Write ``NAME.supported.stl``, ``NAME.supports.stl``, ``NAME.report.json``,
        ``NAME.report.md`` and its plots (preview, layers, tips) into ``outdir``;
        return the paths by role.

        Each file is written atomically; if any write fails, the files of this
        part already written are removed, so no partial set is left.  The
        result itself is not changed: the saved JSON is ``result.report`` with
        ``outputs`` filled in.
        """
        outdir = Path(outdir)
        outdir.mkdir(parents=True, exist_ok=True)
        n = self.name
        paths = {role: outdir / f"{n}{suffix}" for role, suffix in OUTPUTS.items()}
        report = {**self.report, "outputs": {k: str(p) for k, p in paths.items()}}
        written: list[Path] = []
        try:
            write_mesh(self.combined, paths["combined"]); written.append(paths["combined"])
            write_mesh(self.supports, paths["supports"]); written.append(paths["supports"])
            f = self.forces
            atomic_write(paths["layers_plot"], plot_layers(
                self.layers.z_mm, self.layers.area_mm2, f.force_n, f"{n}: area and separation force per layer",
                report["settings"]["printer"]["rated_force_n"]))
            written.append(paths["layers_plot"])
            atomic_write(paths["tips_plot"], plot_tips(
                np.asarray(report["supports"]["tips"]["safety_factor"], float), report["forces"]["target_safety_factor"],
                f"{n}: tip safety factors"))
            written.append(paths["tips_plot"])
            atomic_write(paths["preview"], plot_preview(self.part, self.supports, f"{n}: part on its supports"))
            written.append(paths["preview"])
            images = {"part on its supports": paths["preview"].name,
                      "area and force per layer": paths["layers_plot"].name,
                      "tip safety factors": paths["tips_plot"].name}
            atomic_write_text(paths["summary"], markdown(report, n, images)); written.append(paths["summary"])
            atomic_write_text(paths["report"], to_json(report)); written.append(paths["report"])
        except BaseException:
            for p in written:
                p.unlink(missing_ok=True)
            raise
        return paths


class _Timer:
    def __init__(self):
        self.seconds: dict[str, float] = {}

    @contextlib.contextmanager
    def __call__(self, stage: str):
        t0 = time.perf_counter()
        try:
            yield
        finally:
            self.seconds[stage] = self.seconds.get(stage, 0.0) + time.perf_counter() - t0


def _resolve_settings(settings, overrides) -> Settings:
    if settings is None:
        settings = Settings()
    elif not isinstance(settings, Settings):
        settings = load_settings(settings)
    return settings.override(overrides) if overrides else settings


def _layer_contacts(part, stack: LayerStack, settings: Settings) -> Contacts:
    """Contacts under every island and wherever a layer reaches too far.

    A point whose upward ray misses the part (a feature a pixel or two wide)
    takes the nearest surface point within two layers and a pixel.
    """
    rules, lh = settings.rules, settings.printer.layer_mm
    near = 2 * lh + settings.printer.pixel_mm
    xyz = []
    for isl in stack.islands:
        if isl.area_mm2 < speck_area_mm2(settings.printer.pixel_mm):
            continue   # no tip can hold a speck; verify reports it
        xy = isl.points(rules.contact_spacing_mm, rules.seed)
        xyz.append(np.column_stack([xy, np.full(len(xy), isl.z_mm - lh)]))
    island = contacts_at(part, np.vstack(xyz) if xyz else np.zeros((0, 3)), "island", rules.tip_diameter_mm, near)
    reach_xyz = [[*o.xy, o.z_mm - lh] for o in stack.overreach]
    reach = contacts_at(part, np.array(reach_xyz).reshape(-1, 3), "reach", rules.tip_diameter_mm, near)
    return merge_contacts(island, reach, rules.contact_spacing_mm / 2)


def _forces(part, grid: Grid, contacts: Contacts, settings: Settings, progress: bool) -> ForceProfile:
    tracker = ForceTracker(grid, settings.printer.layer_mm, contacts.points, settings)
    pr = settings.printer
    analyse_layers(part, pr.pixel_mm, pr.layer_mm, settings.rules.reach_limit_mm, grid=grid,
                   observers=(tracker,), progress=progress and "forces")
    return tracker.result()


def _sized_contacts(contacts: Contacts, profile: ForceProfile, settings: Settings) -> Contacts:
    """Contacts with their peak loads and the tip diameters those loads need."""
    return contacts.replace(diameters=tip_diameter(profile.contact_loads, settings),
                            loads=profile.contact_loads, peak_layers=profile.contact_peak_layers)


def generate(source, settings: Settings | str | Path | None = None, strategy: str = DEFAULT_STRATEGY, *,
             name: str | None = None, centre: bool = False, progress: bool = False, **overrides) -> Result:
    """Support one part end to end.

    Parameters
    ----------
    source : str, Path or trimesh.Trimesh
        A mesh file (STL, OBJ, PLY, 3MF) or a mesh, oriented as it will print.
    settings : Settings, str or Path, optional
        Settings, a built-in profile name or a TOML profile path; defaults if None.
    strategy : str
        A name from :data:`supportgen.supports.strategies.STRATEGIES`.
    name : str, optional
        Name used for output files (default: the file's stem, or "part").
    centre : bool
        Centre the part on the plate.
    progress : bool
        Progress bars over the layer passes.
    **overrides
        Single settings by name, e.g. ``contact_spacing_mm=1.8``.

    Returns
    -------
    Result

    Raises
    ------
    supportgen.errors.SupportGenError
        Bad input, settings or geometry; the message names the input.
    """
    t_total = time.perf_counter()
    settings = _resolve_settings(settings, overrides)
    plan_fn = get_strategy(strategy)
    timer = _Timer()
    rules, pr = settings.rules, settings.printer
    with timer("load"):
        if isinstance(source, trimesh.Trimesh):
            name = name or "part"
            loaded: LoadedMesh = prepare_mesh(source, name)
        else:
            name = name or part_name(source)
            loaded = load_mesh(source)
    with timer("placement"):
        part = place(loaded.mesh, settings, centre=centre, name=name).mesh
    with timer("overhangs"):
        oh = find_overhangs(part, rules.overhang_angle_deg, floor_z=0.0)
    with timer("contacts"):
        contacts = sample_overhangs(part, oh, rules.contact_spacing_mm, rules.overhang_angle_deg, rules.tip_diameter_mm, rules.seed)
        minima = contacts_at(part, oh.minima - [0, 0, OFFSET_MM], "minimum", rules.tip_diameter_mm)
        contacts = merge_contacts(contacts, minima, rules.tip_diameter_mm)
    with timer("layers"):
        stack = analyse_layers(part, pr.pixel_mm, pr.layer_mm, rules.reach_limit_mm,
                               progress=progress and f"{name}: layers")
        # Island and reach points closer than the spacing to a contact are already held by it.
        contacts = merge_contacts(contacts, _layer_contacts(part, stack, settings), rules.contact_spacing_mm)
    densified = repaired = 0
    for _ in range(MAX_DENSIFY_ROUNDS):
        with timer("forces"):
            profile = _forces(part, stack.grid, contacts, settings, progress)
        over = over_capacity(profile.contact_tip_loads, settings)
        if not over.any():
            break
        with timer("contacts"):
            more = densify_points(contacts, over, part, settings)
        if len(more) == len(contacts):
            break
        densified += len(more) - len(contacts)
        contacts = more
    contacts = _sized_contacts(contacts, profile, settings)
    for attempt in range(MAX_REPAIR_ROUNDS + 1):
        with timer("routing"):
            plan = plan_fn(part, contacts, settings)
        with timer("sizing"):
            sized: SizedPlan = size_plan(plan, contacts.loads, settings, profile.contact_squeeze_loads,
                                         side_loads=profile.contact_side_loads)
        with timer("geometry"):
            solids: Solids = combine(part, sized.plan, settings)
        with timer("verify"):
            ver = verify(solids.combined, settings, tip_safety=sized.tip_safety_factor / rules.safety_factor,
                         progress=progress and "check", name=name)
        if (ver.n_islands == 0 and ver.max_unsupported_reach_mm <= rules.reach_limit_mm) or attempt == MAX_REPAIR_ROUNDS:
            break
        # Hold what the plan missed (islands left, layers reaching too far), then plan again.
        with timer("contacts"):
            more = merge_contacts(contacts, _layer_contacts(part, ver.layers, settings), rules.tip_diameter_mm)
        if len(more) == len(contacts):
            break
        repaired += len(more) - len(contacts)
        with timer("forces"):
            profile = _forces(part, stack.grid, more, settings, progress)
        contacts = _sized_contacts(more, profile, settings)
    # the raft and the posts are layers too: in the per-layer record and the rated-force check
    profile = profile.with_supports(*support_layer_forces(sized.plan, settings, len(profile.force_n)))
    timer.seconds["total"] = time.perf_counter() - t_total
    records = RunRecords(name, None if isinstance(source, trimesh.Trimesh) else str(source), loaded, part, settings,
                         strategy, oh.area_mm2, contacts, plan, sized, solids, profile, stack, ver, densified,
                         repaired, timer.seconds)
    return Result(name, solids.combined, solids.supports, part, contacts, sized.plan, build_report(records), stack, profile, ver)


def check(mesh, settings: Settings | str | Path | None = None, *, progress: bool = False, **overrides) -> Verification:
    """Verify an already supported mesh (a path or a trimesh) standing on the plate.

    Raises
    ------
    supportgen.errors.SupportGenError
        The file cannot be read.
    """
    settings = _resolve_settings(settings, overrides)
    if isinstance(mesh, trimesh.Trimesh):
        name, tm = "mesh", mesh
    else:
        name = Path(mesh).name
        tm = load_mesh(mesh).mesh
    return verify(tm, settings, progress=progress, name=name)

