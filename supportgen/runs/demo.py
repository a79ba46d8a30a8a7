"""The built-in demo: a kitchenware maker's sample batch of three parts.

The parts are made here from manifold3d primitives, already oriented as they
will print (z up, away from the plate), and sized like real samples:

``jar_lid``
    A screw-lid cup, 32 mm across, printed opening upward: its cavity is closed
    toward the plate, so while the rim prints the trapped resin pulls like a
    full disc (the sealed-cavity case); a 2 mm vent in the crown lets it go.
``hook``
    A wall hook: a back plate with an arm that leaves it at right angles and
    turns up at the end: a flat overhang under the arm and a local minimum at
    its elbow.
``trivet``
    A lattice trivet, a square grid of 3 mm bars on four short feet: many
    thin layers and four islands (the feet start in mid-air once lifted).
``canister_lid``
    A 24 mm storage-canister lid, opening upward like the jar lid, with two
    surfaces that must stay free of scars: its inside touches food (every
    up-facing face: the floor, the thread's top, the rim), and the maker's mark,
    a 3.6 mm disc debossed 0.4 mm into the crown, is what people see on the
    shelf.  Its side-car file ``canister_lid.protect.toml`` names them
    (:data:`DEMO_PROTECT`), so the tip that would sit on the mark is moved to the
    crown around it and no post stands on the floor inside.

Nothing here is measured data: it exists to show the tool end to end.
"""

from __future__ import annotations

from pathlib import Path

import manifold3d as m3d
import trimesh

__all__ = ["DEMO_PARTS", "DEMO_PROTECT", "demo_part", "write_demo_inputs"]


def _mesh(solid: m3d.Manifold) -> trimesh.Trimesh:
    from ..supports.geometry import to_trimesh

    return to_trimesh(solid)


def jar_lid(vented: bool = True) -> trimesh.Trimesh:
    """A 32 mm screw lid, opening up, with an optional 2 mm vent in its crown."""
    outer = m3d.Manifold.cylinder(12.0, 16.0, 16.0, 96)
    inner = m3d.Manifold.cylinder(12.0, 14.0, 14.0, 96).translate((0, 0, 2.0))
    lid = outer - inner
    # Thread ridge inside the wall: a ring 1 mm proud, printed as a shallow overhang.
    ridge = (m3d.Manifold.cylinder(1.2, 14.0, 14.0, 96) - m3d.Manifold.cylinder(1.2, 13.0, 13.5, 96)).translate(
        (0, 0, 7.0)
    )
    lid = lid + ridge
    if vented:
        lid = lid - m3d.Manifold.cylinder(4.0, 1.0, 1.0, 24).translate((0, 0, -1.0))
    return _mesh(lid)


def hook() -> trimesh.Trimesh:
    """A wall hook: 24 x 4 x 36 mm back plate, 22 mm arm, 10 mm upturned tip."""
    plate = m3d.Manifold.cube((24.0, 4.0, 36.0)).translate((-12.0, -2.0, 0.0))
    arm = m3d.Manifold.cube((8.0, 22.0, 5.0)).translate((-4.0, 2.0, 14.0))
    tip = m3d.Manifold.cube((8.0, 5.0, 14.0)).translate((-4.0, 19.0, 14.0))
    knob = m3d.Manifold.sphere(4.0, 48).translate((0.0, 21.5, 28.0))
    return _mesh(plate + arm + tip + knob)


def trivet() -> trimesh.Trimesh:
    """A 36 mm square lattice trivet: 3 mm bars at 8 mm pitch on four 4 mm feet."""
    bars = []
    for k in range(5):
        offset = -16.0 + 8.0 * k - 1.5
        bars.append(m3d.Manifold.cube((36.0, 3.0, 3.0)).translate((-18.0, offset, 4.0)))
        bars.append(m3d.Manifold.cube((3.0, 36.0, 3.0)).translate((offset, -18.0, 4.0)))
    feet = [
        m3d.Manifold.cylinder(4.0, 1.5, 2.5, 32).translate((x, y, 0.0)) for x in (-16.0, 16.0) for y in (-16.0, 16.0)
    ]
    return _mesh(m3d.Manifold.batch_boolean(bars + feet, m3d.OpType.Add))


def canister_lid() -> trimesh.Trimesh:
    """A 24 mm lid, opening up, vent off-centre, a 3.6 mm maker's mark debossed 0.4 mm in the crown."""
    outer = m3d.Manifold.cylinder(10.0, 12.0, 12.0, 96)
    inner = m3d.Manifold.cylinder(10.0, 10.5, 10.5, 96).translate((0, 0, 2.0))
    lid = outer - inner
    ridge = m3d.Manifold.cylinder(1.0, 10.5, 10.5, 96) - m3d.Manifold.cylinder(1.0, 9.7, 10.1, 96)
    ridge = ridge.translate((0, 0, 6.0))
    lid = lid + ridge
    lid = lid - m3d.Manifold.cylinder(4.0, 0.8, 0.8, 24).translate((6.0, 0.0, -1.0))
    lid = lid - m3d.Manifold.cylinder(1.4, 1.8, 1.8, 48).translate((0.0, 0.0, -1.0))
    return _mesh(lid)


DEMO_PARTS = {"jar_lid": jar_lid, "hook": hook, "trivet": trivet, "canister_lid": canister_lid}

#: Protected surfaces of demo parts (selectors in the part's own coordinates), written as
#: side-car files next to the demo inputs: the canister lid's food-contact inside (faces
#: looking up) and the ceiling of its debossed maker's mark (the faces at z = 0.4 mm).
DEMO_PROTECT = {"canister_lid": ["normal:0,0,1,5", "height:0.39,0.41"]}


def demo_part(name: str) -> trimesh.Trimesh:
    """One demo part by name (see :data:`DEMO_PARTS`).

    Examples
    --------
    >>> round(demo_part("hook").volume)
    4853
    """
    return DEMO_PARTS[name]()


def write_demo_inputs(folder: str | Path) -> list[Path]:
    """Write the demo parts as binary STL files into ``folder`` (with a side-car
    ``NAME.protect.toml`` for each part in :data:`DEMO_PROTECT`); return their paths."""
    from ..io.meshio import write_mesh

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for name, make in DEMO_PARTS.items():
        path = folder / f"{name}.stl"
        write_mesh(make(), path)
        if name in DEMO_PROTECT:
            items = ", ".join(f'"{x}"' for x in DEMO_PROTECT[name])
            (folder / f"{name}.protect.toml").write_text(f"protect = [{items}]\n", encoding="utf-8")
        paths.append(path)
    return paths
