"""Bench: every model of a folder with every strategy, one table, ratios and plots.

For each model file, each strategy and each orientation choice (``keep``, the
given orientation, and/or ``auto``, chosen by
:func:`supportgen.physics.orientation.orient`) the part is supported with
:func:`supportgen.generate`, its files are saved with ``Result.save`` into
``OUTDIR/<strategy>/`` (``OUTDIR/<strategy>-auto/`` for ``auto``) and one table
row is read back from the saved ``NAME.report.json``, so every figure in the
table is the figure in that report.
The peak memory of the run is measured here and written into the report as well
(key ``bench``), so the same holds for it.

Outputs in ``OUTDIR`` (each written atomically): ``bench.csv`` and ``bench.md``
(the table; the Markdown adds the ratios and the plots), ``summary.csv`` (ratios
against the baseline strategy, per model and over all models),
``support_volume.png`` and ``stage_times.png``; when both ``keep`` and ``auto``
are run, ``orient.csv`` (per part and strategy: peak layer force, contacts,
landings, support volume, print height and the check under both, the ratio
auto/keep of each figure, and the median over the parts), also in ``bench.md``.

Peak memory, method ``"rss"`` (default): the growth of the resident set during
the run, ``VmHWM`` after minus ``VmRSS`` before, with free heap pages handed back
(glibc ``malloc_trim``) and the high-water mark reset through
``/proc/self/clear_refs`` first (Linux >= 4.0); where that reset is not
possible the growth of ``ru_maxrss`` is used, which reads 0 for a run that stays
under an earlier peak. Method ``"tracemalloc"``: the peak of Python's traced
allocations (numpy buffers included); exact, but it slows the run it measures
about twofold, so the stage times then overstate.
"""

from __future__ import annotations

import csv
import dataclasses
import io
import json
import math
import os
import sys
import time
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import SettingsError, SupportGenError
from ..io.meshio import READ_FORMATS, atomic_write, atomic_write_text, load_mesh, part_name
from ..settings import ORIENT_CHOICES, Settings
from ..supports.strategies import get_strategy
from .memory import MEMORY_METHODS, measure_peak

__all__ = [
    "BenchTable",
    "MEMORY_METHODS",
    "REPORT_COLUMNS",
    "STAGES",
    "find_models",
    "measure_peak",
    "report_row",
    "baseline_ratios",
    "run_bench",
    "grid_settings",
    "machine_line",
    "ORIENT_FIGURES",
    "orient_comparison",
]

#: Pipeline stages in the order they run; a stage a report adds later goes after them.
STAGES = ("load", "placement", "overhangs", "contacts", "layers", "forces", "routing", "sizing", "geometry", "verify")
#: Table column -> path of keys in the report JSON.
REPORT_COLUMNS: dict[str, tuple[str, ...]] = {
    "faces": ("input", "faces"),
    "contacts": ("supports", "contacts"),
    "landings": ("supports", "landings"),
    "contact_area_mm2": ("supports", "contact_area_mm2"),
    "support_volume_mm3": ("supports", "volume_mm3"),
    "base_volume_mm3": ("supports", "base_volume_mm3"),
    "resin_ml": ("estimates", "resin_ml"),
    "layers": ("estimates", "layers"),
    "islands": ("verification", "islands"),
    "max_reach_mm": ("verification", "max_unsupported_reach_mm"),
    "passed": ("verification", "passed"),
    "min_safety_factor": ("forces", "min_safety_factor"),
    "peak_layer_force_n": ("forces", "peak_layer_force_n"),
    "peak_memory_mb": ("bench", "peak_memory_mb"),
    "height_mm": ("estimates", "height_mm"),
}
#: Figures compared between the given orientation (``keep``) and the chosen one (``auto``).
ORIENT_FIGURES = ("peak_layer_force_n", "contacts", "landings", "support_volume_mm3", "height_mm")
_RATIOS = {"support_volume": "support_volume_mm3", "contacts": "contacts", "resin": "resin_ml", "time": "total_s"}


