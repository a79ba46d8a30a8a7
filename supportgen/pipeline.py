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
import dataclasses
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import trimesh

from .analysis.layers import Grid, LayerStack, analyse_layers
from .analysis.overhangs import find_overhangs
from .analysis.placement import check_cures, place
from .analysis.verify import Verification, check, room_for_helper, speck_area_mm2, verify
from .constants import OFFSET_MM
from .errors import SupportGenError
from .io.budget import check_memory
from .io.meshio import LoadedMesh, load_mesh, mesh_bytes, part_name, prepare_mesh
from .io.outputs import commit_set, prepare_folder
from .io.units import scale_loaded, unit_factor
from .physics.loadpath import ForceProfile, ForceTracker, LayerRecorder
from .physics.orientation import apply_orientation
from .report.assemble import RunRecords, build_report
from .report.document import markdown, to_json
from .report.plots import plot_layers, plot_preview, plot_tips
from .report.protection import TrackedHolder, add_protection, contacts_csv, plot_underside, protection_section
from .report.web import part_page
from .settings import DEFAULT_STRATEGY, Settings, resolve_settings
from .supports.contacts import (
    add_unheld,
    contacts_at,
    contacts_from_rows,
    densify_points,
    extend_toward_loads,
    merge_contacts,
    sample_overhangs,
)
from .supports.geometry import Solids, combine
from .supports.plan import Contacts, SupportPlan
from .supports.protect import Guard, guard_for, protected_faces
from .supports.sizing import SizedPlan, over_capacity, size_plan, support_layer_forces, tip_diameter
from .supports.strategies import get_strategy

__all__ = ["Result", "generate", "check", "OUTPUTS", "DEFAULT_STRATEGY", "MAX_DENSIFY_ROUNDS"]

#: What :meth:`Result.save` writes for a part NAME: role -> file name suffix.
OUTPUTS = {
    "combined": ".supported.stl",
    "supports": ".supports.stl",
    "report": ".report.json",
    "summary": ".report.md",
    "page": ".report.html",
    "layers_plot": ".layers.png",
    "tips_plot": ".tips.png",
    "preview": ".preview.png",
    "contacts": ".contacts.csv",
    "underside": ".underside.png",
}

MAX_DENSIFY_ROUNDS = 4
MAX_REPAIR_ROUNDS = 4


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
    guard: Guard | None = field(default=None, repr=False)

    def save(
        self, outdir: str | Path, *, extra: Mapping | None = None, before_commit: Callable[[], None] | None = None
    ) -> dict[str, Path]:
        """Write ``NAME.supported.stl``, ``NAME.supports.stl``, ``NAME.report.json``,
        ``NAME.report.md`` and its plots (preview, layers, tips) into ``outdir`` as one
        set; return the paths by role.

        The set replaces a previous one whole or not at all
        (:func:`supportgen.io.outputs.commit_set`); the saved JSON is ``result.report``
        with ``outputs`` filled in: the path of each role, and under ``files`` the name,
        size and SHA-256 of every other file of the set.  ``extra`` adds files to the set
        (``role -> (file name, bytes or function of the staged files)``, made after the
        report); ``before_commit`` may raise to discard the set.  The result itself is
        not changed.

        Raises
        ------
        supportgen.errors.OutputError
            The folder is a file or not writable, or a file cannot be written (disk full):
            one line; the previous set is untouched.
        """
        outdir = prepare_folder(outdir)
        n, f = self.name, self.forces
        paths = {role: outdir / f"{n}{suffix}" for role, suffix in OUTPUTS.items()}
        report = {**self.report, "outputs": {k: str(p) for k, p in paths.items()}}
        images = {
            "part on its supports": paths["preview"].name,
            "area and force per layer": paths["layers_plot"].name,
            "tip safety factors": paths["tips_plot"].name,
        }
        rated = report["settings"]["printer"]["rated_force_n"]
        makers = {
            "combined": lambda staged: mesh_bytes(self.combined, ".stl", paths["combined"]),
            "supports": lambda staged: mesh_bytes(self.supports, ".stl", paths["supports"]),
            "layers_plot": lambda staged: plot_layers(
                self.layers.z_mm, self.layers.area_mm2, f.force_n, f"{n}: area and separation force per layer", rated
            ),
            "tips_plot": lambda staged: plot_tips(
                np.asarray(report["supports"]["tips"]["safety_factor"], float),
                report["forces"]["target_safety_factor"],
                f"{n}: tip safety factors",
            ),
            "preview": lambda staged: plot_preview(self.part, self.supports, f"{n}: part on its supports"),
            "contacts": lambda staged: self.contacts_csv().encode("utf-8"),
            "underside": lambda staged: self.underside_png(),
            "summary": lambda staged: markdown(report, n, images).encode("utf-8"),
            "page": lambda staged: part_page(
                report,
                self.combined,
                self.supports,
                self.part,
                report["supports"].get("contact_points", []),
                protected=self.guard.faces if self.guard is not None else None,
                offset=self.guard.offset if self.guard is not None else None,
            ).encode("utf-8"),
            "report": lambda staged: to_json(
                {**report, "outputs": {**report["outputs"], "files": [o.to_dict() for o in staged.values()]}}
            ).encode("utf-8"),
        }
        files = {role: (paths[role].name, make) for role, make in makers.items()}
        committed = commit_set(outdir, {**files, **(extra or {})}, before_commit=before_commit)
        return {role: o.path for role, o in committed.items()}

    def contacts_csv(self) -> str:
        """``NAME.contacts.csv`` text: the contacts in input coordinates (:mod:`supportgen.io.contactsfile`)."""
        offset = self.guard.offset if self.guard is not None else np.zeros(3)
        return contacts_csv(self.contacts, self.plan, self.report["supports"]["tips"]["safety_factor"], offset)

    def underside_png(self) -> bytes:
        """The part seen from below, contacts marked and protected faces shaded (PNG bytes)."""
        protected = self.guard.faces if self.guard is not None else None
        return plot_underside(self.part, protected, self.contacts, self.plan, f"{self.name}: seen from below")


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


