"""A static, self-contained HTML page over a results folder.

``write_report(DIR)`` finds every result below DIR (run folders: manifest.json +
metrics.parquet; finite-size-scaling folders: verdict.json; sweep folders: sweep.json +
runs.parquet), draws the figures that are missing or older than their tables, and writes
DIR/index.html plus one page per sort order, DIR/index-by-<metric>-<up|down>.html.

Sorting works without JavaScript because every ordering is a precomputed page; the column
headers of the overview table link to them. The pages use no scripts, no external style
sheets or fonts and no network: images are relative links to the PNG files in each
folder's figures/, each linked to its vector PDF when one exists.

Verdict of a run: the one harness.results.judgement reached and judgement.json stores (agree within
the scenario's margin, disagree, inconclusive, or n/a), shown for the run and per group.
"""

from __future__ import annotations

import html
import json
import math
import os
import re
import tomllib
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from urllib.parse import quote

import numpy as np
import pandas as pd

from harness.core.files import atomic_write_text
from harness.plot import figures
from harness.results.comparison import describe_gaps
from harness.results.stored import read_judgement

VERDICTS = ("agree", "disagree", "inconclusive", "n/a")
OVERVIEW_KEYS = 6
SWEEP_PAGE_METRICS = ("final_test_error", "max_abs_z", "divergence_t")
SWEEP_CAPTIONS = {
    "final_test_error": "final test error: simulation mean ± SEM and theory (heat maps: simulation mean)",
    "max_abs_z": "largest |z| of the test error",
    "divergence_t": "time at which the theory departs",
}
# Scenario entries worth a glance in every run card (matched on the last part of the key).
HEADLINE_KEY_ENDINGS = (
    "kind",
    "input_dim",
    "hidden",
    "activation",
    "learning_rate",
    "second_layer_learning_rate",
    "train_second_layer",
    "noise_std",
    "optimizer",
    "weight_decay",
    "time",
    "seeds",
    "source",
)


@dataclass(frozen=True)
class SortKey:
    """One way of ordering runs: a slug for the file name, a header label and a value getter."""

    slug: str
    label_html: str
    value: Callable[[RunEntry], float | str]
    numeric: bool = True


@dataclass
class RunEntry:
    path: Path
    run_id: str
    scenario: dict[str, object]
    manifest: dict
    metrics: pd.DataFrame
    final_test_error: float
    judgement: dict | None = None
    figure_files: dict[str, Path] = field(default_factory=dict)
    figure_note: str | None = None

    def test_metric(self, column: str) -> float:
        row = self.metrics[self.metrics["observable"] == "test_error"]
        return float(row[column].iloc[0]) if len(row) else math.nan

    @property
    def verdict(self) -> str:
        return str(self.judgement["verdict"]) if self.judgement else "n/a"


@dataclass
class ScalingEntry:
    path: Path
    verdict: dict
    figure_files: dict[str, Path] = field(default_factory=dict)
    figure_note: str | None = None


@dataclass
class SweepEntry:
    path: Path
    swept_keys: list[str]
    runs: pd.DataFrame
    missing_runs: int
    figure_files: dict[str, Path] = field(default_factory=dict)
    figure_note: str | None = None


@dataclass
class ResultsFolder:
    root: Path
    runs: list[RunEntry]
    scalings: list[ScalingEntry]
    sweeps: list[SweepEntry]
    problems: list[str] = field(default_factory=list)


# ---------------------------------------------------------------------------------------
# Finding and reading results
# ---------------------------------------------------------------------------------------


def _is_run(path: Path) -> bool:
    return (path / "manifest.json").is_file() and (path / "metrics.parquet").is_file()


def discover(root: Path) -> tuple[list[Path], list[Path], list[Path]]:
    """Run, scaling and sweep folders below ``root`` (root included), in path order.

    Run folders are not searched further; figures/ and hidden folders are skipped.
    """
    runs, scalings, sweeps = [], [], []
    for current, subfolders, _ in os.walk(root):
        here = Path(current)
        subfolders[:] = sorted(d for d in subfolders if d != "figures" and not d.startswith("."))
        if _is_run(here):
            runs.append(here)
            subfolders[:] = []
            continue
        if (here / "verdict.json").is_file():
            scalings.append(here)
        if (here / "sweep.json").is_file() and (here / "runs.parquet").is_file():
            sweeps.append(here)
    return runs, scalings, sweeps


def flatten(table: dict, prefix: str = "") -> dict[str, object]:
    """Nested TOML tables to dotted keys ("sgd.learning_rate"), the runs.parquet convention."""
    flat: dict[str, object] = {}
    for key, value in table.items():
        dotted = f"{prefix}{key}"
        if isinstance(value, dict):
            flat.update(flatten(value, dotted + "."))
        else:
            flat[dotted] = value
    return flat