@dataclass(frozen=True)
class BenchTable:
    """The outcome of :func:`run_bench`.

    ``rows`` holds one dict per model and strategy (``status`` "ok" or "error");
    ``summary`` the ratios against ``baseline``; ``paths`` the files written.
    """

    columns: tuple[str, ...]
    rows: tuple[dict, ...]
    summary: tuple[dict, ...]
    baseline: str
    memory_method: str
    paths: dict
    orient_rows: tuple[dict, ...] = ()

    @property
    def failures(self) -> tuple[dict, ...]:
        """Rows whose run raised an error or whose result did not pass verification."""
        return tuple(r for r in self.rows if r["status"] != "ok" or not r["passed"])

    def to_csv(self) -> str:
        """The table as CSV; floats in full precision (``repr``), missing values empty."""
        return _csv(self.columns, self.rows)

    def to_markdown(self) -> str:
        """The table, the ratios and links to the plots as one Markdown page."""
        lines = [
            "# Strategy comparison",
            "",
            f"{len({r['model'] for r in self.rows})} models x {len({r['strategy'] for r in self.rows})} "
            f"strategies; baseline `{self.baseline}`; peak memory by `{self.memory_method}` "
            "(see supportgen.runs.bench); times in seconds.",
            "",
        ]
        lines += _md_table(self.columns, self.rows)
        errors = [r for r in self.rows if r["status"] != "ok"]
        if errors:
            lines += ["", "## Failed runs", ""] + [f"- {r['model']} / {r['strategy']}: {r['error']}" for r in errors]
        lines += [
            "",
            f"## Ratios against `{self.baseline}`",
            "",
            "Per model, and over the models where both results passed verification (ratio of the totals; "
            "geometric mean of the ratios).",
            "",
        ]
        lines += _md_table(tuple(self.summary[0]) if self.summary else ("model",), self.summary)
        if self.orient_rows:
            lines += [
                "",
                "## Orientation: `auto` against `keep`",
                "",
                "Per part and strategy, each figure under the given orientation (keep) and the chosen one "
                "(auto), their ratio auto/keep, and the median over the parts where both ran.",
                "",
            ]
            lines += _md_table(tuple(self.orient_rows[0]), self.orient_rows)
        lines += [
            "",
            "## Plots",
            "",
            "![support volume](support_volume.png)",
            "",
            "![stage times](stage_times.png)",
            "",
        ]
        return "\n".join(lines)