def _layer_contacts(part, stack: LayerStack, settings: Settings, contacts: Contacts, spacing_mm: float) -> Contacts:
    """``contacts`` plus contacts under every island and wherever a layer reaches too far.

    An island gets contacts unless a tip already touches its first layer
    (:meth:`~supportgen.analysis.layers.Island.held_by`), and each of its points
    unless a tip lies over it (:func:`~supportgen.supports.contacts.add_unheld`);
    a reach point is added unless a contact lies within ``spacing_mm``.  A point whose upward ray misses the part (a
    feature a pixel or two wide) takes the nearest surface point within two layers
    and a pixel.
    """
    rules, pr = settings.rules, settings.printer
    near = 2 * pr.layer_mm + pr.pixel_mm
    reach_across = rules.tip_min_mm / 2 + pr.pixel_mm
    xyz = []
    for isl in stack.islands:
        if isl.area_bound_mm2 < speck_area_mm2(pr.pixel_mm):
            continue  # one pixel: less than a speck on any grid; verify reports it
        # An island of two pixels or more may light a speck on the check's grid (or cover one
        # exactly): it takes a tip, which holds it whatever its size.
        if isl.held_by(contacts.points, reach_across, pr.layer_mm).any():
            continue  # a tip already touches its first layer
        xy = isl.points(rules.contact_spacing_mm, rules.seed)
        xyz.append(np.column_stack([xy, np.full(len(xy), isl.z_mm - pr.layer_mm)]))
    island = contacts_at(part, np.vstack(xyz) if xyz else np.zeros((0, 3)), "island", rules.tip_diameter_mm, near)
    reach_xyz = [[*o.xy, o.z_mm - pr.layer_mm] for o in stack.overreach]
    reach = contacts_at(part, np.array(reach_xyz).reshape(-1, 3), "reach", rules.tip_diameter_mm, near)
    held = add_unheld(contacts, island, reach_across, pr.layer_mm)
    return merge_contacts(held, reach, spacing_mm)


def _forces(records, grid: Grid, contacts: Contacts, settings: Settings) -> ForceProfile:
    """The load path of ``contacts`` over the part's recorded layers (no layer sliced or solved again)."""
    return ForceTracker(grid, settings.printer.layer_mm, contacts.points, settings).replay(records)


def _sized_contacts(contacts: Contacts, profile: ForceProfile, settings: Settings) -> Contacts:
    """Contacts with their peak loads and the tip diameters those loads need."""
    return contacts.replace(
        diameters=tip_diameter(profile.contact_loads, settings),
        loads=profile.contact_loads,
        peak_layers=profile.contact_peak_layers,
    )