def read_run(path: Path) -> RunEntry:
    scenario_path = path / "scenario.toml"
    scenario: dict[str, object] = {}
    if scenario_path.is_file():
        try:
            scenario = flatten(tomllib.loads(scenario_path.read_text()))
        except tomllib.TOMLDecodeError as error:
            raise figures.FigureInputError(f"{scenario_path}: not valid TOML ({error})") from None
    manifest = figures.read_json(path / "manifest.json")
    metrics = figures.read_metrics(path)
    final = math.nan
    if (path / "summary.parquet").is_file():
        test = figures.read_parquet_table(
            path / "summary.parquet",
            ("t", "observable", "sim_mean"),
            filters=[("observable", "==", "test_error")],
        )
        if len(test):
            final = float(test.sort_values("t")["sim_mean"].iloc[-1])
    return RunEntry(
        path=path,
        run_id=path.name,
        scenario=scenario,
        manifest=manifest,
        metrics=metrics,
        final_test_error=final,
        judgement=read_judgement(path),
    )


def _stale(target: Path, sources: Iterable[Path]) -> bool:
    if not target.is_file():
        return True
    newest = max((source.stat().st_mtime for source in sources if source.is_file()), default=0.0)
    return target.stat().st_mtime < newest


def _ensure_run_figures(entry: RunEntry) -> None:
    out = entry.path / "figures"
    sources = [entry.path / "summary.parquet", entry.path / "metrics.parquet"]
    wanted = {name: out / f"{name}.png" for name in figures.RUN_FIGURES}
    if not (entry.path / "summary.parquet").is_file():
        entry.figure_note = "no figures: summary.parquet is missing"
    elif any(_stale(png, sources) for png in wanted.values()):
        try:
            figures.write_run_figures(entry.path)
        except figures.FigureInputError as error:
            entry.figure_note = f"no figures: {error}"
    entry.figure_files = {name: png for name, png in wanted.items() if png.is_file()}


def _ensure_scaling_figure(entry: ScalingEntry) -> None:
    png = entry.path / "figures" / "scaling.png"
    if _stale(png, [entry.path / "verdict.json"]):
        try:
            figures.write_scaling_figure(entry.path)
        except figures.FigureInputError as error:
            entry.figure_note = f"no figure: {error}"
    if png.is_file():
        entry.figure_files["scaling"] = png


def _ensure_sweep_figures(entry: SweepEntry) -> None:
    sources = [entry.path / "sweep.json", entry.path / "runs.parquet"]
    notes = []
    for metric in SWEEP_PAGE_METRICS:
        column = figures.SWEEP_METRICS[metric][0]
        if column not in entry.runs.columns:
            continue
        png = figures.sweep_figure_stem(entry.path, metric).with_suffix(".png")
        if _stale(png, sources):
            try:
                figures.write_sweep_figure(entry.path, figures.FigureOptions(metric=metric))
            except figures.FigureInputError as error:
                notes.append(str(error))
        if png.is_file():
            entry.figure_files[metric] = png
    entry.figure_note = "; ".join(notes) or None


def collect(root: Path, *, draw_figures: bool = True) -> ResultsFolder:
    """Read every result below ``root``; raise FigureInputError if there is none."""
    root = Path(root)
    if not root.is_dir():
        raise figures.FigureInputError(f"{root}: not a folder; expected a results folder holding run folders")
    run_paths, scaling_paths, sweep_paths = discover(root)
    if not (run_paths or scaling_paths or sweep_paths):
        raise figures.FigureInputError(
            f"{root}: no results found; expected subfolders with manifest.json + metrics.parquet (runs), "
            "verdict.json (scaling) or sweep.json + runs.parquet (sweeps)"
        )
    # One unreadable result must not hide the others: it is listed under "skipped" instead.
    problems: list[str] = []
    runs = _read_each(run_paths, read_run, problems)
    _disambiguate_run_ids(runs, root)
    scalings = _read_each(scaling_paths, lambda path: ScalingEntry(path, figures.read_scaling(path)), problems)
    sweeps = _read_each(sweep_paths, _read_sweep_entry, problems)
    if not (runs or scalings or sweeps):
        raise figures.FigureInputError(problems[0])
    if draw_figures:
        for entry in runs:
            _ensure_run_figures(entry)
        for entry in scalings:
            _ensure_scaling_figure(entry)
        for entry in sweeps:
            _ensure_sweep_figures(entry)
    return ResultsFolder(root=root, runs=runs, scalings=scalings, sweeps=sweeps, problems=problems)


def _read_each(paths: Sequence[Path], reader: Callable[[Path], object], problems: list[str]) -> list:
    entries = []
    for path in paths:
        try:
            entries.append(reader(path))
        except figures.FigureInputError as error:
            problems.append(str(error))
    return entries


def _read_sweep_entry(path: Path) -> SweepEntry:
    keys, rows = figures.read_sweep(path)
    spec = figures.read_json(path / "sweep.json")
    missing = len(set(spec["run_ids"]) - set(rows["run_id"]))
    return SweepEntry(path=path, swept_keys=keys, runs=rows, missing_runs=missing)


def _disambiguate_run_ids(runs: list[RunEntry], root: Path) -> None:
    """Folder names are the run ids; nested folders with equal names get their relative path."""
    counts: dict[str, int] = {}
    for entry in runs:
        counts[entry.run_id] = counts.get(entry.run_id, 0) + 1
    for entry in runs:
        if counts[entry.run_id] > 1:
            entry.run_id = entry.path.relative_to(root).as_posix()