def find_models(folder: str | Path) -> list[tuple[str, Path]]:
    """The mesh files directly in ``folder`` (not its subfolders), sorted, with unique names.

    Parameters
    ----------
    folder : str or Path

    Returns
    -------
    list of (str, Path)
        ``(name, path)``; a model's name is its file stem, and where two files share a
        stem the extension is appended (``part_stl``, ``part_obj``).

    Raises
    ------
    SupportGenError
        The folder is missing or holds no STL, OBJ, PLY or 3MF file.
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise SupportGenError(f"{folder}: no such folder; give the folder that holds the models")
    files = sorted(p for p in folder.iterdir() if p.is_file() and p.suffix.lower() in READ_FORMATS)
    if not files:
        raise SupportGenError(f"{folder}: no model files; put {', '.join(READ_FORMATS)} files in it")
    stems = [part_name(p) for p in files]
    return [(s if stems.count(s) == 1 else f"{s}_{p.suffix[1:].lower()}", p) for s, p in zip(stems, files)]


def _stage_order(timings: Sequence[dict]) -> list[str]:
    seen = {k for t in timings for k in t} - {"total"}
    return [s for s in STAGES if s in seen] + sorted(seen - set(STAGES))


def report_row(model: str, strategy: str, report: dict, stages: Sequence[str], orient: str = "keep") -> dict:
    """One table row from a report dict (as read back from ``NAME.report.json``).

    Parameters
    ----------
    model, strategy : str
    report : dict
        The report; ``None`` values (JSON null, e.g. an infinite safety factor) stay None.
    stages : sequence of str
        The stages to give a ``<stage>_s`` column; a stage missing from the report is None.

    Returns
    -------
    dict
        ``model``, ``strategy``, ``status`` "ok", ``error`` "", ``orient``, one key per
        :data:`REPORT_COLUMNS`, ``<stage>_s`` and ``total_s``.
    """
    row = {"model": model, "strategy": strategy, "status": "ok", "error": "", "orient": orient}
    for column, keys in REPORT_COLUMNS.items():
        value = report
        for k in keys:
            value = value.get(k) if isinstance(value, dict) else None
        row[column] = value
    timing = report.get("timing_s", {})
    row.update({f"{s}_s": timing.get(s) for s in stages})
    row["total_s"] = timing.get("total")
    return row


def _ratio(a, b) -> float | None:
    if a is None or b is None or not b:
        return None
    return float(a) / float(b)


def baseline_ratios(rows: Sequence[dict], baseline: str) -> list[dict]:
    """Ratios of each strategy's figures to the baseline strategy's, per model and overall.

    Returns
    -------
    list of dict
        Keys ``model``, ``strategy`` and ``<figure>_ratio`` for support volume,
        contacts, resin and total time, for every model where both runs succeeded.
        Two overall rows per strategy, ``all (ratio of totals)`` and ``all (geometric
        mean)``, over the models where both results also passed verification; a
        ratio with a zero or missing baseline is None.

    Notes
    -----
    Cost O(rows).

    Examples
    --------
    >>> rows = [{"model": "a", "strategy": s, "status": "ok", "passed": True, "support_volume_mm3": v,
    ...          "contacts": 10, "resin_ml": 1.0, "total_s": t} for s, v, t in (("straight", 200.0, 2.0), ("tree", 100.0, 4.0))]
    >>> r = baseline_ratios(rows, "straight")[0]
    >>> r["support_volume_ratio"], r["contacts_ratio"], r["time_ratio"]
    (0.5, 1.0, 2.0)
    """
    ok = {(r["model"], r["strategy"]): r for r in rows if r["status"] == "ok"}
    models = list(dict.fromkeys(r["model"] for r in rows))
    out = []
    for strategy in dict.fromkeys(r["strategy"] for r in rows):
        if strategy == baseline:
            continue
        pairs = [(ok[m, strategy], ok[m, baseline]) for m in models if (m, strategy) in ok and (m, baseline) in ok]
        for a, b in pairs:
            out.append(
                {
                    "model": a["model"],
                    "strategy": strategy,
                    **{f"{k}_ratio": _ratio(a[c], b[c]) for k, c in _RATIOS.items()},
                }
            )
        pairs = [(a, b) for a, b in pairs if a.get("passed") is True and b.get("passed") is True]
        totals = {"model": "all (ratio of totals)", "strategy": strategy}
        geo = {"model": "all (geometric mean)", "strategy": strategy}
        for k, c in _RATIOS.items():
            totals[f"{k}_ratio"] = (
                _ratio(sum(a[c] or 0 for a, _ in pairs), sum(b[c] or 0 for _, b in pairs)) if pairs else None
            )
            logs = [math.log(x) for x in (_ratio(a[c], b[c]) for a, b in pairs) if x]
            geo[f"{k}_ratio"] = math.exp(sum(logs) / len(logs)) if logs and len(logs) == len(pairs) else None
        out += [totals, geo]
    return out


def orient_comparison(rows: Sequence[dict]) -> list[dict]:
    """The given orientation (``keep``) against the chosen one (``auto``), per part and strategy.

    Returns
    -------
    list of dict
        For every model and strategy whose ``keep`` and ``auto`` runs both succeeded:
        ``model``, ``strategy``, ``<figure>_keep``, ``<figure>_auto`` and
        ``<figure>_ratio`` (auto / keep; None when keep is 0 or missing) for each of
        :data:`ORIENT_FIGURES`, and ``passed_keep``, ``passed_auto``.  Then one row
        per strategy, model ``median over parts``: the median of each column over
        those parts (ratios: the median of the per-part ratios that exist), and the
        number of parts passing the check under each.

    Examples
    --------
    >>> rows = [{"model": m, "strategy": "tree", "orient": o, "status": "ok", "passed": True,
    ...          "peak_layer_force_n": f, "contacts": 10, "landings": 0, "support_volume_mm3": 1.0,
    ...          "height_mm": 5.0} for m, o, f in (("a", "keep", 4.0), ("a", "auto", 1.0))]
    >>> c = orient_comparison(rows)
    >>> c[0]["peak_layer_force_n_ratio"], c[1]["model"], c[1]["passed_auto"]
    (0.25, 'median over parts', 1)
    """
    ok = {(r["model"], r["strategy"], r.get("orient", "keep")): r for r in rows if r["status"] == "ok"}
    out = []
    for strategy in dict.fromkeys(r["strategy"] for r in rows):
        per = []
        for model in dict.fromkeys(r["model"] for r in rows):
            keep, auto = ok.get((model, strategy, "keep")), ok.get((model, strategy, "auto"))
            if keep is None or auto is None:
                continue
            row = {"model": model, "strategy": strategy}
            for f in ORIENT_FIGURES:
                row[f"{f}_keep"], row[f"{f}_auto"] = keep.get(f), auto.get(f)
                row[f"{f}_ratio"] = _ratio(auto.get(f), keep.get(f))
            row["passed_keep"], row["passed_auto"] = keep.get("passed"), auto.get("passed")
            per.append(row)
        if not per:
            continue
        med = {"model": "median over parts", "strategy": strategy}
        for key in per[0]:
            if key in med or key.startswith("passed"):
                continue
            vals = [float(r[key]) for r in per if r[key] is not None]
            med[key] = float(np.median(vals)) if vals else None
        med["passed_keep"] = sum(r["passed_keep"] is True for r in per)
        med["passed_auto"] = sum(r["passed_auto"] is True for r in per)
        out += per + [med]
    return out


def _cell(v) -> str:
    return "" if v is None else repr(v) if isinstance(v, float) else str(v)


def _csv(columns, rows) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(columns)
    w.writerows([_cell(r.get(c)) for c in columns] for r in rows)
    return buf.getvalue()


def _md_cell(v) -> str:
    if v is None or v == "":
        return "–"
    if isinstance(v, bool):
        return "yes" if v else "NO"
    if isinstance(v, float):
        return f"{v:.3g}" if abs(v) < 1000 else f"{v:.0f}"
    return str(v).replace("|", "\\|")


def _md_table(columns, rows) -> list[str]:
    cols = [c for c in columns if c not in ("error",)]
    return ["| " + " | ".join(cols) + " |", "|" + "---|" * len(cols)] + [
        "| " + " | ".join(_md_cell(r.get(c)) for c in cols) + " |" for r in rows
    ]


def _plots(rows: Sequence[dict], stages: Sequence[str]) -> tuple[bytes, bytes]:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    models = list(dict.fromkeys(r["model"] for r in rows))
    label = {id(r): run_folder(r["strategy"], r.get("orient", "keep")) for r in rows}
    strategies = list(dict.fromkeys(label[id(r)] for r in rows))
    by = {(r["model"], label[id(r)]): r for r in rows if r["status"] == "ok"}
    x = np.arange(len(models))
    width = 0.8 / max(1, len(strategies))
    fig, ax = plt.subplots(figsize=(max(5.0, 1.2 * len(models) + 2), 3.6))
    for i, s in enumerate(strategies):
        vals = [by[m, s]["support_volume_mm3"] if (m, s) in by else np.nan for m in models]
        ax.bar(x + (i - (len(strategies) - 1) / 2) * width, vals, width, label=s)
    ax.set_xticks(x, models, rotation=20, ha="right")
    ax.set_ylabel("support volume, base included (mm³)")
    ax.set_title("Support volume per model and strategy")
    ax.legend()
    fig.tight_layout()
    volume_png = _png(fig)
    plt.close(fig)

    runs = [r for r in rows if r["status"] == "ok"]
    fig, ax = plt.subplots(figsize=(max(5.0, 0.7 * len(runs) + 3.5), 3.8))
    bottom = np.zeros(len(runs))
    colours = plt.get_cmap("tab20")
    for j, s in enumerate(stages):
        vals = np.array([r.get(f"{s}_s") or 0.0 for r in runs])
        ax.bar(np.arange(len(runs)), vals, 0.7, bottom=bottom, label=s, color=colours(j % 20))
        bottom += vals
    ax.set_xticks(np.arange(len(runs)), [f"{r['model']}\n{label[id(r)]}" for r in runs], fontsize=7)
    ax.set_ylabel("seconds")
    ax.set_title("Time per stage")
    ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.01, 1.0))
    fig.tight_layout()
    stages_png = _png(fig)
    plt.close(fig)
    return volume_png, stages_png


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110, metadata={"Software": None})
    return buf.getvalue()


def _scaled(path: Path, scale_mm: float):
    """The file's mesh, validated, centred on the origin and scaled so its longest side is ``scale_mm``."""
    loaded = load_mesh(path)
    mesh = loaded.mesh.copy()
    factor = scale_mm / float(np.max(mesh.extents))
    mesh.apply_translation(-mesh.bounds.mean(axis=0))
    mesh.apply_scale(factor)
    return mesh, loaded, factor


