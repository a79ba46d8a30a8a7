"""Benchmark: report page size and build time, and Chromium's load time, on the demo parts.

For each demo part (default settings, tree strategy), ``part_page`` is built
from the run and its size reported split into the vendored three.js, the mesh
buffers and the rest; then the same meshes are encoded as uint16 (the path
taken past ``QUANTISE_ABOVE_BYTES``) to show what quantising saves.  With
``--browser``, each page is loaded in headless Chromium (``--dump-dom``, 5 s of
virtual time) and the wall time of that process is printed; it depends heavily
on the machine's load, which is printed too.  Nothing here is a pass/fail test.

Usage::

    python benchmarks/bench_web.py [--parts jar_lid hook trivet] [--browser]
"""

from __future__ import annotations

import argparse
import os
import re
import shutil
import subprocess
import tempfile
import time
from pathlib import Path

import supportgen
from supportgen.report import web
from supportgen.runs.demo import DEMO_PARTS, demo_part


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--parts", nargs="+", default=list(DEMO_PARTS), choices=list(DEMO_PARTS))
    ap.add_argument("--browser", action="store_true", help="also time a headless Chromium load of each page")
    args = ap.parse_args()
    print(f"cores {os.cpu_count()}, load average {os.getloadavg()[0]:.2f}, three.js {web.vendor_version()}")
    chromium = shutil.which("chromium")
    with tempfile.TemporaryDirectory() as tmp:
        for name in args.parts:
            res = supportgen.generate(demo_part(name), name=name)
            t = time.perf_counter()
            page = web.part_page(res.report, res.combined, res.supports, res.part, res.contacts.to_records())
            build = time.perf_counter() - t
            meshes = sum(
                len(web.encode_mesh(m.vertices, m.faces)["positions"])
                + len(web.encode_mesh(m.vertices, m.faces)["index"])
                for m in (res.part, res.supports)
            )
            quant = sum(
                len(web.encode_mesh(m.vertices, m.faces, quantise_above=0)["positions"])
                + len(web.encode_mesh(m.vertices, m.faces, quantise_above=0)["index"])
                for m in (res.part, res.supports)
            )
            imap = re.search(r'<script type="importmap">.*?</script>', page, re.S)
            vendor = len(imap.group(0)) if imap else 0
            faces = len(res.part.faces) + len(res.supports.faces)
            line = (
                f"{name:8s} faces {faces:7d}  page {len(page) / 1e6:5.2f} MB (three.js {vendor / 1e6:4.2f} MB, "
                f"meshes {meshes / 1e6:4.2f} MB, "
                f"{quant / 1e6:4.2f} MB as uint16)  built in {build * 1000:6.1f} ms"
            )
            if args.browser and chromium:
                path = Path(tmp) / f"{name}.html"
                path.write_text(page, encoding="utf-8")
                t = time.perf_counter()
                subprocess.run(
                    [
                        chromium,
                        "--headless",
                        "--no-sandbox",
                        "--use-angle=swiftshader",
                        "--enable-unsafe-swiftshader",
                        "--virtual-time-budget=5000",
                        "--dump-dom",
                        f"--user-data-dir={tmp}/profile",
                        path.as_uri(),
                    ],
                    capture_output=True,
                    timeout=300,
                )
                line += f"  chromium load {time.perf_counter() - t:5.1f} s"
            print(line, flush=True)


if __name__ == "__main__":
    main()