# ---------------------------------------------------------------------------------------
# Sort orders
# ---------------------------------------------------------------------------------------

SORT_KEYS: tuple[SortKey, ...] = (
    SortKey("run-id", "run", lambda run: run.run_id, numeric=False),
    SortKey("final-test-error", "final ε<sub>g</sub>", lambda run: run.final_test_error),
    SortKey("max-abs-z", "max |z|", lambda run: run.test_metric("max_abs_z")),
    SortKey("rms-z", "rms z", lambda run: run.test_metric("rms_z")),
    SortKey("within-2sem", "within 2 SEM", lambda run: run.test_metric("frac_within_2sem")),
    SortKey("max-rel-err", "max rel. err.", lambda run: run.test_metric("max_rel_err")),
    SortKey("final-rel-err", "final rel. err.", lambda run: run.test_metric("final_rel_err")),
    SortKey("divergence-t", "departs at t", lambda run: run.test_metric("divergence_t")),
)


def page_name(sort: SortKey, descending: bool) -> str:
    if sort.slug == "run-id" and not descending:
        return "index.html"
    return f"index-by-{sort.slug}-{'down' if descending else 'up'}.html"


def ordered(runs: Sequence[RunEntry], sort: SortKey, descending: bool) -> list[RunEntry]:
    """Runs in the given order; runs without a finite value always come last."""
    if not sort.numeric:
        return sorted(runs, key=lambda run: str(sort.value(run)), reverse=descending)
    with_value = [run for run in runs if math.isfinite(float(sort.value(run)))]
    without = [run for run in runs if not math.isfinite(float(sort.value(run)))]
    with_value.sort(key=lambda run: (float(sort.value(run)), run.run_id), reverse=descending)
    return with_value + sorted(without, key=lambda run: run.run_id)


# ---------------------------------------------------------------------------------------
# HTML
# ---------------------------------------------------------------------------------------

STYLE = """
:root { --ink:#1f1f1f; --muted:#6b6b6b; --rule:#dcdcdc; --sim:#1d5a85; --theory:#d9731a;
        --agree:#2f6b35; --agree-bg:#e3f0e1; --disagree:#9b2c2c; --disagree-bg:#f6e0dc;
        --none:#555; --none-bg:#ececec; --open:#7a5a00; --open-bg:#f7edcf; }
* { box-sizing: border-box; }
body { margin: 0 auto; max-width: 1180px; padding: 18px 22px 60px; color: var(--ink);
       font: 14px/1.45 "DejaVu Sans", "Helvetica Neue", Arial, sans-serif; background: #fff; }
h1 { font-size: 22px; margin: 0 0 4px; }
h2 { font-size: 18px; margin: 34px 0 8px; padding-bottom: 4px; border-bottom: 2px solid var(--ink); }
h3 { font-size: 15px; margin: 0 0 6px; font-family: "DejaVu Sans Mono", monospace; word-break: break-all; }
a { color: var(--sim); }
code, .mono { font-family: "DejaVu Sans Mono", monospace; font-size: 12.5px; }
.lede { color: var(--muted); margin: 0 0 10px; }
nav { margin: 6px 0; font-size: 13px; }
nav span.order, nav > a { display: inline-block; margin: 2px 4px 2px 0; padding: 1px 7px;
       border: 1px solid var(--rule); border-radius: 3px; text-decoration: none; white-space: nowrap; }
nav span.order a, nav span.order b { text-decoration: none; padding: 0 3px; }
nav span.order b.current { background: var(--ink); color: #fff; border-radius: 2px; }
table { border-collapse: collapse; font-size: 13px; }
th, td { padding: 3px 8px; text-align: right; border-bottom: 1px solid var(--rule); vertical-align: top; }
th { font-weight: 600; border-bottom: 1.5px solid var(--ink); white-space: nowrap; }
th.text, td.text { text-align: left; }
th a.sort { text-decoration: none; color: var(--muted); padding: 0 1px; }
th a.sort.current { color: var(--ink); }
tbody tr:hover { background: #f6f6f6; }
.scroll { overflow-x: auto; margin-bottom: 8px; }
.overview td.mono { white-space: nowrap; }
.overview th { white-space: normal; min-width: 4.5em; }
.overview th.text { min-width: 0; }
.overview th .key { font-family: "DejaVu Sans Mono", monospace; font-weight: 600; font-size: 12px; }
.badge { display: inline-block; padding: 0 7px; border-radius: 9px; font-size: 12px; font-weight: 600;
         font-family: "DejaVu Sans", Arial, sans-serif; white-space: nowrap; }
.badge.agree, .badge.consistent { color: var(--agree); background: var(--agree-bg); }
.badge.disagree, .badge.inconsistent { color: var(--disagree); background: var(--disagree-bg); }
.badge.none { color: var(--none); background: var(--none-bg); }
.badge.inconclusive { color: var(--open); background: var(--open-bg); }
article { border-top: 1px solid var(--rule); padding: 16px 0 10px; }
.scenario { color: var(--muted); margin: 0 0 8px; font-size: 13px; }
.scenario b { color: var(--ink); font-weight: 600; }
.figures { display: flex; flex-wrap: wrap; gap: 14px; margin: 6px 0 8px; }
.figures figure { margin: 0; }
.figures img { width: 480px; max-width: 100%; height: auto; border: 1px solid #eee; display: block; }
.figures figcaption { font-size: 12px; color: var(--muted); }
.note { color: var(--disagree); font-size: 13px; }
details { margin: 6px 0; }
summary { cursor: pointer; color: var(--sim); font-size: 13px; }
details table { margin: 4px 0 4px 14px; }
.columns { display: flex; flex-wrap: wrap; gap: 6px 36px; }
.empty { color: var(--muted); font-style: italic; }
footer { margin-top: 40px; color: var(--muted); font-size: 12px; }
"""


