"""The scripts in examples/ run, so they cannot rot (as manifold's examples are run as tests)."""

import runpy
from pathlib import Path

import trimesh

EXAMPLES = Path(__file__).resolve().parents[1] / "examples"


def test_slicing_script_supports_a_folder(tmp_path):
    script = runpy.run_path(str(EXAMPLES / "slicing_script.py"))
    from supportgen.runs.demo import write_demo_inputs

    write_demo_inputs(tmp_path / "in")
    rows = script["support_folder"](
        tmp_path / "in", tmp_path / "out", pixel_mm=0.2, layer_mm=0.2, tip_min_mm=0.4, tip_max_mm=1.0
    )
    assert [r["part"] for r in rows] == ["canister_lid", "hook", "jar_lid", "trivet"]
    for r in rows:
        assert r["contacts"] > 0 and r["supports_mm3"] > 0 and r["passed"]
        # The saved solid's volume is part plus supports minus their overlap (trimesh reads it back).
        solid = trimesh.load(tmp_path / "out" / f"{r['part']}.supported.stl")
        assert r["part_mm3"] < solid.volume < r["part_mm3"] + r["supports_mm3"]
