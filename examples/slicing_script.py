"""Use supportgen from a slicing script: a folder of models, one setting changed.

Run it as ``python examples/slicing_script.py [FOLDER] [OUTDIR]``.  Without a
folder it writes the built-in demo parts to a temporary one first.  It supports
every model with a finer contact spacing than the default, prints each part's
contacts, tip sizes and volumes from the result, and saves the outputs.
"""

from __future__ import annotations

import sys
import tempfile
from pathlib import Path

import supportgen
from supportgen.runs.demo import write_demo_inputs


def support_folder(folder: Path, outdir: Path, **overrides) -> list[dict]:
    """Support every STL/OBJ/PLY/3MF file in ``folder``; return one summary row per part."""
    settings = supportgen.load_settings("desk-50", contact_spacing_mm=1.8, **overrides)
    rows = []
    for path in sorted(p for p in folder.iterdir() if p.suffix.lower() in {".stl", ".obj", ".ply", ".3mf"}):
        try:
            result = supportgen.generate(path, settings, strategy="straight")
        except supportgen.SupportGenError as exc:
            print(f"skipped: {exc}")
            continue
        result.save(outdir)
        contacts = result.contacts
        rows.append(
            {
                "part": result.name,
                "contacts": len(contacts),
                "tip_mm_max": float(contacts.diameters.max()) if len(contacts) else 0.0,
                "heaviest_tip_n": float(contacts.loads.max()) if len(contacts) else 0.0,
                "part_mm3": result.report["input"]["volume_mm3"],
                "supports_mm3": result.report["supports"]["volume_mm3"],
                "passed": result.report["verification"]["passed"],
            }
        )
        print(
            f"{result.name}: {len(contacts)} contacts, largest tip {rows[-1]['tip_mm_max']:.2f} mm, "
            f"supports {rows[-1]['supports_mm3']:.0f} mm3, check {'passed' if rows[-1]['passed'] else 'FAILED'}"
        )
    return rows


def main(argv: list[str]) -> int:
    outdir = Path(argv[1]) if len(argv) > 1 else Path("supported")
    if argv:
        folder = Path(argv[0])
        rows = support_folder(folder, outdir)
    else:
        with tempfile.TemporaryDirectory() as tmp:
            write_demo_inputs(tmp)
            rows = support_folder(Path(tmp), outdir)
    return 0 if rows and all(r["passed"] for r in rows) else 1


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