def _e(text: object) -> str:
    return html.escape(str(text), quote=True)


def _fmt(value: object, digits: int = 3) -> str:
    if value is None:
        return "–"
    if isinstance(value, (bool, np.bool_)):
        return "true" if value else "false"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        number = float(value)
        if not math.isfinite(number):
            return "–"
        if number == 0 or 1e-3 <= abs(number) < 1e5:
            return f"{number:.{digits}g}"
        return f"{number:.{max(digits - 1, 1)}e}"
    if isinstance(value, (list, tuple, dict)):
        return json.dumps(value)
    return str(value)


def _href(path: Path, root: Path) -> str:
    return quote(os.path.relpath(path, root).replace(os.sep, "/"))


def _anchor(prefix: str, name: str) -> str:
    return f"{prefix}-" + re.sub(r"[^A-Za-z0-9_.-]+", "_", name)


def _badge(verdict: str) -> str:
    css = {
        "agree": "agree",
        "disagree": "disagree",
        "inconclusive": "inconclusive",
        "consistent": "consistent",
        "inconsistent": "inconsistent",
    }.get(verdict, "none")
    return f'<span class="badge {css}">{_e(verdict)}</span>'


def varying_keys(runs: Sequence[RunEntry]) -> list[str]:
    """Scenario keys set in every run whose value differs between runs, in file order.

    A key missing from some runs (written before the scenario schema grew) is not counted:
    it says when a run was made, not what was varied.
    """
    if len(runs) < 2:
        return []
    keys = [key for key in runs[0].scenario if all(key in run.scenario for run in runs[1:])]
    return [key for key in keys if len({json.dumps(run.scenario[key], default=str) for run in runs}) > 1]


def png_size(path: Path) -> tuple[int, int] | None:
    """Width and height in pixels from a PNG's header (its IHDR chunk), or None if it is not a PNG.

    PNG specification (W3C, 2003), sections 5.2-5.3 and 11.2.2: an 8-byte signature, then
    the IHDR chunk whose data starts with the width and height as 4-byte big-endian integers.
    """
    try:
        with open(path, "rb") as stream:
            head = stream.read(24)
    except OSError:
        return None
    if len(head) < 24 or head[:8] != b"\x89PNG\r\n\x1a\n" or head[12:16] != b"IHDR":
        return None
    return int.from_bytes(head[16:20], "big"), int.from_bytes(head[20:24], "big")


def _figure_html(files: dict[str, Path], root: Path, captions: dict[str, str]) -> str:
    items = []
    for name, png in files.items():
        pdf = png.with_suffix(".pdf")
        # width and height let the browser reserve each lazily loaded image's box (its aspect
        # ratio) before the file arrives, so the page does not shift as images load; the style
        # sheet still sets the shown width.
        size = png_size(png)
        box = f' width="{size[0]}" height="{size[1]}"' if size else ""
        image = f'<img src="{_href(png, root)}" alt="{_e(captions.get(name, name))}"{box} loading="lazy">'
        if pdf.is_file():
            image = f'<a href="{_href(pdf, root)}" title="vector PDF">{image}</a>'
        items.append(f"<figure>{image}<figcaption>{_e(captions.get(name, name))}</figcaption></figure>")
    return f'<div class="figures">{"".join(items)}</div>' if items else ""


METRIC_HEADERS = (
    ("max_abs_z", "max |z|"),
    ("rms_z", "rms z"),
    ("frac_within_2sem", "within 2 SEM"),
    ("max_rel_err", "max rel. err."),
    ("final_rel_err", "final rel. err."),
    ("divergence_t", "departs at t"),
)
OBSERVABLE_HTML = {
    "test_error": "test error ε<sub>g</sub>",
    "overlap_error": "ε<sub>g</sub>(Q, R, T) of simulation",
}


def _metrics_table(metrics: pd.DataFrame, names: Sequence[str]) -> str:
    rows = []
    for name in names:
        row = metrics[metrics["observable"] == name]
        if row.empty:
            continue
        cells = "".join(f"<td>{_metric_text(column, row[column].iloc[0])}</td>" for column, _ in METRIC_HEADERS)
        label = OBSERVABLE_HTML.get(name, f"<code>{_e(name)}</code>")
        rows.append(f'<tr><td class="text">{label}</td>{cells}</tr>')
    if not rows:
        return ""
    head = "".join(f"<th>{_e(label)}</th>" for _, label in METRIC_HEADERS)
    return _table(f'<th class="text">observable</th>{head}', rows)