def generate(
    source, settings: Settings | str | Path | None = None, strategy: str = DEFAULT_STRATEGY, **options
) -> Result:
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
    position : {"auto", "keep", "centre"}
        x/y placement (:mod:`supportgen.analysis.placement`): keep the part where
        it lies on the plate, else centre it (auto); keep strictly; or centre.
    centre : bool
        Same as ``position="centre"``.
    units, scale : str, float
        The file's length unit (``mm``, ``cm``, ``m``, ``in``) and a further factor;
        the part is scaled to millimetres by their product before anything else.
    group_bounds : (2, 3) array, optional
        Bounds (mm, after scaling) of all parts placed together, so they move as one.
    progress : bool
        Progress bars over the layer passes.
    orient : {"keep", "auto"}
        Keep the given orientation (default: it may be deliberate), or turn the part
        to the up-direction :func:`supportgen.physics.orientation.orient` chooses.
    rotate : (3,) degrees, optional
        Turn the part about x, then y, then z (fixed axes) before anything else;
        with ``orient="auto"`` the search starts from the turned part.
    protect : selector text, bool mask over the input faces, callable or a list of them, optional
        Faces that must carry no tip and no landing (:mod:`supportgen.supports.protect`);
        a part file's side-car ``NAME.protect.toml`` is added.
    contacts : str, Path or ContactRows, optional
        A contacts file (:mod:`supportgen.io.contactsfile`) used instead of generating
        contacts; routing, sizing, the union and the check are recomputed, and contacts
        are added only where the check needs them (the report says so).
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
    try:
        return _generate(source, settings, strategy, **options)
    except SupportGenError as exc:
        name = options.get("name") or ("part" if isinstance(source, trimesh.Trimesh) else part_name(source))
        if str(exc).startswith(f"{name}:") or str(exc).startswith(f"{source}:"):
            raise
        raise type(exc)(f"{name}: {exc}") from exc