def run_folder(strategy: str, orient: str = "keep") -> str:
    """The folder (under the bench's output) of one strategy's runs: ``<strategy>``, or ``<strategy>-auto``."""
    return strategy if orient == "keep" else f"{strategy}-{orient}"


def _run_one(path: Path, name: str, strategy: str, settings: Settings, outdir: Path, scale_mm, memory: str, turn=None):
    import supportgen

    turn = turn or {}  # orient= and rotate= of generate

    def work():
        t0 = time.perf_counter()
        if scale_mm is None:
            return supportgen.generate(path, settings, strategy=strategy, name=name, **turn), None, 1.0, 0.0
        mesh, loaded, factor = _scaled(path, scale_mm)
        read_s = time.perf_counter() - t0
        return supportgen.generate(mesh, settings, strategy=strategy, name=name, **turn), loaded, factor, read_s

    (result, loaded, factor, read_s), peak_mb, used = measure_peak(work, memory)
    report = dict(result.report)
    report["bench"] = {
        "peak_memory_mb": peak_mb,
        "memory_method": used,
        "scale_mm": scale_mm,
        "scale_factor": factor,
        "read_and_scale_s": read_s,
        "source": str(path),
    }
    if loaded is not None:  # the pipeline saw an in-memory mesh: name the file and its repairs
        report["input"] = {
            **report["input"],
            "path": str(path),
            "repairs": list(loaded.repairs) + list(report["input"]["repairs"]),
        }
        report["warnings"] = [{"code": "repair", "message": f"{name}: {r}"} for r in loaded.repairs] + list(
            report["warnings"]
        )
    paths = dataclasses.replace(result, report=report).save(outdir / run_folder(strategy, turn.get("orient", "keep")))
    return json.loads(paths["report"].read_text(encoding="utf-8")), used