def _table(head_cells: str, rows: Sequence[str], css: str = "") -> str:
    css_attr = f' class="{css}"' if css else ""
    return f"<table{css_attr}><thead><tr>{head_cells}</tr></thead><tbody>{''.join(rows)}</tbody></table>"


def _details(summary: str, content: str) -> str:
    """Collapsed block; <details> opens without JavaScript."""
    return f"<details><summary>{_e(summary)}</summary>{content}</details>"


def _metric_text(column: str, value: object) -> str:
    if column.endswith("divergence_t") and not math.isfinite(float(value)):  # type: ignore[arg-type]
        return "never"
    return _e(_fmt(value))


def _key_value_table(items: Iterable[tuple[str, object]]) -> str:
    rows = "".join(
        f'<tr><td class="text mono">{_e(k)}</td><td class="text mono">{_e(_fmt(v, 6))}</td></tr>' for k, v in items
    )
    return f"<table><tbody>{rows}</tbody></table>"


def _run_card(run: RunEntry, root: Path, varying: Sequence[str]) -> str:
    headline = [key for key in run.scenario if key in varying or key.rsplit(".", 1)[-1] in HEADLINE_KEY_ENDINGS]
    scenario_line = (
        " · ".join(
            (
                f"<b>{_e(key)} = {_e(_fmt(run.scenario[key]))}</b>"
                if key in varying
                else f"{_e(key)} = {_e(_fmt(run.scenario[key]))}"
            )
            for key in headline
        )
        or '<span class="empty">no scenario.toml</span>'
    )
    figure_block = _figure_html(
        run.figure_files,
        root,
        {
            "learning_curve": "learning curve and z residuals",
            "order_parameters": "order parameters",
        },
    )
    note = f'<p class="note">{_e(run.figure_note)}</p>' if run.figure_note else ""
    main_names = ["test_error", "overlap_error"]
    other_names = [name for name in run.metrics["observable"] if name not in main_names]
    others = _metrics_table(run.metrics, other_names)
    diverged = run.manifest.get("diverged_seeds") or []
    manifest_items = [
        ("seeds", run.manifest.get("seeds")),
        ("diverged seeds", diverged),
        ("start time", run.manifest.get("started")),
        (
            "backend / dtype",
            f"{run.manifest.get('jax_backend', '?')} / {run.manifest.get('dtype', '?')}",
        ),
    ]
    manifest_items += [(f"timings.{k}", v) for k, v in (run.manifest.get("timings") or {}).items()]
    diverged_note = (
        f'<p class="note">{len(diverged)} diverged seed(s): {_e(_fmt(list(diverged)))}</p>' if diverged else ""
    )
    folder = _href(run.path, root)
    return f"""
<article id="{_anchor("run", run.run_id)}" class="run">
<h3>{_e(run.run_id)} {_badge(run.verdict)}</h3>
<p class="scenario">{scenario_line}</p>
{diverged_note}{_verdict_html(run.judgement)}{_landmarks_html(run.judgement)}{figure_block}{note}
{_metrics_table(run.metrics, main_names)}
{_details(f"metrics of every order parameter ({len(other_names)})", others) if others else ""}
<div class="columns">
<details><summary>full scenario</summary>{_key_value_table(run.scenario.items())}</details>
<details><summary>manifest</summary>{_key_value_table(manifest_items)}</details>
</div>
<p class="scenario">folder: <a href="{folder}/">{_e(os.path.relpath(run.path, root))}/</a></p>
</article>"""


VERDICT_HEADERS = (
    ("worst_ratio", "largest |diff| / margin"),
    ("reach", "band reaches (× margin)"),
    ("detected_t", "difference detectable from t"),
    ("departs_t", "shown beyond margin from t"),
    ("seeds_needed", "seeds to settle"),
)


def _verdict_html(judgement: dict | None) -> str:
    """The run's verdict per observable group (judgement.json), its settings and its gaps."""
    if not judgement:
        return ""
    rows = []
    for group in judgement["groups"]:
        cells = "".join(f"<td>{_e(_fmt(group.get(key)))}</td>" for key, _ in VERDICT_HEADERS)
        rows.append(f'<tr><td class="text">{_e(group["group"])}</td><td class="text">{_badge(group["verdict"])}</td>'
                    f"{cells}</tr>")
    head = '<th class="text">group</th><th class="text">verdict</th>' + "".join(
        f"<th>{_e(label)}</th>" for _, label in VERDICT_HEADERS)
    settings = (
        f"margin {_fmt(judgement['margin'])} × an error's value at each time (at least {_fmt(judgement['floor'])} × "
        f"its largest) and × an order-parameter group's largest size; "
        f"{_fmt(100 * (1 - judgement['alpha']))} % simultaneous band, c = {_fmt(judgement['band_factor'])} "
        f"({_e(judgement['band_method'])})"
    )
    if judgement["verdict"] == "inconclusive":
        needed = judgement.get("seeds_needed")
        settings += "; " + ("no number of seeds would settle it at this margin" if needed is None
                            else f"about {int(needed)} seeds would settle it")
    gaps = "".join(f"<li>{_e(line)}</li>" for line in describe_gaps(judgement.get("gaps") or {}))
    return (f'<div class="verdict">{_table(head, rows)}<p class="scenario">{_e(settings)}</p>'
            + (f'<ul class="scenario">{gaps}</ul>' if gaps else "") + "</div>")


