"""The results page: valid HTML, every referenced file exists, every run listed, sortable w/o JS."""

from __future__ import annotations

import argparse
import html
import json
import os
import re
import shutil
from html.parser import HTMLParser
from pathlib import Path
from urllib.parse import unquote

import pandas as pd
import pytest
from conftest_figures import write_run_folder, write_scaling_folder, write_sweep_folder

from harness.cli.figure import add_figure_commands
from harness.plot import report

VOID_ELEMENTS = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source", "track", "wbr"}


class PageReader(HTMLParser):
    """Collects references, ids and tag nesting errors while parsing."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.images: list[str] = []
        self.image_boxes: dict[str, tuple[str | None, str | None]] = {}
        self.links: list[str] = []
        self.ids: list[str] = []
        self.tags: set[str] = set()
        self.open: list[str] = []
        self.nesting_errors: list[str] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        attributes = dict(attrs)
        self.tags.add(tag)
        if tag == "img":
            self.images.append(attributes["src"])
            self.image_boxes[attributes["src"]] = (attributes.get("width"), attributes.get("height"))
        if tag == "a" and "href" in attributes:
            self.links.append(attributes["href"])
        if "id" in attributes:
            self.ids.append(attributes["id"])
        if tag not in VOID_ELEMENTS:
            self.open.append(tag)

    def handle_endtag(self, tag):
        if not self.open or self.open[-1] != tag:
            self.nesting_errors.append(f"</{tag}> closes <{self.open[-1] if self.open else None}>")
            return
        self.open.pop()

    def handle_data(self, data):
        self.text.append(data)


def read_page(path: Path) -> PageReader:
    reader = PageReader()
    reader.feed(path.read_text(encoding="utf-8"))
    reader.close()
    return reader


@pytest.fixture(scope="module")
def results(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("results")
    write_run_folder(root, "run-agree", seeds=16, input_dim=4000, rng_seed=1, times=24)
    write_run_folder(root, "run-few-seeds", seeds=3, rng_seed=4, times=24)
    write_run_folder(root, "run-departs", theory_bias=0.4, seeds=6, rng_seed=2, times=24, learning_rate=1.5)
    write_scaling_folder(root, "scaling_erf")
    sweep = write_sweep_folder(root, "sweep_lr", swept={"sgd.learning_rate": [0.5, 1.0, 2.0]})
    # A run nested inside the sweep folder (as `harness sweep` writes them) is found too; its
    # name needs escaping in HTML and in URLs.
    write_run_folder(sweep, "run=odd name", students=3, train_second_layer=True, rng_seed=3, times=16)
    report.write_report(root)
    return root


def run_ids_in(path: Path) -> list[str]:
    """Run ids in the order of the run cards on the page."""
    cards = re.findall(r'<article id="run-[^"]*" class="run">\s*<h3>([^<]*?) <span', path.read_text(encoding="utf-8"))
    return [html.unescape(card) for card in cards]


def test_page_parses_and_is_well_nested(results):
    page = read_page(results / "index.html")
    assert page.nesting_errors == []
    assert page.open == []
    assert {"html", "head", "body", "table", "img", "style"} <= page.tags


def test_every_referenced_file_exists(results):
    for html_page in results.glob("index*.html"):
        page = read_page(html_page)
        assert page.images, html_page
        for source in page.images:
            assert (results / unquote(source)).is_file(), source
            assert source.endswith(".png") and not source.startswith("/")
        for href in page.links:
            if href.startswith("#"):
                assert href[1:] in page.ids, href
            else:
                assert (results / unquote(href)).exists(), href


def test_every_image_declares_its_size(results):
    # width and height on each <img> let the browser reserve the box of a lazily loaded figure,
    # so the page does not shift while it loads. Reference for the size: Pillow reads the PNG.
    from PIL import Image  # matplotlib depends on Pillow

    page = read_page(results / "index.html")
    for source, (width, height) in page.image_boxes.items():
        with Image.open(results / unquote(source)) as image:
            assert (width, height) == (str(image.width), str(image.height)), source
    assert report.png_size(results / "index.html") is None  # not a PNG: no size claimed


def test_scaling_advice_reads_as_prose(tmp_path):
    # verdict.json stores the advice of an inconclusive scaling as a list of sentences
    # (harness.studies.scaling); the page used to print the Python list literal.
    folder = write_scaling_folder(tmp_path, "scaling_advice")
    verdict = json.loads((folder / "verdict.json").read_text())
    verdict.update(verdict="inconclusive", reason="the offset is neither resolved nor excluded",
                   advice=["12-40 seeds at every size (now 4) would settle it", "adding N = 3200 would settle it"])
    (folder / "verdict.json").write_text(json.dumps(verdict))
    report.write_report(tmp_path, draw_figures=False)
    text = " ".join(" ".join(read_page(tmp_path / "index.html").text).split())
    assert ("the offset is neither resolved nor excluded · 12-40 seeds at every size (now 4) would settle it; "
            "adding N = 3200 would settle it") in text
    assert "['" not in text and "']" not in text


def test_every_run_scaling_and_sweep_is_listed(results):
    text = " ".join(read_page(results / "index.html").text)
    for run_id in ("run-agree", "run-departs", "run=odd name"):
        assert run_id in text
    assert "scaling_erf" in text and "sweep_lr" in text
    ids = read_page(results / "index.html").ids
    assert {"runs", "scaling", "sweeps"} <= set(ids)
    # Figures were drawn because they were missing.
    for run in ("run-agree", "run-departs", "sweep_lr/run=odd name"):
        assert (results / run / "figures" / "learning_curve.png").is_file()
        assert (results / run / "figures" / "order_parameters.pdf").is_file()
    assert (results / "scaling_erf" / "figures" / "scaling.png").is_file()
    assert (results / "sweep_lr" / "figures" / "sweep_max_abs_z.png").is_file()


def test_verdicts_are_the_stored_judgements(results):
    # Written down, not recomputed: 16 seeds of a theory that tracks its simulation within
    # ~1 % agree within the 5 % margin; 3 seeds of the same cannot show it (inconclusive);
    # a theory 40 % above its simulation late in training disagrees.
    expected = {"run-agree": "agree", "run-few-seeds": "inconclusive", "run-departs": "disagree"}
    page = (results / "index.html").read_text(encoding="utf-8")
    for run, verdict in expected.items():
        assert json.loads((results / run / "judgement.json").read_text())["verdict"] == verdict
        card = re.search(rf'<h3>{re.escape(html.escape(run))} <span class="badge (\w+)">', page)
        assert card is not None and card.group(1) == verdict, run
    counts = re.search(r"(\d+) run\(s\): (\d+) agree, (\d+) disagree, (\d+) inconclusive", page)
    assert counts is not None and counts.group(2) == "1" and counts.group(3) == "1"


def test_no_scripts_and_nothing_external(results):
    for html_page in results.glob("index*.html"):
        source = html_page.read_text(encoding="utf-8")
        page = read_page(html_page)
        assert "script" not in page.tags and "<script" not in source.lower()
        assert "link" not in page.tags  # no external style sheets or fonts
        assert not re.search(r"\son[a-z]+\s*=", source)  # no inline event handlers
        assert "@import" not in source and "url(" not in source
        for reference in page.images + page.links:
            assert not re.match(r"^(?:[a-z]+:|//)", reference), reference


def test_sort_pages_order_runs_by_metric(results):
    metrics = {
        run: float(
            pd.read_parquet(results / run / "metrics.parquet").set_index("observable").loc["test_error", "max_abs_z"]
        )
        for run in ("run-agree", "run-few-seeds", "run-departs", "sweep_lr/run=odd name")
    }
    by_name = {Path(run).name: value for run, value in metrics.items()}
    descending = run_ids_in(results / "index-by-max-abs-z-down.html")
    ascending = run_ids_in(results / "index-by-max-abs-z-up.html")
    assert descending == sorted(by_name, key=lambda run: -by_name[run])
    assert ascending == list(reversed(descending))
    assert run_ids_in(results / "index.html") == sorted(by_name)
    # Every sort page is linked from the top of the index.
    index_links = set(read_page(results / "index.html").links)
    for sort in report.SORT_KEYS:
        for descending_order in (False, True):
            name = report.page_name(sort, descending_order)
            assert (results / name).is_file()
            assert name in index_links or name == "index.html"


def test_never_departing_runs_sort_last(results):
    values = {
        path.name: float(
            pd.read_parquet(path / "metrics.parquet").set_index("observable").loc["test_error", "divergence_t"]
        )
        for path in (results / "run-agree", results / "run-departs", results / "sweep_lr" / "run=odd name")
    }
    assert values["run-departs"] == values["run-departs"], "the fixture's biased theory must depart"
    for page in ("index-by-divergence-t-down.html", "index-by-divergence-t-up.html"):
        order = [run for run in run_ids_in(results / page) if run in values]
        finite = [run for run in order if values[run] == values[run]]
        assert order[: len(finite)] == finite  # NaN ("never") after every finite time
        assert sorted(finite, key=values.get, reverse=page.endswith("down.html")) == finite


def test_report_is_atomic_and_refreshes_stale_figures(results, tmp_path):
    root = tmp_path / "copy"
    shutil.copytree(results, root)
    png = root / "run-agree" / "figures" / "learning_curve.png"
    before = png.stat().st_mtime
    summary = root / "run-agree" / "summary.parquet"
    later = before + 10
    os.utime(summary, (later, later))
    report.write_report(root)
    assert png.stat().st_mtime > before
    # the index lock beside runs.parquet is the store's own, not a leftover
    leftovers = [p.name for p in root.rglob("*") if p.name.startswith(".") and p.is_file() and p.name != ".runs.lock"]
    assert leftovers == []


def _report_cli(*argv: str) -> int:
    parser = argparse.ArgumentParser(prog="harness")
    add_figure_commands(parser.add_subparsers(dest="command", required=True))
    args = parser.parse_args(["report", *argv])
    return args.handler(args)


def test_report_command_bad_input(tmp_path, capsys):
    assert _report_cli(str(tmp_path / "missing")) == 2
    error = capsys.readouterr().err
    assert error.count("\n") == 1 and "missing" in error and "not a folder" in error
    (tmp_path / "empty").mkdir()
    assert _report_cli(str(tmp_path / "empty")) == 2
    error = capsys.readouterr().err
    assert error.count("\n") == 1 and "no results found" in error
    assert not (tmp_path / "empty" / "index.html").exists()


def test_report_command_without_drawing(tmp_path, capsys):
    write_run_folder(tmp_path, "run-only", times=12)
    assert _report_cli(str(tmp_path), "--keep-figures") == 0
    assert capsys.readouterr().out.strip() == str(tmp_path / "index.html")
    page = read_page(tmp_path / "index.html")
    assert page.images == []  # nothing drawn, nothing referenced
    assert "run-only" in " ".join(page.text)


def test_unreadable_result_is_listed_as_skipped_not_fatal(tmp_path):
    write_run_folder(tmp_path, "run-fine", times=12)
    broken = write_run_folder(tmp_path, "run-broken", times=12)
    (broken / "metrics.parquet").write_bytes(b"not parquet")
    assert _report_cli(str(tmp_path), "--keep-figures") == 0
    page = read_page(tmp_path / "index.html")
    assert "skipped" in page.ids
    text = " ".join(page.text)
    assert "run-broken" in text and "not a readable Parquet table" in text
    assert run_ids_in(tmp_path / "index.html") == ["run-fine"]