def run_bench(
    corpus_dir: str | Path,
    output_dir: str | Path,
    settings: Settings,
    strategies: Sequence[str] = ("straight", "tree"),
    *,
    baseline: str = "straight",
    scale_mm: float | None = None,
    memory: str = "rss",
    progress: bool = True,
    orients: Sequence[str] = ("keep",),
    rotate=None,
) -> BenchTable:
    """Support every model in ``corpus_dir`` with every strategy; write the table, ratios and plots.

    Parameters
    ----------
    corpus_dir : str or Path
        Folder of STL, OBJ, PLY or 3MF files (subfolders are not searched).
    output_dir : str or Path
        Created if needed; per-model files go to ``output_dir/<strategy>/``.
    settings : Settings
    strategies : sequence of str
        Names from :data:`supportgen.supports.strategies.STRATEGIES`.
    baseline : str
        The strategy the others are compared with; must be one of ``strategies``.
    scale_mm : float, optional
        Centre each model on the origin (placement then lifts it) and scale it uniformly
        so its longest side is this many mm; for unitless meshes. The time to read and scale goes into
        ``report["bench"]["read_and_scale_s"]``, not into ``timing_s``.
    memory : {"rss", "tracemalloc"}
        How peak memory is measured (see the module notes).
    progress : bool
        A progress bar over the runs (stderr).
    orients : sequence of {"keep", "auto"}
        Orientation choices run for every model and strategy (``generate(orient=...)``);
        with both, the table gains the keep/auto comparison (:func:`orient_comparison`).
    rotate : (3,) degrees, optional
        Turn every part first (``generate(rotate=...)``), before any ``auto`` search.

    Returns
    -------
    BenchTable

    Raises
    ------
    SettingsError
        Unknown strategy or orientation choice, baseline not among the strategies, or ``scale_mm`` <= 0.
    SupportGenError
        ``corpus_dir`` is missing or holds no model. A model that fails is recorded
        as an ``error`` row, not raised.

    Notes
    -----
    Runs one after another in this process: cost is the sum of the ``generate``
    runs, O(models x strategies x orients).
    """
    strategies = list(dict.fromkeys(strategies))
    for s in strategies:
        get_strategy(s)
    orients = list(dict.fromkeys(orients))
    bad = [o for o in orients if o not in ORIENT_CHOICES] or ([] if orients else ["(none)"])
    if bad:
        raise SettingsError(f"orientation choice {bad[0]!r}: give one or more of {', '.join(ORIENT_CHOICES)}")
    if baseline not in strategies:
        raise SettingsError(
            f"baseline strategy '{baseline}' is not among the strategies run "
            f"({', '.join(strategies)}); add it or choose one of them"
        )
    if scale_mm is not None and not scale_mm > 0:
        raise SettingsError(f"scale {scale_mm} mm: give a positive length for the longest side")
    models = find_models(corpus_dir)
    out = Path(output_dir)
    out.mkdir(parents=True, exist_ok=True)
    runs = [(m, s, o) for m in models for s in strategies for o in orients]
    if progress:
        from tqdm import tqdm

        runs = tqdm(runs, desc="bench", unit="run", file=sys.stderr)
    results, method = [], memory
    for (name, path), strategy, how in runs:
        if progress:
            runs.set_postfix_str(f"{name} / {strategy} / {how}")
        try:
            turn = {"orient": how, "rotate": rotate}
            report, method = _run_one(path, name, strategy, settings, out, scale_mm, memory, turn)
            results.append((name, strategy, how, report, ""))
        except SupportGenError as exc:
            results.append((name, strategy, how, None, str(exc)))
    stages = _stage_order([r.get("timing_s", {}) for *_, r, _ in results if r is not None])
    columns = (
        "model",
        "strategy",
        "status",
        "error",
        "orient",
        *REPORT_COLUMNS,
        *(f"{s}_s" for s in stages),
        "total_s",
    )
    rows = tuple(
        report_row(n, s, r, stages, o)
        if r is not None
        else {"model": n, "strategy": s, "status": "error", "error": e, "orient": o}
        for n, s, o, r, e in results
    )
    # Strategies are compared with the baseline within each orientation choice.
    summary = tuple(
        {**row, "orient": o} if len(orients) > 1 else row
        for o in orients
        for row in baseline_ratios([r for r in rows if r["orient"] == o], baseline)
    )
    oriented = tuple(orient_comparison(rows)) if {"keep", "auto"} <= set(orients) else ()
    table = BenchTable(columns, rows, summary, baseline, method, {}, oriented)
    paths = {
        "csv": out / "bench.csv",
        "markdown": out / "bench.md",
        "summary": out / "summary.csv",
        "volume_plot": out / "support_volume.png",
        "stage_plot": out / "stage_times.png",
    }
    volume_png, stages_png = _plots(rows, stages)
    atomic_write(paths["volume_plot"], volume_png)
    atomic_write(paths["stage_plot"], stages_png)
    atomic_write_text(paths["summary"], _csv(tuple(summary[0]) if summary else ("model", "strategy"), summary))
    atomic_write_text(paths["csv"], table.to_csv())
    if oriented:
        paths["orient"] = out / "orient.csv"
        atomic_write_text(paths["orient"], _csv(tuple(oriented[0]), oriented))
    atomic_write_text(paths["markdown"], table.to_markdown())
    return dataclasses.replace(table, paths=paths)


def grid_settings(pixel_mm: float | None = None, layer_mm: float | None = None, seed: int = 0) -> Settings:
    """Default settings on another pixel/layer grid, for benchmark scripts.

    A coarser pixel raises ``tip_min_mm`` to two pixels, the smallest feature
    the settings accept.
    """
    overrides: dict = {"seed": seed}
    if pixel_mm is not None:
        overrides["pixel_mm"] = pixel_mm
        overrides["tip_min_mm"] = max(Settings().rules.tip_min_mm, 2 * pixel_mm)
    if layer_mm is not None:
        overrides["layer_mm"] = layer_mm
    return Settings().override(overrides)


def machine_line() -> str:
    """One line naming the machine, its cores and load, and the library versions, for benchmark output."""
    import platform

    import trimesh

    from .. import __version__

    return (
        f"machine: {platform.machine()} {platform.system()}, os.cpu_count()={os.cpu_count()}, "
        f"load average {os.getloadavg()[0]:.2f} at start; python {platform.python_version()}, "
        f"trimesh {trimesh.__version__}, supportgen {__version__}"
    )