def _landmarks_html(judgement: dict | None) -> str:
    """A small table of the run's landmarks (judgement.json's landmarks, harness.results.paired_landmarks)."""
    section = (judgement or {}).get("landmarks")
    if not section:
        return ""

    def interval(row: dict, side: str) -> str:
        low, high = row.get(f"{side}_low"), row.get(f"{side}_high")
        bounds = f" [{_fmt(low)}, {_fmt(high)}]" if low is not None and high is not None else ""
        return _e(_fmt(row.get(f"{side}_mean")) + bounds)

    rows = []
    for row in section["table"]:
        if not (row["sim_seeds"] or row["theory_seeds"]):
            continue
        band = f" ± {_fmt(row['band'])}" if row.get("band") is not None else ""
        difference = _e(f"{_fmt(row['diff_mean'])}{band}") if row.get("diff_mean") is not None else "–"
        rows.append(
            f'<tr><td class="text">{_e(row["landmark"])}</td><td class="text">{_badge(row["verdict"])}</td>'
            f"<td>{interval(row, 'sim')}</td><td>{interval(row, 'theory')}</td><td>{difference}</td>"
            f"<td>{_e(_fmt(row['margin']))}</td><td>{row['sim_seeds']}/{row['theory_seeds']}</td>"
            f'<td class="text">{_e(row["presence"])}</td></tr>'
        )
    head = ('<th class="text">landmark</th><th class="text">verdict</th><th>simulation [95 %]</th>'
            '<th>theory [95 %]</th><th>theory − sim. ± band</th><th>margin</th><th>seeds sim/th</th>'
            '<th class="text">found in</th>')
    note = (f"landmarks of {section['options']['error']}, seed by seed: landmark verdict "
            f"{section['verdict']}; margin {_fmt(section['margin'])} × the simulated landmark, "
            f"{_fmt(100 * (1 - section['alpha']))} % simultaneous band ({section['band_method']}); "
            "it does not change the run's verdict")
    warning = f'<p class="note">{_e(section["sampling_warning"])}</p>' if section.get("sampling_warning") else ""
    return f'<div class="verdict">{_table(head, rows)}<p class="scenario">{_e(note)}</p>{warning}</div>'


def _short_keys(keys: Sequence[str]) -> dict[str, str]:
    """Column labels for scenario keys: the last part when that is unambiguous, else the full key."""
    endings = [key.rsplit(".", 1)[-1] for key in keys]
    return {key: (end if endings.count(end) == 1 else key) for key, end in zip(keys, endings, strict=False)}


def _overview(runs: Sequence[RunEntry], varying: Sequence[str], current: tuple[str, bool]) -> str:
    def header(sort: SortKey, css: str = "") -> str:
        links = []
        for descending, arrow, words in ((False, "▲", "ascending"), (True, "▼", "descending")):
            active = (sort.slug, descending) == current
            links.append(
                f'<a class="sort{" current" if active else ""}" href="{page_name(sort, descending)}" '
                f'title="sort by {_e(re.sub("<[^>]+>", "", sort.label_html))}, {words}">{arrow}</a>'
            )
        return f'<th class="{css}">{sort.label_html} {"".join(links)}</th>'

    by_slug = {sort.slug: sort for sort in SORT_KEYS}
    # Run, verdict and the sortable metrics first; the scenario keys that differ follow
    # (at most OVERVIEW_KEYS of them; every run card lists its full scenario).
    shown = list(varying)[:OVERVIEW_KEYS]
    heads = [header(by_slug["run-id"], "text"), '<th class="text">verdict</th>']
    heads += [header(sort) for sort in SORT_KEYS[1:]]
    heads += [
        f'<th class="text" title="{_e(key)}"><span class="key">{_e(label)}</span></th>'
        for key, label in _short_keys(shown).items()
    ]
    body = []
    for run in runs:
        cells = [f'<td class="text mono"><a href="#{_anchor("run", run.run_id)}">{_e(run.run_id)}</a></td>']
        cells.append(f'<td class="text">{_badge(run.verdict)}</td>')
        for sort in SORT_KEYS[1:]:
            cells.append(f"<td>{_metric_text(sort.slug.replace('-', '_'), float(sort.value(run)))}</td>")
        cells += [f'<td class="text mono">{_e(_fmt(run.scenario.get(key)))}</td>' for key in shown]
        body.append(f"<tr>{''.join(cells)}</tr>")
    return f'<div class="scroll">{_table("".join(heads), body, css="overview")}</div>'