def _generate(
    source,
    settings: Settings | str | Path | None = None,
    strategy: str = DEFAULT_STRATEGY,
    *,
    name: str | None = None,
    position: str = "auto",
    centre: bool = False,
    units: str = "mm",
    scale: float = 1.0,
    group_bounds=None,
    progress: bool = False,
    orient: str = "keep",
    rotate=None,
    protect=None,
    contacts=None,
    **overrides,
) -> Result:
    """:func:`generate` without the naming of errors."""
    t_total = time.perf_counter()
    contacts_file = contacts  # the name ``contacts`` is the run's contacts below
    settings = resolve_settings(settings, overrides)
    plan_fn = get_strategy(strategy)
    timer = _Timer()
    rules, pr = settings.rules, settings.printer
    with timer("load"):
        if isinstance(source, trimesh.Trimesh):
            name = name or "part"
            loaded: LoadedMesh = prepare_mesh(source, name)
        else:
            name = name or part_name(source)
            lim = settings.limits
            loaded = load_mesh(
                source,
                max_faces=lim.max_faces,
                max_unpacked_mb=lim.max_unpacked_mb,
                budget=lambda faces: check_memory(faces, None, settings, str(source)),
            )
        # Refuse before the layer grid is allocated a part that would not fit in memory.
        check_memory(len(loaded.mesh.faces), loaded.mesh.bounds, settings, str(loaded.source))
    with timer("placement"):
        loaded = scale_loaded(loaded, unit_factor(units, scale))
    file_source = None if isinstance(source, trimesh.Trimesh) else source
    with timer("orient"):
        # Protected faces are chosen in the input's own coordinates, before any turn; the mask is
        # over faces, which turning keeps, and the orientation search scores it.
        found = protected_faces(loaded.mesh, protect, file_source, name)
        turned, orientation = apply_orientation(
            loaded.mesh, orient, rotate, settings, protect=found.faces if found.faces.any() else None
        )
        loaded = dataclasses.replace(loaded, mesh=turned)
    with timer("placement"):
        placed = place(
            loaded.mesh, settings, position="centre" if centre else position, name=name, group_bounds=group_bounds
        )
        part = placed.mesh
        guard = guard_for(
            loaded.mesh, part, placed.offset, settings, label=name, found=found, rotation=orientation["rotation"]
        )
        hold = TrackedHolder(guard, settings)
    with timer("overhangs"):
        oh = find_overhangs(part, rules.overhang_angle_deg, floor_z=0.0)
    fixed, file_info = 0, None
    with timer("contacts"):
        if contacts_file is not None:
            # A contacts file replaces sampling; the repair rounds below add contacts only where the check needs them.
            contacts, fixed = contacts_from_rows(contacts_file, part, placed.offset, settings)
            file_info = {"path": str(contacts_file), "rows": len(contacts), "locked": fixed}
        else:
            contacts = sample_overhangs(
                part, oh, rules.contact_spacing_mm, rules.overhang_angle_deg, rules.tip_diameter_mm, rules.seed
            )
            minima = contacts_at(part, oh.minima - [0, 0, OFFSET_MM], "minimum", rules.tip_diameter_mm)
            # A local minimum is held only by a tip over it, not by one merely near it.
            contacts = add_unheld(contacts, minima, rules.tip_min_mm / 2 + pr.pixel_mm, pr.layer_mm)
    with timer("layers"):
        # The contact-independent half of the load path (runs, cavities, pressure solves) is
        # recorded on this one pass and replayed for every set of contacts below.
        recorder = LayerRecorder(Grid.covering(part.bounds, pr.pixel_mm), settings)
        stack = analyse_layers(
            part,
            pr.pixel_mm,
            pr.layer_mm,
            rules.reach_limit_mm,
            grid=recorder.grid,
            observers=(recorder,),
            progress=progress and f"{name}: layers",
            workers=2 if room_for_helper(len(part.faces), part.bounds, settings) else 1,
        )
        check_cures(stack.area_mm2, settings, name)
    if file_info is None:
        with timer("contacts"):
            contacts = _layer_contacts(part, stack, settings, contacts, rules.contact_spacing_mm)
    contacts = hold(contacts, fixed)
    densified = repaired = 0
    for round_ in range(MAX_DENSIFY_ROUNDS + 1):
        with timer("forces"):
            profile = _forces(recorder.records, stack.grid, contacts, settings)
        over = over_capacity(profile.contact_tip_loads, settings)
        # The last round only measures: the loads must be those of the contacts kept.
        if not over.any() or file_info or round_ == MAX_DENSIFY_ROUNDS:  # a contacts file is honoured
            break
        with timer("contacts"):
            more = densify_points(contacts, over, part, settings)
            if profile.contact_peak_xy is not None:  # contacts under the load: on the way to it, and around it
                below = profile.contact_peak_layers * pr.layer_mm
                more = extend_toward_loads(
                    more, over, profile.contact_peak_xy, below, part, settings, profile.contact_peak_spread
                )
        more = hold(more, len(contacts))
        if len(more) == len(contacts):
            break
        densified += len(more) - len(contacts)
        contacts = more
    contacts = _sized_contacts(contacts, profile, settings)
    for attempt in range(MAX_REPAIR_ROUNDS + 1):
        with timer("routing"):
            plan = plan_fn(part, contacts, settings, **guard.plan_options())
        with timer("sizing"):
            sized: SizedPlan = size_plan(
                plan, contacts.loads, settings, profile.contact_squeeze_loads, side_loads=profile.contact_side_loads
            )
        with timer("geometry"):
            solids: Solids = combine(part, sized.plan, settings)
        with timer("verify"):
            ver = verify(
                solids.combined,
                settings,
                tip_safety=sized.tip_safety_factor / rules.safety_factor,
                progress=progress and "check",
                name=name,
            )
        if (
            ver.n_islands == 0 and ver.max_unsupported_reach_mm <= rules.reach_limit_mm
        ) or attempt == MAX_REPAIR_ROUNDS:
            break
        # Hold what the plan missed (islands left, layers reaching too far), then plan again.
        with timer("contacts"):
            more = hold(_layer_contacts(part, ver.layers, settings, contacts, rules.tip_diameter_mm), len(contacts))
        if len(more) == len(contacts):
            break
        repaired += len(more) - len(contacts)
        with timer("forces"):
            profile = _forces(recorder.records, stack.grid, more, settings)
        contacts = _sized_contacts(more, profile, settings)
    landings_avoided = None
    if guard.active:
        # Landings avoided: the same contacts planned without the keep-off, posts on protected faces counted.
        with timer("routing"):
            free = plan_fn(part, contacts, settings)
        landings_avoided = int(np.count_nonzero(guard.avoid(free.tip_points[free.tip_contact < 0])))
    # the raft and the posts are layers too: in the per-layer record and the rated-force check
    profile = profile.with_supports(*support_layer_forces(sized.plan, settings, len(profile.force_n)))
    timer.seconds["total"] = time.perf_counter() - t_total
    records = RunRecords(
        name,
        None if isinstance(source, trimesh.Trimesh) else str(source),
        loaded,
        part,
        settings,
        strategy,
        oh.area_mm2,
        contacts,
        plan,
        sized,
        solids,
        profile,
        stack,
        ver,
        densified,
        repaired,
        timer.seconds,
        placed.warnings,
        orientation,
    )
    if file_info is not None:
        file_info["added_by_check"] = repaired
    scars = protection_section(guard, hold, contacts, sized.plan, file_info, landings_avoided)
    report = add_protection(build_report(records), scars, name)
    return Result(
        name, solids.combined, solids.supports, part, contacts, sized.plan, report, stack, profile, ver, guard
    )