def _pm_html(value: object, error: object) -> str:
    try:
        mantissa, spread, exponent = figures.value_with_error(float(value), float(error))  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return _e(f"{value} ± {error}")
    if not spread:
        return _e(mantissa)
    if exponent is None:
        return f"{_e(mantissa)} ± {_e(spread)}"
    return f"({_e(mantissa)} ± {_e(spread)}) × 10<sup>{exponent}</sup>"


def _sentences(value: object) -> str:
    """A verdict.json text field as prose: a list (the scaling advice) joined with semicolons."""
    if isinstance(value, (list, tuple)):
        return "; ".join(str(item) for item in value)
    return str(value)


def _scaling_section(entries: Sequence[ScalingEntry], root: Path) -> str:
    if not entries:
        return '<p class="empty">No finite-size-scaling results in this folder.</p>'
    parts = []
    for entry in entries:
        v = entry.verdict
        name = os.path.relpath(entry.path, root)
        if v.get("kind") == "landmark":
            parts.append(_landmark_scaling_html(entry, root))
            continue
        rows = [
            ("exponent b", _pm_html(v["exponent"], v["exponent_err"])),
            ("offset c", _pm_html(v["offset"], v["offset_err"])),
            ("amplitude a", _pm_html(v["amplitude"], v["amplitude_err"])),
            ("sizes N", _e(", ".join(_fmt(n) for n in v["sizes"]))),
        ]
        table = "".join(f'<tr><td class="text">{_e(k)}</td><td class="text mono">{val}</td></tr>' for k, val in rows)
        note = f'<p class="note">{_e(entry.figure_note)}</p>' if entry.figure_note else ""
        # verdict.json from `harness scale` also says why and what to do next; show it when present.
        explanation = "".join(f" · {_e(_sentences(v[key]))}" for key in ("reason", "advice") if v.get(key))
        parts.append(
            f"""<article id="{_anchor("scaling", name)}">
<h3>{_e(name)} {_badge(str(v["verdict"]))}</h3>
<p class="scenario">gap fitted as a N<sup>−b</sup> + c{explanation}</p>
<table><tbody>{table}</tbody></table>
{_figure_html(entry.figure_files, root, {"scaling": "gap against N with the fitted law"})}{note}
</article>"""
        )
    return "".join(parts)


def _landmark_scaling_html(entry: ScalingEntry, root: Path) -> str:
    """A landmark across sizes (harness.studies.landmark_scaling): the table per size and the growth."""
    v = entry.verdict
    name = os.path.relpath(entry.path, root)

    def interval(side: str, i: int) -> str:
        return _e(f"{_fmt(v[f'{side}_means'][i])} [{_fmt(v[f'{side}_lows'][i])}, {_fmt(v[f'{side}_highs'][i])}]")

    rows = []
    for i, size in enumerate(v["sizes"]):
        item = v["items"][i]
        rows.append(
            f"<tr><td>{_e(_fmt(size))}</td><td>{interval('sim', i)}</td><td>{interval('theory', i)}</td>"
            f"<td>{_e(_fmt(item['mean']))} ± {_e(_fmt(item['half_width']))}</td><td>{_e(_fmt(item['delta']))}</td>"
            f'<td class="text">{_e(v["presence"][i])}</td><td class="text">{_badge(item["verdict"])}</td></tr>'
        )
    growth = v["growth"]
    rows.append(
        f'<tr><td class="text">growth per e-fold of N</td><td></td><td></td>'
        f"<td>{_e(_fmt(growth['difference']))} ± {_e(_fmt(growth['band']))}</td><td>{_e(_fmt(growth['margin']))}</td>"
        f'<td></td><td class="text">{_badge(growth["verdict"])}</td></tr>'
    )
    head = ("<th>N</th><th>simulation [95 %]</th><th>theory [95 %]</th><th>theory − sim. ± band</th><th>margin</th>"
            '<th class="text">found in</th><th class="text">verdict</th>')
    laws = "; ".join(
        f"{side}: {law['law']} with " + ", ".join(f"{k} = {_fmt(val)}" for k, val in law["params"].items())
        for side, fits in (v.get("fits") or {}).items() for law in fits.values()
    )
    explanation = "".join(f" · {_e(v[key])}" for key in ("reason", "advice") if v.get(key))
    note = f'<p class="note">{_e(entry.figure_note)}</p>' if entry.figure_note else ""
    return f"""<article id="{_anchor("scaling", name)}">
<h3>{_e(name)} {_badge(str(v["verdict"]))}</h3>
<p class="scenario">{_e(v["landmark"])} across sizes: theory against simulation at each N and in its growth\
{explanation}</p>
{_table(head, rows)}<p class="scenario">{_e(laws)}</p>
{_figure_html(entry.figure_files, root, {"scaling": "the landmark against N with its fitted growth"})}{note}
</article>"""


def _sweep_section(entries: Sequence[SweepEntry], root: Path, run_ids: set[str]) -> str:
    if not entries:
        return '<p class="empty">No sweep results in this folder.</p>'
    parts = []
    for entry in entries:
        name = os.path.relpath(entry.path, root)
        metric_columns = [
            figures.SWEEP_METRICS[m][0]
            for m in figures.SWEEP_METRICS
            if figures.SWEEP_METRICS[m][0] in entry.runs.columns
        ]
        columns = ["run_id", *entry.swept_keys, *metric_columns]
        head = "".join(f'<th class="{"text" if c == "run_id" else ""}">{_e(c)}</th>' for c in columns)
        body = []
        for _, row in entry.runs.sort_values(entry.swept_keys).iterrows():
            run_id = str(row["run_id"])
            first = f'<a href="#{_anchor("run", run_id)}">{_e(run_id)}</a>' if run_id in run_ids else _e(run_id)
            cells = [f'<td class="text mono">{first}</td>']
            for column in columns[1:]:
                cells.append(f"<td>{_metric_text(column, row[column])}</td>")
            body.append(f"<tr>{''.join(cells)}</tr>")
        missing = (
            f'<p class="note">{entry.missing_runs} run(s) of this sweep have no row in runs.parquet.</p>'
            if entry.missing_runs
            else ""
        )
        captions = {m: SWEEP_CAPTIONS.get(m, m) for m in entry.figure_files}
        note = f'<p class="note">{_e(entry.figure_note)}</p>' if entry.figure_note else ""
        parts.append(
            f"""<article id="{_anchor("sweep", name)}">
<h3>{_e(name)}</h3>
<p class="scenario">swept: {_e(", ".join(entry.swept_keys))} · {len(entry.runs)} run(s)</p>
{missing}{_figure_html(entry.figure_files, root, captions)}{note}
{_details(f"table of runs ({len(entry.runs)})", _table(head, body))}
</article>"""
        )
    return "".join(parts)


def render_page(results: ResultsFolder, sort: SortKey, descending: bool, generated: str) -> str:
    """One complete HTML page with the runs in the given order."""
    root = results.root
    runs = ordered(results.runs, sort, descending)
    varying = varying_keys(results.runs)
    counts = {verdict: sum(run.verdict == verdict for run in results.runs) for verdict in VERDICTS}
    order_words = f"{re.sub('<[^>]+>', '', sort.label_html)}, {'descending' if descending else 'ascending'}"
    sort_links = []
    for key in SORT_KEYS:
        arrows = []
        for desc, arrow, words in ((False, "▲", "ascending"), (True, "▼", "descending")):
            if (key.slug, desc) == (sort.slug, descending):
                arrows.append(f'<b class="current" title="current order">{arrow}</b>')
            else:
                arrows.append(f'<a href="{page_name(key, desc)}" title="{words}">{arrow}</a>')
        sort_links.append(f'<span class="order">{key.label_html} {"".join(arrows)}</span>')
    runs_html = (
        _overview(runs, varying, (sort.slug, descending)) + "".join(_run_card(run, root, varying) for run in runs)
        if runs
        else '<p class="empty">No run folders in this folder.</p>'
    )
    title = f"Results: {root.resolve().name}"
    tally = ", ".join(f"{counts[v]} {v}" for v in VERDICTS if counts[v] or v != "n/a")
    run_ids = {run.run_id for run in results.runs}
    skipped = (
        '<section id="skipped"><h2>Skipped</h2><ul class="note">'
        + "".join(f"<li>{_e(problem)}</li>" for problem in results.problems)
        + "</ul></section>"
        if results.problems
        else ""
    )
    return f"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{_e(title)}</title>
<style>{STYLE}</style>
</head>
<body>
<header>
<h1>{_e(title)}</h1>
<p class="lede">{len(results.runs)} run(s): {tally}
(agree: the simultaneous band of theory − simulation lies within each run's margin at every time;
disagree: wholly outside it at some time; inconclusive: neither is shown) ·
{len(results.scalings)} finite-size-scaling result(s) · {len(results.sweeps)} sweep(s).
Runs ordered by {_e(order_words)}; runs without a value come last.</p>
<nav>Sort runs by: {" ".join(sort_links)}</nav>
<nav>Sections: <a href="#runs">runs</a> <a href="#scaling">finite-size scaling</a> <a href="#sweeps">sweeps</a></nav>
</header>
<main>
{skipped}<section id="runs"><h2>Runs</h2>{runs_html}</section>
<section id="scaling"><h2>Finite-size scaling</h2>{_scaling_section(results.scalings, root)}</section>
<section id="sweeps"><h2>Sweeps</h2>{_sweep_section(results.sweeps, root, run_ids)}</section>
</main>
<footer>Written by harness report at {_e(generated)} from the tables in this folder.
Figures link to their vector PDFs.</footer>
</body>
</html>
"""


def write_report(root: Path, *, draw_figures: bool = True) -> list[Path]:
    """Write DIR/index.html and one page per sort order; return the pages written (index first)."""
    results = collect(Path(root), draw_figures=draw_figures)
    generated = datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC")
    written = []
    for sort in SORT_KEYS:
        for descending in (False, True):
            target = Path(root) / page_name(sort, descending)
            atomic_write_text(target, render_page(results, sort, descending, generated))
            written.append(target)
    index = Path(root) / "index.html"
    return [index] + [path for path in written if path != index]
